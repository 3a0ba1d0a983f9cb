"""Vermilog's stand-ins for the history library's purge commands: they refuse and delete nothing.

django-simple-history ships `clean_duplicate_history` and `clean_old_history`, which delete history
rows. In Vermilog every version is evidence, so commands of the same names live in this app, which
comes before `simple_history` in INSTALLED_APPS (Django runs the command of the earliest app that
has one). They take the library's options, so any invocation gets the refusal, not a usage error.
"""
from django.core.management.base import BaseCommand, CommandError

REFUSAL = ("{name} is disabled in Vermilog: the change history is the record of who changed what, "
           "when and why, and no version is ever deleted. Nothing was removed.")


class RefusingHistoryCommand(BaseCommand):
    name = ""

    @property
    def help(self):
        return f"Disabled: always refuses. {REFUSAL.format(name=self.name)}"

    def add_arguments(self, parser):
        parser.add_argument("models", nargs="*", type=str)
        parser.add_argument("--auto", action="store_true")
        parser.add_argument("-d", "--dry", action="store_true")
        parser.add_argument("--base-manager", action="store_true")

    def handle(self, *args, **options):
        raise CommandError(REFUSAL.format(name=self.name))
