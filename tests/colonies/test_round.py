"""The daily round: one row per tank in use, saved in one submit, all or nothing."""
import re
from datetime import timedelta

import pytest
from django.db import connection
from django.test.utils import CaptureQueriesContext
from django.urls import reverse
from django.utils import timezone

from colonies.models import Check, Tank
from tests.factories import make_check, make_room, make_species, make_tank, make_tank_target, page_text, round_data


@pytest.fixture
def species(db):
    return make_species(targets={"temp_c": (21.0, 25.0), "ph": (6.0, 8.0)})


@pytest.fixture
def room(db):
    return make_room(code="fw-1", name="Freshwater room 1")


@pytest.fixture
def tanks(room, species):
    return [make_tank(code="FW-01", room=room, species=species), make_tank(code="FW-02", room=room, species=species)]


@pytest.fixture
def url(room):
    return reverse("colonies:round-room", args=[room.code])


def _row_codes(response):
    return [row["tank"].code for row in response.context["rows"]]


# ---------------------------------------------------------------------------------------------
# The page
# ---------------------------------------------------------------------------------------------
def test_round_lists_tanks_in_use_of_the_room_and_not_retired_or_other_rooms(client, technician, room, species):
    make_tank(code="FW-02", room=room, species=species, status=Tank.Status.QUARANTINE)
    make_tank(code="FW-01", room=room, species=species)
    make_tank(code="FW-03", room=room, species=species, status=Tank.Status.RETIRED)
    make_tank(code="ZZ-01", room=make_room(code="zz-2"), species=species)
    client.force_login(technician)

    assert _row_codes(client.get(reverse("colonies:round-room", args=["fw-1"]))) == ["FW-01", "FW-02"]
    assert _row_codes(client.get(reverse("colonies:round"))) == ["FW-01", "FW-02", "ZZ-01"]


def test_round_for_unknown_room_is_404(client, technician):
    client.force_login(technician)
    assert client.get(reverse("colonies:round-room", args=["nowhere"])).status_code == 404


def test_round_shows_each_tanks_last_value_and_target_beside_the_input(client, technician, tanks, url):
    now = timezone.now()
    make_check(tanks[0], user=technician, ph=7.0, observed_at=now - timedelta(days=2))
    make_check(tanks[0], user=technician, ph=7.4, observed_at=now - timedelta(days=1))
    make_check(tanks[0], user=technician, temp_c=22.5, observed_at=now - timedelta(hours=1))  # no pH this time
    client.force_login(technician)

    response = client.get(url)

    assert response.status_code == 200
    cells = {c["param"].key: c for c in response.context["rows"][0]["cells"]}
    assert cells["ph"]["last"] == "7.40"  # the latest *non-empty* pH, not the latest check
    assert cells["temp_c"]["last"] == "22.5"
    assert cells["ph"]["target"] == "6–8"
    text = page_text(response)
    assert "last 7.40" in text
    # The live highlighting script reads the target and the physical bounds from the input.
    ph_input = re.search(r'<input[^>]*name="FW-01-ph"[^>]*>', text).group(0)
    for attr in ('data-low="6"', 'data-high="8"', 'data-min="0"', 'data-max="14"'):
        assert attr in ph_input


def test_round_last_value_ignores_voided_checks(client, technician, tanks, url):
    make_check(tanks[0], user=technician, ph=7.1, observed_at=timezone.now() - timedelta(days=1))
    wrong = make_check(tanks[0], user=technician, ph=3.0)
    wrong.void(user=technician, reason="Meter not calibrated")
    client.force_login(technician)

    cells = {c["param"].key: c for c in client.get(url).context["rows"][0]["cells"]}

    assert cells["ph"]["last"] == "7.10"


# ---------------------------------------------------------------------------------------------
# Saving
# ---------------------------------------------------------------------------------------------
def test_round_saves_one_check_per_filled_row_and_skips_empty_rows(client, technician, tanks, url):
    client.force_login(technician)

    response = client.post(url, round_data({"FW-01": {"ph": "7,2", "temp_c": "23.0", "dead_removed": "2",
                                                      "activity": "normal"},
                                            "FW-02": {"ph": "", "temp_c": ""}}))

    assert response.status_code == 302
    assert response["Location"] == url
    check = Check.objects.get()
    assert (check.tank.code, check.ph, check.temp_c, check.dead_removed) == ("FW-01", 7.2, 23.0, 2)
    assert check.activity == Check.Activity.NORMAL
    assert check.recorded_by == technician
    assert check.flags == {}
    history = check.history.get()
    assert history.history_user == technician
    assert history.history_change_reason == "Logged on the daily round"


def test_round_uses_the_observed_time_when_given(client, technician, tanks, url):
    client.force_login(technician)
    Tank.objects.update(started_on=timezone.localdate() - timedelta(days=30))
    earlier = timezone.localtime() - timedelta(hours=10)

    response = client.post(url, round_data({"FW-01": {"ph": "7.0"}},
                                           **{"round-observed_at": earlier.strftime("%Y-%m-%dT%H:%M")}))

    assert response.status_code == 302
    assert Check.objects.get().observed_at == earlier.replace(second=0, microsecond=0)


@pytest.mark.parametrize("observed", ["1900-01-01T08:00", "0001-01-01T00:00", "9999-12-31T23:59"])
def test_round_rejects_an_observed_time_before_the_tank_or_far_off_and_saves_nothing(client, technician, tanks, url,
                                                                                     observed):
    client.force_login(technician)

    response = client.post(url, round_data({"FW-01": {"ph": "7.0"}}, **{"round-observed_at": observed}))

    assert response.status_code == 400
    assert "Observed at: " in page_text(response) and "allowed range" in page_text(response)
    assert Check.objects.count() == 0


def test_round_rejects_an_observed_time_before_the_tank_was_started(client, technician, tanks, url):
    client.force_login(technician)
    Tank.objects.update(started_on=timezone.localdate())
    yesterday = timezone.localtime() - timedelta(days=1)

    response = client.post(url, round_data({"FW-01": {"ph": "7.0"}},
                                           **{"round-observed_at": yesterday.strftime("%Y-%m-%dT%H:%M")}))

    assert response.status_code == 400
    assert "(when tank FW-01 was started)" in page_text(response)
    assert Check.objects.count() == 0


def test_round_rejects_an_observed_time_in_the_future_and_saves_nothing(client, technician, tanks, url):
    client.force_login(technician)
    later = timezone.localtime() + timedelta(days=1)

    response = client.post(url, round_data({"FW-01": {"ph": "7.0"}},
                                           **{"round-observed_at": later.strftime("%Y-%m-%dT%H:%M")}))

    assert response.status_code == 400
    assert "is in the future" in page_text(response)
    assert Check.objects.count() == 0


IMPOSSIBLE = [
    ("ph", "15", "Tank FW-02, pH: 15 is impossible; allowed range 0 to 14."),
    ("ph", "seven", "Tank FW-02, pH: 'seven' is not a number; allowed range 0 to 14."),
    ("no3_mg_l", "-0.5", "Tank FW-02, Nitrate (mg/L NO3-N): -0.5 is impossible; allowed range 0 to 500 mg/L NO3-N."),
    ("tan_mg_l", "-1", "Tank FW-02, Total ammonia (mg/L NH3-N): -1 is impossible; allowed range 0 to 100 mg/L NH3-N."),
    ("temp_c", "51", "Tank FW-02, Temperature (°C): 51 is impossible; allowed range -5 to 50 °C."),
    ("temp_c", "-6", "Tank FW-02, Temperature (°C): -6 is impossible; allowed range -5 to 50 °C."),
    ("dead_removed", "-3", "Tank FW-02, dead removed: -3 is impossible; allowed range 0 to 1,000,000."),
]


@pytest.mark.parametrize("field,value,message", IMPOSSIBLE, ids=[f"{f}={v}" for f, v, _ in IMPOSSIBLE])
def test_round_rejects_impossible_value_naming_tank_field_value_range_and_saves_nothing(
        client, technician, tanks, url, field, value, message):
    make_check(tanks[0], user=technician, ph=7.0, observed_at=timezone.now() - timedelta(days=1))
    checks_before, history_before = Check.objects.count(), Check.history.count()
    client.force_login(technician)

    response = client.post(url, round_data({"FW-01": {"ph": "7.1", "temp_c": "23"},  # a valid row
                                            "FW-02": {field: value}}))

    assert response.status_code == 400
    text = page_text(response)
    assert message in text
    assert "Nothing was saved." in text
    forms = {row["tank"].code: row["form"] for row in response.context["rows"]}
    assert forms["FW-01"].errors == {}
    assert list(forms["FW-02"].errors) == [field]
    assert (Check.objects.count(), Check.history.count()) == (checks_before, history_before)


def test_round_accepts_the_physical_bounds_themselves(client, technician, tanks, url):
    client.force_login(technician)

    response = client.post(url, round_data({"FW-01": {"ph": "14", "temp_c": "-5"},
                                            "FW-02": {"ph": "0", "temp_c": "50"}}))

    assert response.status_code == 302
    assert sorted(Check.objects.values_list("ph", "temp_c")) == [(0.0, 50.0), (14.0, -5.0)]


@pytest.mark.parametrize("data,code", [
    pytest.param({"rows": {"FW-01": {"ph": "7.1"}, "NOPE-9": {"ph": "7.0"}}}, "NOPE-9", id="field-prefix"),
    pytest.param({"rows": {"FW-01": {"ph": "7.1"}}, "listed": ["FW-01", "GHOST"]}, "GHOST", id="listed-code"),
])
def test_round_rejects_unknown_tank_code_and_saves_nothing(client, technician, tanks, url, data, code):
    client.force_login(technician)

    response = client.post(url, round_data(data["rows"], listed=data.get("listed")))

    assert response.status_code == 400
    assert f"Tank code '{code}' does not exist or is retired; allowed: the codes of tanks in use in " in page_text(response)
    assert "Nothing was saved." in page_text(response)
    assert (Check.objects.count(), Check.history.count()) == (0, 0)


def test_round_rejects_a_retired_tank_and_a_tank_of_another_room(client, technician, tanks, url, room, species):
    make_tank(code="FW-09", room=room, species=species, status=Tank.Status.RETIRED)
    make_tank(code="MA-01", room=make_room(code="mar-1"), species=species)
    client.force_login(technician)

    response = client.post(url, round_data({"FW-01": {"ph": "7.1"}, "FW-09": {"ph": "7.0"}, "MA-01": {"ph": "7.0"}}))

    assert response.status_code == 400
    text = page_text(response)
    assert "Tank code 'FW-09' does not exist or is retired" in text
    assert "Tank code 'MA-01' does not exist or is retired" in text
    assert Check.objects.count() == 0


def test_researcher_cannot_post_the_round(client, researcher, tanks, url):
    client.force_login(researcher)

    response = client.post(url, round_data({"FW-01": {"ph": "7.1"}}))

    assert response.status_code == 403
    assert Check.objects.count() == 0


# ---------------------------------------------------------------------------------------------
# Flags against care targets
# ---------------------------------------------------------------------------------------------
def test_round_saves_out_of_target_value_flagged_and_asks_for_corrective_action(client, technician, tanks, url):
    client.force_login(technician)

    response = client.post(url, round_data({"FW-01": {"ph": "9.1", "temp_c": "23"}}), follow=True)

    check = Check.objects.get()
    assert check.ph == 9.1  # out of target, still saved
    assert check.flags == {"ph": {"value": 9.1, "side": "high", "low": 6.0, "high": 8.0}}
    assert check.needs_corrective_action is True
    assert "Saved 1 check; 1 with flagged values. 1 still need a corrective-action note." in page_text(response)


def test_round_flagged_value_with_corrective_action_needs_no_further_action(client, technician, tanks, url):
    client.force_login(technician)

    response = client.post(url, round_data({"FW-01": {"temp_c": "19.0", "corrective_action": "Heater reset"}}),
                           follow=True)

    check = Check.objects.get()
    assert check.flags == {"temp_c": {"value": 19.0, "side": "low", "low": 21.0, "high": 25.0}}
    assert check.corrective_action == "Heater reset"
    assert check.needs_corrective_action is False
    text = page_text(response)
    assert "Saved 1 check; 1 with flagged values." in text
    assert "still need" not in text


def test_round_page_shows_a_saved_flag_beside_the_last_value(client, technician, tanks, url):
    make_check(tanks[0], user=technician, ph=9.1)
    make_check(tanks[1], user=technician, ph=5.5)
    client.force_login(technician)

    response = client.get(url)

    rows = {row["tank"].code: {c["param"].key: c for c in row["cells"]} for row in response.context["rows"]}
    assert (rows["FW-01"]["ph"]["last_side"], rows["FW-02"]["ph"]["last_side"]) == ("high", "low")
    assert rows["FW-01"]["temp_c"]["last_side"] is None
    text = page_text(response)
    assert '<span class="last was-flagged">last 9.10 ▲</span>' in text
    assert '<span class="last was-flagged">last 5.50 ▼</span>' in text


def test_round_reshows_typed_flags_after_an_error_elsewhere(client, technician, tanks, url):
    client.force_login(technician)

    response = client.post(url, round_data({"FW-01": {"ph": "9.1"}, "FW-02": {"ph": "15"}}))

    assert response.status_code == 400
    row = response.context["rows"][0]
    assert row["flagged"] is True
    assert "▲ above 6–8" in page_text(response)
    assert row["form"]["ph"].value() == "9.1"  # what was typed is kept
    assert Check.objects.count() == 0


@pytest.mark.parametrize("value,expected_flags", [
    # Override 18-22 replaces the species target 21-25.
    ("19.5", {}),
    ("23.0", {"temp_c": {"value": 23.0, "side": "high", "low": 18.0, "high": 22.0}}),
])
def test_round_flags_against_a_tank_override_instead_of_the_species_target(
        client, technician, tanks, url, value, expected_flags):
    make_tank_target(tanks[0], "temp_c", 18.0, 22.0, reason="Cool-acclimated line")
    client.force_login(technician)

    response = client.post(url, round_data({"FW-01": {"temp_c": value}, "FW-02": {"temp_c": value}}))

    assert response.status_code == 302
    flags = {c.tank.code: c.flags for c in Check.objects.select_related("tank")}
    assert flags["FW-01"] == expected_flags
    # FW-02 has no override: the species target 21-25 applies.
    species_side = "low" if float(value) < 21 else None
    assert flags["FW-02"] == ({"temp_c": {"value": float(value), "side": species_side, "low": 21.0, "high": 25.0}}
                              if species_side else {})


# ---------------------------------------------------------------------------------------------
# Query counts do not grow with the number of tanks
# ---------------------------------------------------------------------------------------------
def _add_tanks(room, species, user, first, n):
    tanks = [make_tank(code=f"Q-{i:03d}", room=room, species=species) for i in range(first, first + n)]
    for tank in tanks:  # each with a last value to show
        make_check(tank, user=user, ph=7.0, temp_c=23.0, observed_at=timezone.now() - timedelta(days=1))
    return tanks


def _full_round(tanks):
    return round_data({t.code: {"ph": "7.2", "temp_c": "22.0", "no3_mg_l": "3", "activity": "normal"} for t in tanks})


def test_round_query_count_does_not_grow_with_tanks(client, technician, room, species, url,
                                                    django_assert_num_queries):
    client.force_login(technician)
    tanks = _add_tanks(room, species, technician, 1, 5)
    with CaptureQueriesContext(connection) as get_5:
        assert client.get(url).status_code == 200
    with CaptureQueriesContext(connection) as post_5:
        assert client.post(url, _full_round(tanks)).status_code == 302
    assert Check.objects.filter(observed_at__gte=timezone.now() - timedelta(minutes=5)).count() == 5

    tanks += _add_tanks(room, species, technician, 6, 35)
    with django_assert_num_queries(len(get_5)):
        response = client.get(url)
    assert len(response.context["rows"]) == 40
    checks_before = Check.objects.count()
    # Exactly as many queries as for 5 tanks, on SQLite too (vermilog/sqlite3 uses SQLite's real
    # parameter limit, so 40 rows are still one insert).
    with django_assert_num_queries(len(post_5)):
        response = client.post(url, _full_round(tanks))
    assert response.status_code == 302
    assert Check.objects.count() == checks_before + 40
