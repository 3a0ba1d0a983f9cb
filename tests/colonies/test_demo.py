"""The `demo` command: migrate, load the demo into an empty database, print the logins."""
from io import StringIO

import pytest
from django.contrib.auth.models import User
from django.core.management import call_command

from colonies import demo
from colonies.management.commands import demo as demo_command
from colonies.models import Check, Tank
from tests.factories import make_tank


@pytest.fixture
def called(monkeypatch):
    """Record the commands `demo` runs, and still run them."""
    names = []

    def spy(name, *args, **kwargs):
        names.append(name)
        return call_command(name, *args, **kwargs)

    monkeypatch.setattr(demo_command, "call_command", spy)
    return names


@pytest.fixture
def short_demo(monkeypatch):
    # The full 120 days are loaded in test_load_demo.py; ten days are enough to check the wiring.
    monkeypatch.setattr(demo, "DAYS", 10)


@pytest.mark.django_db
def test_demo_no_serve_migrates_loads_and_prints_logins(called, short_demo):
    out = StringIO()

    call_command("demo", "--no-serve", stdout=out)

    assert called == ["migrate", "load_demo"]
    assert (Tank.objects.count(), User.objects.count()) == (24, 4)
    assert Check.objects.exists()
    text = out.getvalue()
    assert "Demo loaded (seed 7)" in text
    assert f"Demo logins (password for all: {demo.DEMO_PASSWORD})" in text
    for username, first, last, role in demo.DEMO_USERS:
        assert f"{username:<8} {role:<11} {first} {last}" in text
    assert "Open http://" not in text  # not serving
    assert User.objects.get(username="tamsin").check_password(demo.DEMO_PASSWORD)


@pytest.mark.django_db
def test_demo_does_not_load_into_a_database_with_data(called):
    make_tank(code="REAL-01")
    out = StringIO()

    call_command("demo", "--no-serve", stdout=out)

    assert called == ["migrate"]
    assert "Database already holds data; not loading the demo again." in out.getvalue()
    assert list(Tank.objects.values_list("code", flat=True)) == ["REAL-01"]
    assert User.objects.count() == 0
