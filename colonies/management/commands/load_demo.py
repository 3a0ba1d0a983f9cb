from django.core.management import call_command
from django.core.management.base import BaseCommand, CommandError

from colonies import demo


class Command(BaseCommand):
    help = "Load the invented demo scenario (Quillmoor Culture Facility): rooms, 24 tanks, 120 days, demo users."

    def add_arguments(self, parser):
        parser.add_argument("--seed", type=int, default=7, help="Random seed (default 7); same seed, same data.")
        parser.add_argument("--reset", action="store_true",
                            help="Erase ALL data in the database first. Never use on a real lab's database.")

    def handle(self, *args, seed, reset, **options):
        if demo.database_has_data():
            if not reset:
                raise CommandError("The database already holds data; refusing to load the demo. "
                                   "Use --reset to erase everything first (demo databases only).")
            call_command("flush", interactive=False, verbosity=0)
        counts = demo.load(seed=seed)
        summary = ", ".join(f"{v} {k.replace('_', ' ')}" for k, v in counts.items())
        self.stdout.write(self.style.SUCCESS(f"Demo loaded (seed {seed}): {summary}."))
