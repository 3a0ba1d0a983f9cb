from colonies.management.history_refusal import RefusingHistoryCommand


class Command(RefusingHistoryCommand):
    name = "clean_old_history"

    def add_arguments(self, parser):
        super().add_arguments(parser)
        parser.add_argument("--days", type=int)
