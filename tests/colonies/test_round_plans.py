"""The round asks only what is due: measurement plans, observations that default to normal, corrective
actions still missing, a round saved on the device and sent later, and Today's counts."""
import re
from datetime import timedelta

import pytest
from django.urls import reverse
from django.utils import timezone

from colonies import schedules
from colonies.models import Check, Deviation, MeasurementPlan, TankMeasurementPlan, WaterChange
from colonies.services import record_water_change
from tests.factories import make_check, make_room, make_species, make_tank, page_text, round_data


@pytest.fixture
def room(db):
    return make_room(code="fw-9", name="Freshwater room 9")


@pytest.fixture
def species(db):
    species = make_species(targets={"temp_c": (21.0, 25.0), "ph": (6.0, 8.0)})
    # pH every 3 days; everything else as Vermilog's defaults (temperature daily).
    MeasurementPlan.objects.create(species=species, parameter="ph", cadence=schedules.EVERY_N_DAYS, every_days=3,
                                   while_deviation_open=True)
    return species


@pytest.fixture
def tank(room, species):
    return make_tank(code="FW-91", room=room, species=species, started_on=timezone.localdate() - timedelta(days=60))


@pytest.fixture
def url(room):
    return reverse("colonies:round-room", args=[room.code])


def _row(response, code):
    return next(r for r in response.context["rows"] if r["tank"].code == code)


def _due(response, code):
    return {p.key for p in _row(response, code)["due"]}


def _shown_outside_more(response, code) -> set[str]:
    """Reading inputs of the tank's block that are not under its "more readings" toggle."""
    html = str(_row(response, code)["html"])
    before_more = html.split('<details class="more"')[0]
    return set(re.findall(rf'name="{code}-(\w+)"[^>]*class="reading"', before_more))


def test_round_shows_only_the_readings_due_and_keeps_the_others_one_tap_away(client, technician, tank, url):
    make_check(tank, user=technician, ph=7.0, temp_c=22.0, observed_at=timezone.now() - timedelta(days=1))
    client.force_login(technician)

    response = client.get(url)

    # Temperature is daily (measured yesterday: due); pH every 3 days (measured yesterday: not due).
    assert "temp_c" in _due(response, "FW-91") and "ph" not in _due(response, "FW-91")
    shown = _shown_outside_more(response, "FW-91")
    assert "temp_c" in shown and "ph" not in shown
    assert 'name="FW-91-ph"' in str(_row(response, "FW-91")["html"])  # still there, under "more readings"


def test_a_tank_plan_replaces_its_species_plan(client, technician, tank, url):
    make_check(tank, user=technician, ph=7.0, observed_at=timezone.now() - timedelta(days=1))
    TankMeasurementPlan.objects.create(tank=tank, parameter="ph", cadence=schedules.DAILY, reason="New culture")
    client.force_login(technician)

    assert "ph" in _due(client.get(url), "FW-91")


def test_an_open_deviation_makes_its_readings_due_daily(client, technician, tank, url):
    make_check(tank, user=technician, ph=9.5, observed_at=timezone.now() - timedelta(days=1))  # flagged, opens one
    assert Deviation.objects.unresolved().filter(tank=tank, parameter="ph").exists()
    client.force_login(technician)

    assert "ph" in _due(client.get(url), "FW-91")


def test_a_water_change_makes_the_readings_planned_after_it_due(client, technician, room, url):
    species = make_species()  # Vermilog's defaults: pH weekly and after each water change
    tank = make_tank(code="FW-92", room=room, species=species)
    make_check(tank, user=technician, ph=7.1, observed_at=timezone.now() - timedelta(minutes=30))
    client.force_login(technician)
    assert "ph" not in _due(client.get(url), "FW-92")

    record_water_change(user=technician, change=WaterChange(tank=tank, litres=1.0, observed_at=timezone.now(),
                                                            recorded_by=technician))

    assert "ph" in _due(client.get(url), "FW-92")


def test_observations_left_at_normal_do_not_make_a_check(client, technician, tank, url):
    client.force_login(technician)
    defaults = {name: value for name, value in Check.OBSERVATION_DEFAULTS.items()}

    response = client.post(url, round_data({"FW-91": defaults}))

    assert response.status_code == 302 and Check.objects.count() == 0


def test_a_filled_row_records_the_observations_as_normal(client, technician, tank, url):
    client.force_login(technician)

    client.post(url, round_data({"FW-91": {"temp_c": "22.4", **Check.OBSERVATION_DEFAULTS}}))

    check = Check.objects.get()
    assert (check.activity, check.clarity, check.odour) == ("normal", "clear", "none")


def test_the_round_page_shows_the_observations_as_normal_by_default(client, technician, tank, url):
    client.force_login(technician)
    html = str(_row(client.get(url), "FW-91")["html"])
    assert '<option value="normal" selected>' in html and '<option value="clear" selected>' in html
    assert "Observations: normal" in html


def test_a_round_saved_on_the_device_is_recorded_at_the_time_it_was_saved_there(client, technician, tank, url):
    client.force_login(technician)
    kept = timezone.now().replace(microsecond=0) - timedelta(hours=7)

    client.post(url, round_data({"FW-91": {"temp_c": "22.0"}}, **{"round-kept_at": kept.isoformat()}))

    check = Check.objects.get()
    assert check.observed_at == kept
    assert check.recorded_at - check.observed_at >= timedelta(hours=7)  # shown as a late entry


def test_a_device_time_in_the_future_is_refused_naming_the_field(client, technician, tank, url):
    client.force_login(technician)
    ahead = timezone.now() + timedelta(hours=2)

    response = client.post(url, round_data({"FW-91": {"temp_c": "22.0"}}, **{"round-kept_at": ahead.isoformat()}))

    assert response.status_code == 400 and Check.objects.count() == 0
    assert "Saved on the device at" in page_text(response)


def test_a_flagged_value_without_an_action_is_shown_on_the_round_until_one_is_added(client, technician, tank, url):
    check = make_check(tank, user=technician, temp_c=27.0, observed_at=timezone.now() - timedelta(hours=3))
    make_check(tank, user=technician, temp_c=28.0, observed_at=timezone.now() - timedelta(days=20))  # too old to list
    client.force_login(technician)

    html = str(_row(client.get(url), "FW-91")["html"])
    assert html.count("corrective action missing") == 1 and f"/checks/{check.pk}/edit/" in html

    check.corrective_action = "Heater thermostat reset"
    check.save()
    assert "corrective action missing" not in str(_row(client.get(url), "FW-91")["html"])


def test_today_counts_the_readings_due_and_the_missing_actions_per_room(client, technician, tank, room):
    make_check(tank, user=technician, temp_c=27.0, ph=7.0, observed_at=timezone.now() - timedelta(days=1))
    client.force_login(technician)

    response = client.get(reverse("colonies:home"))

    entry = next(e for e in response.context["rooms"] if e["room"] == room)
    assert entry["missing_actions"] == 1
    assert dict(entry["readings"])["Temp"] == 1 and "pH" not in dict(entry["readings"])
    assert "without a corrective action" in page_text(response)


def test_the_round_service_worker_is_served_to_anyone_as_javascript(client):
    response = client.get(reverse("colonies:round-sw"))
    assert response.status_code == 200
    assert response["Content-Type"].startswith("text/javascript")
    body = response.content.decode()
    assert "vermilog-round-" in body and "/static/js/round.js" in body
    assert response["Cache-Control"] == "no-cache"


def test_plans_refuse_an_incomplete_cadence_in_the_database(species):
    from django.db import IntegrityError, transaction

    with pytest.raises(IntegrityError), transaction.atomic():
        MeasurementPlan.objects.create(species=species, parameter="no3_mg_l", cadence=schedules.WEEKLY, weekday=None)
