from pathlib import Path

from django.conf import settings
from django.core.management.base import BaseCommand, CommandError

from colonies import backup


class Command(BaseCommand):
    help = ("Write a consistent backup of the database and the uploaded files (MEDIA_ROOT) into a new folder "
            "vermilog-backup-<UTC time>/ with a manifest of SHA-256 checksums. SQLite: online backup API; "
            "PostgreSQL: pg_dump -Fc; --portable: one JSON-lines file per table, restorable on either engine.")

    def add_arguments(self, parser):
        parser.add_argument("--output", type=Path, default=Path(settings.BASE_DIR) / "backups",
                            help="Folder to write the backup folder into (default: backups/ in the project).")
        parser.add_argument("--portable", action="store_true",
                            help="Write every table as JSON lines instead of the engine's own format, to move "
                                 "data between SQLite and PostgreSQL.")

    def handle(self, *args, output, portable, **options):
        try:
            result = backup.backup(output, portable=portable)
        except backup.BackupError as error:
            raise CommandError(str(error)) from None
        self.stdout.write(self.style.SUCCESS(result.summary))
