from django.core.management import call_command
from django.conf import settings
from django.core.management.base import BaseCommand, CommandError

from colonies import demo


class Command(BaseCommand):
    help = "Migrate, load the demo scenario if the database is empty, print the demo logins and serve on 127.0.0.1:8000."

    def add_arguments(self, parser):
        parser.add_argument("--addrport", default="127.0.0.1:8000")
        parser.add_argument("--no-serve", action="store_true", help="Prepare the database and print logins only.")

    def handle(self, *args, addrport, no_serve, **options):
        if not settings.DEBUG and not no_serve:
            raise CommandError("The demo serves with Django's development server, which needs DEBUG=1 "
                               "(manage.py demo sets it unless DEBUG is already set).")
        call_command("migrate", interactive=False, verbosity=0)
        if demo.database_has_data():
            self.stdout.write("Database already holds data; not loading the demo again.")
        else:
            call_command("load_demo", stdout=self.stdout)
        self.stdout.write("\nDemo logins (password for all: %s)" % demo.DEMO_PASSWORD)
        for username, first, last, role in demo.DEMO_USERS:
            self.stdout.write(f"  {username:<8} {role:<11} {first} {last}")
        if not no_serve:
            self.stdout.write(f"\nOpen http://{addrport}/ and sign in.\n")
            call_command("runserver", addrport, use_reloader=False)
