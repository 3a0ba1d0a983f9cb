from datetime import date

from django.core.exceptions import ValidationError
from django.core.management.base import BaseCommand, CommandError
from django.utils import timezone

from colonies import deviations
from colonies.validators import check_date, start_of


class Command(BaseCommand):
    help = ("Run the time-based deviation rules (missed checks; feeding, water change and census overdue). "
            "Idempotent: running it twice opens nothing new. Schedule it, e.g. hourly. "
            "With --records, run the record rules (out of target, mortality, drift) over the stored checks "
            "instead: each judged against the checks before it, as when it was saved, and against the care "
            "targets in force now. Run it after a change of rules or targets, a restore or an import.")

    def add_arguments(self, parser):
        parser.add_argument("--dry-run", action="store_true", help="Report what the rules find; write nothing.")
        parser.add_argument("--records", action="store_true",
                            help="Rescan the record rules over the stored checks (idempotent; commits two months "
                                 "of checks at a time, so rounds saved meanwhile wait at most for one).")
        parser.add_argument("--since", metavar="YYYY-MM-DD",
                            help="With --records: only checks observed on or after this local date.")

    def handle(self, *args, dry_run, records, since, **options):
        if since is not None and not records:
            raise CommandError("--since applies to --records only.")
        if records:
            report = deviations.rescan(since=_start(since), dry_run=dry_run)
            if dry_run:
                self.stdout.write(f"Dry run: {report.judged()}; nothing written.")
            else:
                self.stdout.write(f"Rescanned records: {report}.")
            return
        findings, outcome = deviations.scan(timezone.now(), dry_run=dry_run)
        if dry_run:
            self.stdout.write(f"Dry run: {len(findings)} findings; nothing written.")
        else:
            self.stdout.write(f"Scanned: {len(findings)} findings; {outcome}.")


def _start(since: str | None):
    """Local midnight at the start of --since, refused with the allowed range when it is not a possible date."""
    if since is None:
        return None
    try:
        day = date.fromisoformat(since)
    except ValueError:
        raise CommandError(f"--since: {since!r} is not a date; write it as YYYY-MM-DD.") from None
    try:
        return start_of(check_date("--since", day))
    except ValidationError as e:
        raise CommandError(e.messages[0]) from None
