from colonies.management.history_refusal import RefusingHistoryCommand


class Command(RefusingHistoryCommand):
    name = "clean_duplicate_history"

    def add_arguments(self, parser):
        super().add_arguments(parser)
        parser.add_argument("-m", "--minutes", type=int)
        parser.add_argument("--excluded_fields", nargs="+")
