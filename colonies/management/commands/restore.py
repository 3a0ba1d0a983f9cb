from pathlib import Path

from django.core.management.base import BaseCommand, CommandError

from colonies import backup


class Command(BaseCommand):
    help = ("Restore a backup folder made by `backup` into the configured, EMPTY database and MEDIA_ROOT. "
            "Every part is first checked against the SHA-256 in its manifest; a damaged or incomplete backup, "
            "a database that already holds records, or a media file that would be overwritten is refused "
            "before anything changes. There is no option to overwrite.")

    def add_arguments(self, parser):
        parser.add_argument("path", type=Path, help="The backup folder (vermilog-backup-…), holding manifest.json.")
        parser.add_argument("--verify-only", action="store_true",
                            help="Only check the backup's checksums (no database needed); change nothing.")
        parser.add_argument("--dry-run", action="store_true",
                            help="Run every check a restore makes (checksums, empty database, engine, migrations, "
                                 "media files, client tools) and stop; change nothing.")

    def handle(self, *args, path, verify_only, dry_run, **options):
        try:
            if verify_only:
                manifest = backup.verify(path)
                self.stdout.write(self.style.SUCCESS(
                    f"Backup {path.name} is complete: {len(manifest['parts'])} parts match their SHA-256 "
                    f"({manifest['kind']}, made {manifest['created_at']})."))
                return
            result = backup.restore(path, dry_run=dry_run)
        except backup.BackupError as error:
            raise CommandError(str(error)) from None
        self.stdout.write(self.style.SUCCESS(result.summary))
