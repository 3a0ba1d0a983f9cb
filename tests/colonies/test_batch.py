"""Husbandry for many tanks (colonies/batch_views.py, colonies/batch.py, colonies/batch_forms.py): one screen
records a feeding, a water change or dead animals removed for a room, a rack or the tanks due."""
import json
import re
from datetime import timedelta
from types import SimpleNamespace

import pytest

from vermilog.lab_time import lab_moment
from django.db import connection
from django.test.utils import CaptureQueriesContext
from django.urls import reverse
from django.utils import timezone

from colonies import services
from colonies.models import Check, DeadRemoval, Deviation, Feeding, Tank, WaterChange
from colonies.round_post import ROWS_FIELD
from tests.factories import make_room, make_species, make_tank, page_text


@pytest.fixture
def world(db, technician):
    started = timezone.localdate() - timedelta(days=90)
    species = make_species(scientific_name="Testworm multiplex", feeding_interval_days=3, water_change_interval_days=7,
                           water_change_fraction=0.3, default_food="liver paste", default_feeding_amount=0.2,
                           default_feeding_unit="mL", default_source_water="1x salts")
    bare = make_species(scientific_name="Testworm nudus")  # no husbandry defaults
    room = make_room(code="wet-1", name="Wet lab 1")
    tanks = {code: make_tank(code=code, room=room, species=species, position=position, volume_l=2.0, started_on=started)
             for code, position in (("A-01", "rack 1, shelf A"), ("A-02", "rack 1, shelf B"), ("A-03", "rack 2, shelf A"))}
    tanks["A-04"] = make_tank(code="A-04", room=room, species=bare, position="rack 2, shelf B", started_on=started)
    tanks["A-05"] = make_tank(code="A-05", room=room, species=species, position="rack 2", started_on=started,
                              status=Tank.Status.RETIRED)
    other_room = make_room(code="dry-2", name="Dry lab 2")
    tanks["B-01"] = make_tank(code="B-01", room=other_room, species=species, position="rack 1", started_on=started)
    # A-01 fed an hour ago (not due), A-02 fed four days ago (due), A-03 and A-04 never (due).
    for code, hours_ago, food, amount, unit in (("A-01", 1, "pellets", 0.05, "g"), ("A-02", 96, "spirulina", 20, "mg")):
        feeding = Feeding(tank=tanks[code], recorded_by=technician, food=food, amount=amount, unit=unit,
                          observed_at=timezone.now() - timedelta(hours=hours_ago))
        services.record_feeding(user=technician, feeding=feeding)
    return SimpleNamespace(species=species, room=room, tanks=tanks, started=started)


def _url(kind="feeding", **query):
    url = reverse("colonies:batch", args=[kind])
    return url + ("?" + "&".join(f"{k}={v}" for k, v in query.items()) if query else "")


def _rows(response) -> dict[str, str]:
    """Each row's HTML by tank code."""
    return {row["tank"].code: str(row["html"]) for row in response.context["rows"]}


def _value(html: str, name: str) -> str | None:
    found = re.search(rf'name="{re.escape(name)}" value="([^"]*)"', html)
    return found.group(1) if found else None


def _post(client, url, rows: dict[str, dict], *, listed=None, **extra):
    data = {"tanks": ",".join(listed if listed is not None else rows), "batch-observed_at": ""}
    for code, fields in rows.items():
        data.update({f"{code}-{name}": value for name, value in fields.items()})
    data.update(extra)
    return client.post(url, data)


# ---------------------------------------------------------------------------------------------
# Choosing the tanks
# ---------------------------------------------------------------------------------------------
def test_a_room_lists_its_tanks_in_use_by_position_with_their_racks(client, world, technician):
    client.force_login(technician)
    response = client.get(_url(room="wet-1"))
    assert response.status_code == 200
    assert list(_rows(response)) == ["A-01", "A-02", "A-03", "A-04"]  # not the retired A-05, not B-01
    assert [label for label, _, _ in response.context["links"]["racks"]] == ["All racks", "rack 1", "rack 2"]


def test_a_rack_is_the_position_before_its_comma(client, world, technician):
    client.force_login(technician)
    response = client.get(_url(room="wet-1", rack="rack 2"))
    assert list(_rows(response)) == ["A-03", "A-04"]


def test_due_lists_only_the_tanks_whose_feeding_is_due(client, world, technician):
    client.force_login(technician)
    response = client.get(_url(room="wet-1", due=1))
    assert list(_rows(response)) == ["A-02", "A-03", "A-04"]
    labels = [label for label, _, _ in response.context["links"]["due"]]
    assert labels == ["Due (3)", "All tanks (4)"]


def test_all_rooms_lists_every_tank_in_use(client, world, technician):
    client.force_login(technician)
    assert list(_rows(client.get(_url()))) == ["B-01", "A-01", "A-02", "A-03", "A-04"]  # rooms by code


def test_an_unknown_room_or_kind_is_404(client, world, technician):
    client.force_login(technician)
    assert client.get(_url(room="nowhere")).status_code == 404
    assert client.get(_url("deletion")).status_code == 404


# ---------------------------------------------------------------------------------------------
# Pre-filled rows
# ---------------------------------------------------------------------------------------------
def test_rows_start_from_the_last_feeding_else_the_species_defaults_else_empty(client, world, technician):
    client.force_login(technician)
    rows = _rows(client.get(_url(room="wet-1")))
    assert (_value(rows["A-01"], "A-01-food"), _value(rows["A-01"], "A-01-amount")) == ("pellets", "0.05")
    assert '<option value="g" selected>' in rows["A-01"] and "from the last feeding" in rows["A-01"]
    assert (_value(rows["A-02"], "A-02-food"), _value(rows["A-02"], "A-02-amount")) == ("spirulina", "20")
    assert (_value(rows["A-03"], "A-03-food"), _value(rows["A-03"], "A-03-amount")) == ("liver paste", "0.2")
    assert '<option value="mL" selected>' in rows["A-03"] and "from the species&#x27; defaults" in rows["A-03"]
    assert (_value(rows["A-04"], "A-04-food"), _value(rows["A-04"], "A-04-amount")) == ("", "")


def test_tanks_due_start_ticked_and_the_others_not(client, world, technician):
    client.force_login(technician)
    rows = _rows(client.get(_url(room="wet-1")))
    ticked = {code for code, html in rows.items() if re.search(rf'name="{code}-record" checked', html)}
    assert ticked == {"A-02", "A-03", "A-04"}


def test_water_change_rows_start_from_the_last_change_else_the_species_fraction_and_water(client, world, technician):
    services.record_water_change(user=technician, change=WaterChange(
        tank=world.tanks["A-01"], recorded_by=technician, litres=0.5, source_water="aged tap water"))
    client.force_login(technician)
    rows = _rows(client.get(_url("water-change", room="wet-1")))
    assert (_value(rows["A-01"], "A-01-percent"), _value(rows["A-01"], "A-01-litres"),
            _value(rows["A-01"], "A-01-source_water")) == ("", "0.5", "aged tap water")
    # 0.3 of the volume -> 30 %
    assert (_value(rows["A-02"], "A-02-percent"), _value(rows["A-02"], "A-02-source_water")) == ("30", "1x salts")


# ---------------------------------------------------------------------------------------------
# Saving
# ---------------------------------------------------------------------------------------------
def test_ticked_rows_are_saved_each_with_its_history_and_the_others_are_skipped(client, world, technician):
    client.force_login(technician)
    before = Feeding.objects.count()
    response = _post(client, _url(room="wet-1", due=1), {
        "A-02": {"record": "on", "food": "spirulina", "amount": "25", "unit": "mg", "note": "ate well"},
        "A-03": {"record": "on", "food": "liver paste", "amount": "0.2", "unit": "mL"},
        "A-04": {"food": "pellets", "amount": "0.1", "unit": "g"},  # not ticked
        "A-01": {"record": "on", "food": "", "amount": "", "unit": "g"},  # ticked but empty
    })
    assert response.status_code == 302 and response["Location"] == _url(room="wet-1", due=1)
    saved = {f.tank.code: f for f in Feeding.objects.filter(pk__gt=0).order_by("pk")[before:]}
    assert set(saved) == {"A-02", "A-03"}
    assert (saved["A-02"].food, saved["A-02"].amount, saved["A-02"].unit, saved["A-02"].note) == (
        "spirulina", 25.0, "mg", "ate well")
    for feeding in saved.values():
        history = feeding.history.get()
        assert (history.history_user, history.history_change_reason) == (technician, "Feeding logged for several tanks")
        assert feeding.recorded_by == technician
        assert abs(feeding.observed_at - timezone.now()) < timedelta(minutes=1)
    assert "Saved 2 feedings: A-02, A-03." in page_text(client.get(response["Location"]))


def test_one_impossible_value_saves_nothing_and_names_the_tank_field_value_and_range(client, world, technician):
    client.force_login(technician)
    before = (Feeding.objects.count(), Feeding.history.count())
    response = _post(client, _url(room="wet-1"), {
        "A-02": {"record": "on", "food": "spirulina", "amount": "25", "unit": "mg"},
        "A-03": {"record": "on", "food": "liver paste", "amount": "6000", "unit": "mL"},
    })
    assert response.status_code == 400
    assert (Feeding.objects.count(), Feeding.history.count()) == before
    text = page_text(response)
    assert "Tank A-03, Amount: 6000 mL is impossible; allowed range 0 to 5000 mL." in text
    assert "Nothing was saved" in text
    rows = _rows(response)  # the typed values are kept for correcting
    assert _value(rows["A-03"], "A-03-amount") == "6000" and _value(rows["A-02"], "A-02-amount") == "25"


def test_litres_above_the_tanks_volume_are_refused(client, world, technician):
    client.force_login(technician)
    response = _post(client, _url("water-change", room="wet-1"), {
        "A-01": {"record": "on", "litres": "3", "source_water": "aged"}})
    assert response.status_code == 400
    assert "Tank A-01, Litres: 3 L is impossible; allowed range 0 to 2 L (the volume of tank A-01)." in page_text(response)
    assert not WaterChange.objects.exists()


def test_a_water_change_needs_an_amount(client, world, technician):
    client.force_login(technician)
    response = _post(client, _url("water-change"), {"A-01": {"record": "on", "source_water": "aged"}})
    assert response.status_code == 400
    assert "Tank A-01, Water change: enter the percent of volume or the litres changed." in page_text(response)


def test_water_changes_for_several_tanks_are_saved(client, world, technician):
    client.force_login(technician)
    response = _post(client, _url("water-change", room="wet-1"), {
        "A-01": {"record": "on", "percent": "30", "source_water": "1x salts"},
        "A-02": {"record": "on", "litres": "1", "source_water": "1x salts"}})
    assert response.status_code == 302
    assert sorted(WaterChange.objects.values_list("tank__code", "percent", "litres")) == [
        ("A-01", 30.0, None), ("A-02", None, 1.0)]


def test_an_unknown_or_retired_tank_code_saves_nothing(client, world, technician):
    client.force_login(technician)
    response = _post(client, _url(), {"A-01": {"record": "on", "food": "pellets", "amount": "0.1", "unit": "g"},
                                       "A-05": {"record": "on", "food": "pellets", "amount": "0.1", "unit": "g"}})
    assert response.status_code == 400
    assert "Tank code 'A-05' does not exist or is retired" in page_text(response)
    assert Feeding.objects.count() == 2  # the two of the fixture


def test_nothing_ticked_is_refused_with_a_message(client, world, technician):
    client.force_login(technician)
    response = _post(client, _url(), {"A-01": {"food": "pellets", "amount": "0.1", "unit": "g"}})
    assert response.status_code == 400
    assert "Nothing was saved: no row was ticked with values in it." in page_text(response)


def test_rows_sent_as_one_json_field_are_saved(client, world, technician):
    client.force_login(technician)
    rows = {"A-03-record": True, "A-03-food": "liver paste", "A-03-amount": "0.2", "A-03-unit": "mL",
            "A-04-food": "pellets", "A-04-unit": "g"}  # A-04 not ticked
    response = client.post(_url(), {"tanks": "A-03,A-04", "batch-observed_at": "", ROWS_FIELD: json.dumps(rows)})
    assert response.status_code == 302
    assert list(Feeding.objects.filter(tank__code__in=["A-03", "A-04"]).values_list("tank__code", "food")) == [
        ("A-03", "liver paste")]


def test_a_broken_json_field_is_refused(client, world, technician):
    client.force_login(technician)
    response = client.post(_url(), {"tanks": "A-03", ROWS_FIELD: "[1, 2"})
    assert response.status_code == 400 and "Nothing was saved" in response.content.decode()


# ---------------------------------------------------------------------------------------------
# Observed time
# ---------------------------------------------------------------------------------------------
def test_a_back_dated_batch_is_stored_at_its_time_and_shown_as_a_late_entry(client, world, technician):
    client.force_login(technician)
    when = timezone.localtime() - timedelta(days=1)
    response = _post(client, _url(), {"A-03": {"record": "on", "food": "liver paste", "amount": "0.2", "unit": "mL"}},
                     **{"batch-observed_at": when.strftime("%Y-%m-%dT%H:%M")})
    assert response.status_code == 302
    feeding = Feeding.objects.get(tank__code="A-03")
    assert feeding.observed_at == when.replace(second=0, microsecond=0) and feeding.is_late_entry
    page = page_text(client.get(world.tanks["A-03"].get_absolute_url()))
    assert "late entry" in page


@pytest.mark.parametrize("shift,expected", [
    (timedelta(days=-200), "is impossible; allowed range"),  # before the tank was started
    (timedelta(hours=2), "is in the future; allowed range"),
])
def test_an_observed_time_out_of_bounds_saves_nothing(client, world, technician, shift, expected):
    client.force_login(technician)
    when = timezone.localtime() + shift
    response = _post(client, _url(), {"A-03": {"record": "on", "food": "liver paste", "amount": "0.2", "unit": "mL"}},
                     **{"batch-observed_at": when.strftime("%Y-%m-%dT%H:%M")})
    assert response.status_code == 400
    assert f"Observed at: {lab_moment(when)} {expected}" in page_text(response)
    assert not Feeding.objects.filter(tank__code="A-03").exists()


# ---------------------------------------------------------------------------------------------
# Dead animals removed outside the round
# ---------------------------------------------------------------------------------------------
def test_dead_removed_rows_with_a_count_are_saved_as_removals_not_checks(client, world, technician):
    client.force_login(technician)
    response = _post(client, _url("dead-removed", room="wet-1"), {
        "A-01": {"count": "3", "note": "behind the filter"}, "A-02": {"count": ""}, "A-03": {"count": "1"}})
    assert response.status_code == 302
    assert sorted(DeadRemoval.objects.values_list("tank__code", "count", "note")) == [
        ("A-01", 3, "behind the filter"), ("A-03", 1, "")]
    assert not Check.objects.exists()  # a removal is not a check done
    assert DeadRemoval.objects.get(tank__code="A-01").history.get().history_change_reason == (
        "Dead animals removed (outside the round)")


def test_dead_removed_zero_is_refused_naming_the_range(client, world, technician):
    client.force_login(technician)
    response = _post(client, _url("dead-removed"), {"A-01": {"count": "0"}})
    assert response.status_code == 400
    assert ("Tank A-01, Dead removed: 0 animals is impossible; allowed range 1 to 1000000 animals (leave it empty "
            "when none were removed).") in page_text(response)
    assert not DeadRemoval.objects.exists()


def test_dead_removed_sets_off_the_mortality_rule_as_a_check_count_would(client, world, technician):
    tank = world.tanks["A-01"]
    services.record_census(user=technician, census=_census(tank, technician, 200))
    client.force_login(technician)
    _post(client, _url("dead-removed"), {"A-01": {"count": "9"}})  # 4.5 % of 200, above 2 %
    deviation = Deviation.objects.get(tank=tank, rule=Deviation.Rule.MORTALITY)
    removal = DeadRemoval.objects.get()
    assert deviation.evidence[0]["ref"] == f"removal:{removal.pk}" and deviation.evidence[0]["dead"] == 9


def _census(tank, user, n):
    from colonies.models import Census
    return Census(tank=tank, recorded_by=user, method=Census.Method.DIRECT, direct_count=n,
                  observed_at=timezone.now() - timedelta(days=1))


# ---------------------------------------------------------------------------------------------
# Reachability and query counts
# ---------------------------------------------------------------------------------------------
def test_today_links_each_rooms_feedings_and_water_changes_due(client, world, technician):
    client.force_login(technician)
    text = page_text(client.get(reverse("colonies:home")))
    assert f'href="{_url(room="wet-1")}&due=1">Feed the 3 tanks due</a>' in text
    assert f'href="{_url("water-change", room="wet-1")}&due=1">Water changes due (4)</a>' in text
    assert f'href="{_url("dead-removed", room="wet-1")}">Dead removed</a>' in text


def test_tank_list_and_tank_page_link_to_the_screens(client, world, technician):
    client.force_login(technician)
    listing = page_text(client.get(reverse("colonies:tank-list") + f"?room={world.room.pk}"))
    assert f'href="{_url("feeding", room="wet-1")}">Feeding</a>' in listing
    tank_page = page_text(client.get(world.tanks["A-01"].get_absolute_url()))
    assert f'href="{_url("water-change", room="wet-1")}&rack=rack%201">Water change</a>' in tank_page


def _more_tanks(world, technician, n, start):
    for i in range(start, start + n):
        tank = make_tank(code=f"C-{i:03d}", room=world.room, species=world.species, position=f"rack {i % 3}, shelf A",
                         started_on=world.started)
        services.record_feeding(user=technician, feeding=Feeding(tank=tank, recorded_by=technician, food="pellets",
                                                                 amount=0.1, unit="g"))
        services.record_water_change(user=technician, change=WaterChange(tank=tank, recorded_by=technician, percent=30))


@pytest.mark.parametrize("kind", ["feeding", "water-change", "dead-removed"])
def test_page_and_save_query_counts_do_not_grow_with_tanks(client, world, technician, kind, django_assert_num_queries):
    client.force_login(technician)
    fields = {"feeding": {"record": "on", "food": "pellets", "amount": "0.1", "unit": "g"},
              "water-change": {"record": "on", "percent": "30"}, "dead-removed": {"count": "1"}}[kind]
    _more_tanks(world, technician, 2, 1)

    def codes():
        return list(Tank.objects.in_use().filter(room=world.room).values_list("code", flat=True))
    with CaptureQueriesContext(connection) as get_small:
        assert client.get(_url(kind, room="wet-1")).status_code == 200
    with CaptureQueriesContext(connection) as post_small:
        assert _post(client, _url(kind, room="wet-1"), {c: fields for c in codes()}).status_code == 302

    _more_tanks(world, technician, 30, 10)
    with django_assert_num_queries(len(get_small)):
        assert client.get(_url(kind, room="wet-1")).status_code == 200
    with django_assert_num_queries(len(post_small)):
        assert _post(client, _url(kind, room="wet-1"), {c: fields for c in codes()}).status_code == 302


def test_four_hundred_tanks_are_saved_in_one_json_post(client, world, technician):
    species, room = world.species, make_room(code="big-1")
    Tank.objects.bulk_create([Tank(code=f"Z-{i:03d}", room=room, species=species, volume_l=2.0, position="rack 1",
                                   started_on=world.started) for i in range(400)])
    client.force_login(technician)
    page = client.get(_url(room="big-1"))
    assert len(page.context["rows"]) == 400
    rows = {}
    for i in range(400):
        rows.update({f"Z-{i:03d}-record": True, f"Z-{i:03d}-food": "pellets", f"Z-{i:03d}-amount": "0.1",
                     f"Z-{i:03d}-unit": "g"})
    data = {"tanks": page.context["tank_codes"], "batch-observed_at": "", ROWS_FIELD: json.dumps(rows)}
    response = client.post(_url(room="big-1"), data)
    assert response.status_code == 302
    assert Feeding.objects.filter(tank__room=room).count() == 400
    assert Feeding.history.filter(tank_id__in=Tank.objects.filter(room=room).values("pk")).count() == 400
