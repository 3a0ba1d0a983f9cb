"""Login throttling (django-axes), idle sessions, password validators wherever a password is set, DEBUG off by default."""
import getpass
import os
import subprocess
import sys
from datetime import timedelta
from pathlib import Path

import pytest
from django.conf import settings
from django.contrib.auth.models import User
from django.contrib.sessions.models import Session
from django.utils import timezone
from django.core.management import call_command
from django.core.management.base import CommandError
from django.urls import reverse

BASE_DIR = Path(__file__).resolve().parent.parent
STRONG = "Gl0wing-worm-ledger"


# ---------------------------------------------------------------------------------------------
# Login throttling
# ---------------------------------------------------------------------------------------------
def _login(client, username, password, ip="10.0.0.1"):
    return client.post(reverse("login"), {"username": username, "password": password}, REMOTE_ADDR=ip)


def test_five_failures_lock_the_username_from_that_address(client, db):
    User.objects.create_user("tam", password=STRONG)
    for _ in range(settings.AXES_FAILURE_LIMIT - 1):
        assert _login(client, "tam", "wrong").status_code == 200  # the form again, with its error
    assert _login(client, "tam", "wrong").status_code == 429  # the fifth failure locks
    response = _login(client, "tam", STRONG)
    assert response.status_code == 429
    assert "Sign-in paused" in response.content.decode()
    assert "_auth_user_id" not in client.session
    # The same username from another address, and another username from this one, still sign in.
    assert _login(client, "tam", STRONG, ip="10.0.0.2").status_code == 302
    client.logout()
    User.objects.create_user("ily", password=STRONG)
    assert _login(client, "ily", STRONG).status_code == 302


def test_a_success_resets_the_count(client, db):
    User.objects.create_user("tam", password=STRONG)
    for _ in range(settings.AXES_FAILURE_LIMIT - 1):
        _login(client, "tam", "wrong")
    assert _login(client, "tam", STRONG).status_code == 302
    client.logout()
    for _ in range(settings.AXES_FAILURE_LIMIT - 1):
        _login(client, "tam", "wrong")
    assert _login(client, "tam", STRONG).status_code == 302


def test_throttling_defaults():
    assert settings.AXES_FAILURE_LIMIT == 5
    assert settings.AXES_COOLOFF_TIME.total_seconds() == 15 * 60
    assert settings.AXES_LOCKOUT_PARAMETERS == [["username", "ip_address"]]


# ---------------------------------------------------------------------------------------------
# Idle sessions
# ---------------------------------------------------------------------------------------------
def test_every_request_moves_the_session_expiry_forward(client, technician, settings):
    settings.SESSION_SAVE_EVERY_REQUEST = True  # as in production (tests/conftest.py turns it off for query counts)
    assert settings.SESSION_COOKIE_AGE == 8 * 3600
    client.force_login(technician)
    key = client.session.session_key
    Session.objects.filter(session_key=key).update(expire_date=timezone.now() + timedelta(minutes=5))
    response = client.get(reverse("colonies:home"))
    assert response.cookies[settings.SESSION_COOKIE_NAME]["max-age"] == 8 * 3600
    left = Session.objects.get(session_key=key).expire_date - timezone.now()
    assert timedelta(hours=7, minutes=59) < left <= timedelta(hours=8)


def test_an_idle_session_ends(client, technician, settings):
    settings.SESSION_SAVE_EVERY_REQUEST = True
    client.force_login(technician)
    Session.objects.filter(session_key=client.session.session_key).update(
        expire_date=timezone.now() - timedelta(seconds=1))
    response = client.get(reverse("colonies:home"))
    assert response.status_code == 302 and response["Location"].startswith(reverse("login"))


def test_production_saves_the_session_on_every_request():
    assert _settings_of("SESSION_SAVE_EVERY_REQUEST", "SESSION_COOKIE_AGE", DEBUG="1") == ["True", "28800"]


# ---------------------------------------------------------------------------------------------
# Password validators
# ---------------------------------------------------------------------------------------------
def test_createsuperuser_noinput_refuses_a_weak_password(db, monkeypatch):
    monkeypatch.setenv("DJANGO_SUPERUSER_PASSWORD", "password")
    with pytest.raises(CommandError, match="DJANGO_SUPERUSER_PASSWORD: .*too common"):
        call_command("createsuperuser", interactive=False, username="boss", email="boss@example.invalid", verbosity=0)
    assert not User.objects.filter(username="boss").exists()
    monkeypatch.setenv("DJANGO_SUPERUSER_PASSWORD", STRONG)
    call_command("createsuperuser", interactive=False, username="boss", email="boss@example.invalid", verbosity=0)
    assert User.objects.get(username="boss").check_password(STRONG)


class _TTY:
    def isatty(self):
        return True


def test_createsuperuser_offers_no_bypass_when_typed(db, monkeypatch, capsys):
    typed = iter(["12345678", "12345678", STRONG, STRONG])
    monkeypatch.setattr(getpass, "getpass", lambda prompt="Password: ": next(typed))
    call_command("createsuperuser", interactive=True, stdin=_TTY(), username="boss", email="boss@example.invalid")
    assert "Weak passwords are not accepted here" in capsys.readouterr().out
    assert User.objects.get(username="boss").check_password(STRONG)


def test_the_back_office_refuses_a_weak_password(client, superuser):
    client.force_login(superuser)
    response = client.post(reverse("admin:auth_user_add"), {"username": "newbie", "usable_password": "true",
                                                            "password1": "12345678", "password2": "12345678"})
    assert response.status_code == 200
    assert "This password is too common." in response.content.decode()
    assert not User.objects.filter(username="newbie").exists()


def test_validators_are_configured():
    names = [v["NAME"].rsplit(".", 1)[1] for v in settings.AUTH_PASSWORD_VALIDATORS]
    assert names == ["UserAttributeSimilarityValidator", "MinimumLengthValidator", "CommonPasswordValidator",
                     "NumericPasswordValidator"]


# ---------------------------------------------------------------------------------------------
# DEBUG off unless set
# ---------------------------------------------------------------------------------------------
def _settings_of(*names, **env) -> list[str]:
    environ = {k: v for k, v in os.environ.items() if k not in {"DEBUG", "SECRET_KEY", "ALLOWED_HOSTS",
                                                                "DJANGO_SETTINGS_MODULE"}}
    environ.update(env, DJANGO_SETTINGS_MODULE="vermilog.settings")
    code = "from django.conf import settings; print(*[repr(getattr(settings, n)) for n in %r], sep='\\n')" % (names,)
    result = subprocess.run([sys.executable, "-c", code], cwd=BASE_DIR, env=environ, capture_output=True, text=True,
                            timeout=60)
    assert result.returncode == 0, result.stderr
    return result.stdout.splitlines()


def test_debug_is_off_unless_the_environment_turns_it_on():
    assert _settings_of("DEBUG", "ALLOWED_HOSTS", SECRET_KEY="x" * 60) == [
        "False", "['127.0.0.1', 'localhost', '[::1]']"]
    assert _settings_of("DEBUG", DEBUG="1") == ["True"]


def test_session_and_upload_limits_come_from_the_environment():
    assert _settings_of("SESSION_COOKIE_AGE", "AXES_FAILURE_LIMIT", "ATTACHMENT_MAX_BYTES", DEBUG="1",
                        SESSION_COOKIE_AGE="600", AXES_FAILURE_LIMIT="3", ATTACHMENT_MAX_BYTES="1000") == [
        "600", "3", "1000"]
