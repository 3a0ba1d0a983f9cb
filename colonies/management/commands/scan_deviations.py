from django.core.management.base import BaseCommand
from django.utils import timezone

from colonies import deviations


class Command(BaseCommand):
    help = ("Run the time-based deviation rules (missed checks; feeding, water change and census overdue). "
            "Idempotent: running it twice opens nothing new. Schedule it, e.g. hourly.")

    def add_arguments(self, parser):
        parser.add_argument("--dry-run", action="store_true", help="Report what would be opened, write nothing.")

    def handle(self, *args, dry_run, **options):
        findings, outcome = deviations.scan(timezone.now(), dry_run=dry_run)
        if dry_run:
            self.stdout.write(f"Dry run: {len(findings)} findings; nothing written.")
        else:
            self.stdout.write(f"Scanned: {len(findings)} findings; {outcome}.")
