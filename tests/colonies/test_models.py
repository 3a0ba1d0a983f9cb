"""Model behaviour: care targets with overrides, flags, voiding, and the database's own bounds."""
from datetime import timedelta

import pytest
from django.db import IntegrityError, transaction
from django.utils import timezone

from colonies.flags import Target
from colonies.models import Check, Tank, WaterChange
from tests.factories import make_check, make_species, make_tank, make_tank_target


@pytest.fixture
def tank(db):
    return make_tank(code="FW-01", species=make_species(targets={"temp_c": (21.0, 25.0), "ph": (6.0, None)}))


def test_tank_override_replaces_the_species_target_for_that_parameter_only(tank):
    make_tank_target(tank, "temp_c", 18.0, 22.0)

    targets = tank.care_targets()

    assert targets == {"temp_c": Target(18.0, 22.0, "tank"), "ph": Target(6.0, None, "species")}


@pytest.mark.parametrize("row,flags", [
    ({"temp_c": 23.0, "ph": 7.0}, {}),
    ({"temp_c": 25.5}, {"temp_c": {"value": 25.5, "side": "high", "low": 21.0, "high": 25.0}}),
    ({"ph": 5.9}, {"ph": {"value": 5.9, "side": "low", "low": 6.0, "high": None}}),
    ({"ph": 13.0}, {}),  # open-ended target: no upper limit
    ({"temp_c": 25.0, "ph": 6.0}, {}),  # the target's ends are inside it
])
def test_saved_check_stores_flags_for_out_of_target_readings(tank, technician, row, flags):
    check = make_check(tank, user=technician, **row)

    check.refresh_from_db()
    assert check.flags == flags


@pytest.mark.parametrize("action,expected", [("", True), ("   ", True), ("Heater replaced", False)])
def test_flagged_check_needs_corrective_action_until_one_is_written(tank, technician, action, expected):
    check = make_check(tank, user=technician, temp_c=28.0, corrective_action=action)
    assert check.needs_corrective_action is expected


def test_check_within_target_needs_no_corrective_action(tank, technician):
    assert make_check(tank, user=technician, temp_c=22.0).needs_corrective_action is False


def test_void_requires_a_reason_and_happens_once(tank, technician):
    check = make_check(tank, user=technician, ph=7.0)

    with pytest.raises(ValueError, match="reason is required"):
        check.void(user=technician, reason="  ")
    check.void(user=technician, reason="Duplicate")
    with pytest.raises(ValueError, match="already voided"):
        check.void(user=technician, reason="Again")

    assert list(Check.objects.current()) == []
    assert list(Check.objects.voided()) == [check]


def test_late_entry_is_marked_after_six_hours(tank, technician):
    assert make_check(tank, user=technician, ph=7.0, observed_at=timezone.now() - timedelta(hours=7)).is_late_entry
    assert not make_check(tank, user=technician, ph=7.0, observed_at=timezone.now() - timedelta(hours=5)).is_late_entry


def test_tanks_in_use_exclude_retired(db):
    active, quarantined = make_tank(code="A-1"), make_tank(code="Q-1", status=Tank.Status.QUARANTINE)
    make_tank(code="R-1", status=Tank.Status.RETIRED)

    assert set(Tank.objects.in_use()) == {active, quarantined}
    assert list(Tank.objects.active()) == [active]


@pytest.mark.parametrize("field,value", [("ph", 15.0), ("no3_mg_l", -1.0), ("temp_c", 51.0), ("temp_c", -6.0)])
def test_database_refuses_physically_impossible_readings(tank, technician, field, value):
    with pytest.raises(IntegrityError), transaction.atomic():
        Check.objects.create(tank=tank, recorded_by=technician, **{field: value})


def test_database_refuses_a_water_change_without_amount(tank, technician):
    with pytest.raises(IntegrityError), transaction.atomic():
        WaterChange.objects.create(tank=tank, recorded_by=technician)


def test_str_and_urls(tank, technician):
    check = make_check(tank, user=technician, ph=7.0)
    assert str(tank) == "FW-01"
    assert tank.get_absolute_url() == "/tanks/FW-01/"
    assert check.get_absolute_url() == f"/checks/{check.pk}/"
    assert tank.species.get_absolute_url() == f"/species/{tank.species.pk}/"
    assert tank.room.get_absolute_url() == f"/round/{tank.room.code}/"


@pytest.mark.parametrize("code", ["FW-01", "A", "LV-0123456789"[:12], "odd code &1"])
def test_tank_url_is_what_reverse_gives_for_any_code(code):
    from django.urls import reverse

    from colonies.models import tank_url

    assert tank_url(code) == reverse("colonies:tank-detail", args=[code])


def test_tank_url_follows_the_script_prefix():
    from django.urls import clear_script_prefix, set_script_prefix

    from colonies.models import tank_url

    set_script_prefix("/lab/")
    try:
        assert tank_url("FW-01") == "/lab/tanks/FW-01/"
    finally:
        clear_script_prefix()
    assert tank_url("FW-01") == "/tanks/FW-01/"
