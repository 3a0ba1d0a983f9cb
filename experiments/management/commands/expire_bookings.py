from django.core.management.base import BaseCommand
from django.utils import timezone

from experiments import services


class Command(BaseCommand):
    help = ("Mark bookings that were not drawn by the end of their day as expired. Idempotent; schedule it daily. "
            "Pages write nothing: until then they show such bookings as expired and count none of their animals.")

    def add_arguments(self, parser):
        parser.add_argument("--dry-run", action="store_true", help="Report how many would expire; write nothing.")

    def handle(self, *args, dry_run, **options):
        today = timezone.localdate()
        n = services.expire_bookings(today, dry_run=dry_run)
        word = "would expire" if dry_run else "expired"
        self.stdout.write(f"{'Dry run: ' if dry_run else ''}{n} booking{'s' if n != 1 else ''} {word} "
                          f"(not drawn before {today:%Y-%m-%d}){'; nothing written' if dry_run else ''}.")
