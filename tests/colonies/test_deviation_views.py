"""Deviation register, deviation page, acknowledge and close, Today page."""
from datetime import timedelta

import pytest
from django.urls import reverse
from django.utils import timezone

from colonies.models import Deviation
from tests.factories import make_check, make_room, make_species, make_tank, page_text

pytestmark = pytest.mark.django_db


def _deviation(user, *, room=None, temp=26.0):
    species = make_species(targets={"temp_c": (20.0, 24.0)})
    tank = make_tank(species=species, room=room or make_room())
    make_check(tank, user=user, temp_c=temp)
    return Deviation.objects.get(tank=tank)


def _many(user, n):
    room = make_room()
    for _ in range(n):
        _deviation(user, room=room)


# --- access ---------------------------------------------------------------------------------------

@pytest.mark.parametrize("name", ["colonies:deviation-register", "colonies:deviation-csv"])
def test_register_is_for_managers(client, technician, researcher, manager, name):
    url = reverse(name)
    assert client.get(url).status_code == 302  # anonymous: to login
    for user, status in ((technician, 403), (researcher, 403), (manager, 200)):
        client.force_login(user)
        assert client.get(url).status_code == status


def test_technician_can_read_acknowledge_and_close_researcher_only_read(client, technician, researcher):
    dev = _deviation(technician)
    client.force_login(researcher)
    assert client.get(dev.get_absolute_url()).status_code == 200
    assert client.post(reverse("colonies:deviation-acknowledge", args=[dev.pk])).status_code == 403
    assert client.post(reverse("colonies:deviation-close", args=[dev.pk]),
                       {"corrective_action": "x"}).status_code == 403
    client.force_login(technician)
    assert client.post(reverse("colonies:deviation-acknowledge", args=[dev.pk])).status_code == 302
    dev.refresh_from_db()
    assert dev.status == Deviation.Status.ACKNOWLEDGED and dev.acknowledged_by == technician


def test_acknowledge_and_close_reject_get(client, technician):
    dev = _deviation(technician)
    client.force_login(technician)
    assert client.get(reverse("colonies:deviation-acknowledge", args=[dev.pk])).status_code == 405
    assert client.get(reverse("colonies:deviation-close", args=[dev.pk])).status_code == 405


# --- closing --------------------------------------------------------------------------------------

def test_closing_without_corrective_action_is_refused_and_nothing_changes(client, manager):
    dev = _deviation(manager)
    client.force_login(manager)
    response = client.post(reverse("colonies:deviation-close", args=[dev.pk]), {"corrective_action": "  "})
    assert response.status_code == 400
    assert "Corrective action" in page_text(response)
    dev.refresh_from_db()
    assert dev.status == Deviation.Status.OPEN and dev.closed_at is None


def test_manager_closes_with_corrective_action(client, manager):
    dev = _deviation(manager)
    client.force_login(manager)
    response = client.post(reverse("colonies:deviation-close", args=[dev.pk]),
                           {"corrective_action": "Thermostat replaced; 22.0 °C next check", "password": "pw"})
    assert response.status_code == 302
    dev.refresh_from_db()
    assert dev.status == Deviation.Status.CLOSED
    assert dev.closed_by == manager and dev.corrective_action.startswith("Thermostat")
    page = page_text(client.get(dev.get_absolute_url()))
    assert "Thermostat replaced" in page and "Closed" in page


# --- register ---------------------------------------------------------------------------------------

def test_register_filters_by_status_and_counts_per_rule_and_room(client, manager):
    room = make_room(name="Wet lab Q")
    open_dev = _deviation(manager, room=room)
    closed = _deviation(manager, room=room)
    closed.close(user=manager, corrective_action="done", password="pw")
    client.force_login(manager)
    default = client.get(reverse("colonies:deviation-register"))  # unresolved only by default
    assert list(default.context["deviations"]) == [open_dev]
    everything = client.get(reverse("colonies:deviation-register"), {"status": ""})
    assert set(everything.context["deviations"]) == {open_dev, closed}
    assert ("Reading outside care target", 2) in everything.context["by_rule"]
    assert {"tank__room__name": "Wet lab Q", "n": 2} in everything.context["by_room"]
    assert everything.context["n_closed"] == 1
    only_closed = client.get(reverse("colonies:deviation-register"), {"status": "closed"})
    assert list(only_closed.context["deviations"]) == [closed]


def test_register_csv_lists_time_to_close(client, manager):
    dev = _deviation(manager)
    Deviation.objects.filter(pk=dev.pk).update(opened_at=timezone.now() - timedelta(hours=5))
    dev.refresh_from_db()
    dev.close(user=manager, corrective_action="Water changed", password="pw")
    client.force_login(manager)
    response = client.get(reverse("colonies:deviation-csv"))
    lines = b"".join(response.streaming_content).decode().strip().splitlines()
    assert lines[0].startswith("id,tank,room,subject,rule,parameter,severity,status")
    row = lines[1].split(",")
    header = lines[0].split(",")
    assert 4.9 < float(row[header.index("hours_to_close")]) < 5.1


def test_register_query_count_does_not_grow(client, manager, django_assert_max_num_queries):
    client.force_login(manager)
    _many(manager, 3)
    with django_assert_max_num_queries(12) as small:
        client.get(reverse("colonies:deviation-register"), {"status": ""})
    _many(manager, 30)
    with django_assert_max_num_queries(len(small.captured_queries)):
        response = client.get(reverse("colonies:deviation-register"), {"status": ""})
    assert len(response.context["deviations"]) == 33


# --- Today page ----------------------------------------------------------------------------------------

def test_today_shows_due_tanks_progress_and_deviations(client, technician):
    room = make_room(name="Room Kestrel")
    species = make_species(targets={"temp_c": (20.0, 24.0)})
    checked = make_tank(species=species, room=room, code="K-01")
    make_tank(species=species, room=room, code="K-02")  # never checked: due
    make_check(checked, user=technician, temp_c=27.0)
    client.force_login(technician)
    response = client.get(reverse("colonies:home"))
    text = page_text(response)
    assert "Room Kestrel" in text and "1 of 2 tanks checked today" in text
    entry = response.context["rooms"][0]
    due_codes = {item["tank"].code for label, items, _pills in entry["due"] if label == "Daily check" for item in items}
    assert due_codes == {"K-02"}
    assert "above target" in text  # the open deviation on K-01 is listed
    assert response.context["n_unresolved"] == 1


def test_today_query_count_does_not_grow(client, technician, django_assert_max_num_queries):
    client.force_login(technician)
    room = make_room()
    species = make_species(targets={"temp_c": (20.0, 24.0)})
    for _ in range(3):
        make_check(make_tank(species=species, room=room), user=technician, temp_c=26.0)
    with django_assert_max_num_queries(12) as small:
        client.get(reverse("colonies:home"))
    for _ in range(30):
        make_check(make_tank(species=species, room=make_room()), user=technician, temp_c=26.0)
    with django_assert_max_num_queries(len(small.captured_queries)):
        response = client.get(reverse("colonies:home"))
    assert response.context["n_unresolved"] == 33


def test_round_saves_and_evaluates_rules_in_constant_queries(client, technician, django_assert_max_num_queries):
    """The round's POST with deviation rules stays constant in the number of tanks (5 vs 40)."""
    from tests.factories import round_data
    counts = []
    for n in (5, 40):
        room = make_room()
        species = make_species(targets={"temp_c": (20.0, 24.0)})
        tanks = [make_tank(species=species, room=room) for _ in range(n)]
        client.force_login(technician)
        data = round_data({t.code: {"temp_c": "26.5", "ph": "7.2", "dead_removed": "0"} for t in tanks})
        with django_assert_max_num_queries(40) as ctx:
            response = client.post(reverse("colonies:round-room", args=[room.code]), data)
        assert response.status_code == 302
        counts.append(len(ctx.captured_queries))
        assert Deviation.objects.filter(tank__room=room).count() == n
    assert counts[0] == counts[1]
