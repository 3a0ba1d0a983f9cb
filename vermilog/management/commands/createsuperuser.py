"""Django's createsuperuser, with the password validators (AUTH_PASSWORD_VALIDATORS) always applied.

Stock Django skips them for --noinput with DJANGO_SUPERUSER_PASSWORD and offers to bypass them when
typed interactively; here a weak password is refused in both cases and nothing is created.
"""
import builtins
import os

from django.contrib.auth import get_user_model
from django.contrib.auth.management.commands import createsuperuser as stock
from django.contrib.auth.password_validation import validate_password
from django.core import exceptions
from django.core.management.base import CommandError

BYPASS_QUESTION = "Bypass password validation"


def _no_bypass_input(prompt=""):
    if prompt.startswith(BYPASS_QUESTION):
        print("Weak passwords are not accepted here; choose another.")
        return "n"
    return builtins.input(prompt)


class Command(stock.Command):
    help = stock.Command.help + " The password validators are always applied."

    def handle(self, *args, **options):
        if not options["interactive"] and "DJANGO_SUPERUSER_PASSWORD" in os.environ:
            model = get_user_model()
            username = options[model.USERNAME_FIELD] or os.environ.get(f"DJANGO_SUPERUSER_{model.USERNAME_FIELD.upper()}")
            try:
                validate_password(os.environ["DJANGO_SUPERUSER_PASSWORD"], model(**{model.USERNAME_FIELD: username}))
            except exceptions.ValidationError as error:
                raise CommandError("DJANGO_SUPERUSER_PASSWORD: " + " ".join(error.messages)) from None
        stock.input = _no_bypass_input  # the stock loop asks before bypassing; always answer no
        try:
            return super().handle(*args, **options)
        finally:
            del stock.input
