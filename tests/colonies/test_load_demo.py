"""The load_demo command: the invented Quillmoor scenario, the same for the same seed.

A full load takes a few seconds, so the suite loads the full 120 days only in the first test
(twice, to compare); test_demo.py shortens the scenario to check the wiring of `demo`.
"""
import hashlib
import json
from datetime import timedelta
from io import StringIO

import pytest
from django.contrib.auth.models import User
from django.core.management import CommandError, call_command
from django.db import connection
from django.utils import timezone

from colonies import demo
from colonies.models import Check, Room, Tank
from colonies.roles import MANAGER, RESEARCHER, TECHNICIAN
from tests.factories import make_tank


def _fingerprint() -> tuple[str, int]:
    """A digest of every check's content. Today's checks are compared by date only: the loader
    moves a reading "taken" later today back to just before now."""
    today = timezone.localdate()
    rows = []
    for c in Check.objects.select_related("tank", "recorded_by").order_by("tank__code", "observed_at"):
        when = timezone.localtime(c.observed_at)
        rows.append((c.tank.code, str(when.date()) if when.date() == today else when.isoformat(),
                     c.recorded_by.username, sorted(c.readings().items()), c.dead_removed, c.activity, c.clumping,
                     c.clarity, c.corrective_action, c.is_voided, json.dumps(c.flags, sort_keys=True)))
    return hashlib.sha256(repr(rows).encode()).hexdigest(), len(rows)


@pytest.mark.django_db
def test_load_demo_loads_the_scenario_and_the_same_seed_gives_the_same_data():
    out = StringIO()
    call_command("load_demo", "--seed", "11", stdout=out)

    assert (Room.objects.count(), Tank.objects.count(), User.objects.count()) == (3, 24, 4)
    assert {u.username: set(u.groups.values_list("name", flat=True)) for u in User.objects.all()} == {
        "tamsin": {TECHNICIAN}, "ilya": {TECHNICIAN}, "ravi": {RESEARCHER}, "morwen": {MANAGER}}
    first = timezone.localtime(Check.objects.earliest("observed_at").observed_at).date()
    assert timezone.localdate() - first == timedelta(days=demo.DAYS) == timedelta(days=120)
    # Roughly one check per tank and day, a few missed; today only the first room is done.
    assert 23 * 120 * 0.9 < Check.objects.count() < 24 * 121
    assert Check.objects.exclude(flags={}).exists()
    assert "Demo loaded (seed 11): 3 rooms, 24 tanks" in out.getvalue()
    fingerprint = _fingerprint()
    # Fire the foreign-key checks PostgreSQL defers to the end of the test's transaction; with them
    # pending it refuses the TRUNCATE of --reset. (Outside a test the first load is committed.)
    connection.check_constraints()

    call_command("load_demo", "--reset", "--seed", "11", stdout=StringIO())

    assert (Room.objects.count(), Tank.objects.count(), User.objects.count()) == (3, 24, 4)  # replaced, not doubled
    assert _fingerprint() == fingerprint


@pytest.mark.django_db
def test_load_demo_refuses_a_database_with_data_without_reset(technician):
    make_tank(code="REAL-01")

    with pytest.raises(CommandError, match="already holds data; refusing to load the demo"):
        call_command("load_demo", stdout=StringIO())

    assert list(Tank.objects.values_list("code", flat=True)) == ["REAL-01"]
    assert list(User.objects.values_list("username", flat=True)) == [technician.username]
