"""The round posted as the page script sends it: the filled inputs as one JSON field, any size."""
import json
from datetime import timedelta

import pytest
from django.db import connection
from django.test.utils import CaptureQueriesContext
from django.urls import reverse
from django.utils import timezone

from colonies.models import Check
from colonies.round_post import ROWS_FIELD
from tests.factories import make_check, make_room, make_species, make_tank, page_text


@pytest.fixture
def species(db):
    return make_species(targets={"temp_c": (21.0, 25.0), "ph": (6.0, 8.0)})


@pytest.fixture
def room(db):
    return make_room(code="fw-1", name="Freshwater room 1")


def _tanks(room, species, first, n, user=None):
    tanks = [make_tank(code=f"J-{i:03d}", room=room, species=species) for i in range(first, first + n)]
    if user is not None:
        for tank in tanks:
            make_check(tank, user=user, ph=7.0, temp_c=23.0, observed_at=timezone.now() - timedelta(days=1))
    return tanks


def _json_post(rows: dict[str, dict], *, tanks=None, **extra) -> dict:
    """{code: {field: value}} as the page script posts it: one JSON field of input names."""
    flat = {f"{code}-{name}": value for code, fields in rows.items() for name, value in fields.items()}
    data = {"tanks": ",".join(tanks if tanks is not None else rows), "round-observed_at": "",
            ROWS_FIELD: json.dumps(flat)}
    data.update(extra)
    return data


def test_json_round_saves_a_round_with_more_fields_than_django_accepts_as_plain_fields(
        client, technician, room, species, settings):
    settings.DATA_UPLOAD_MAX_NUMBER_FIELDS = 50  # the same limit problem at a test size
    tanks = _tanks(room, species, 1, 20)
    client.force_login(technician)
    rows = {t.code: {"temp_c": "22.5", "ph": "7.1", "activity": "normal", "clumping": True} for t in tanks}
    assert sum(len(r) for r in rows.values()) > 50

    response = client.post(reverse("colonies:round"), _json_post(rows))

    assert response.status_code == 302
    saved = Check.objects.filter(tank__in=tanks)
    assert saved.count() == 20
    assert all(c.temp_c == 22.5 and c.ph == 7.1 and c.clumping for c in saved)


def test_plain_round_beyond_the_field_limit_gets_a_400_page_saying_to_save_one_room_at_a_time(
        client, technician, room, species, settings):
    settings.DATA_UPLOAD_MAX_NUMBER_FIELDS = 50
    tanks = _tanks(room, species, 1, 20)
    client.force_login(technician)
    data = {f"{t.code}-{name}": "7" for t in tanks for name in ("temp_c", "ph", "no3_mg_l")}

    response = client.post(reverse("colonies:round"), data)

    assert response.status_code == 400
    assert "save one room at a time" in page_text(response)
    assert not Check.objects.exists()


def test_json_round_with_an_impossible_value_saves_nothing_and_shows_the_error_on_its_row_with_values_kept(
        client, technician, room, species):
    tanks = _tanks(room, species, 1, 3)
    client.force_login(technician)
    rows = {"J-001": {"temp_c": "22"}, "J-002": {"ph": "15"}, "J-003": {"note": "fine"}}

    response = client.post(reverse("colonies:round"), _json_post(rows))

    assert response.status_code == 400
    assert not Check.objects.exists()
    by_code = {row["tank"].code: row["form"] for row in response.context["rows"]}
    assert "ph" in by_code["J-002"].errors and "J-002" in by_code["J-002"].errors["ph"][0]
    assert not by_code["J-001"].errors
    assert by_code["J-001"]["temp_c"].value() == "22"
    assert by_code["J-003"]["note"].value() == "fine"
    assert len(by_code) == 3


def test_json_round_refuses_an_unknown_tank_code_and_saves_nothing(client, technician, room, species):
    _tanks(room, species, 1, 2)
    client.force_login(technician)
    rows = {"J-001": {"temp_c": "22"}, "NOPE-9": {"temp_c": "22"}}

    response = client.post(reverse("colonies:round-room", args=[room.code]), _json_post(rows, tanks=["J-001"]))

    assert response.status_code == 400
    assert "Tank code 'NOPE-9' does not exist" in page_text(response)
    assert not Check.objects.exists()


@pytest.mark.parametrize("payload, words", [
    ("{not json", "not valid JSON"),
    ("[1, 2]", "expected an object"),
    ('{"J-001-temp_c": 22}', "must be text"),
])
def test_broken_json_rows_get_a_400_naming_the_field_and_save_nothing(client, technician, room, species,
                                                                       payload, words):
    _tanks(room, species, 1, 1)
    client.force_login(technician)

    response = client.post(reverse("colonies:round"), {"tanks": "J-001", ROWS_FIELD: payload})

    assert response.status_code == 400
    text = response.content.decode()
    assert ROWS_FIELD in text and words in text
    assert not Check.objects.exists()


def test_json_round_save_query_count_does_not_grow_with_tanks(client, technician, room, species,
                                                              django_assert_num_queries):
    client.force_login(technician)
    url = reverse("colonies:round")
    tanks = _tanks(room, species, 1, 5, user=technician)
    rows = lambda ts: {t.code: {"ph": "7.2", "temp_c": "22.0", "activity": "normal"} for t in ts}  # noqa: E731
    with CaptureQueriesContext(connection) as post_5:
        assert client.post(url, _json_post(rows(tanks))).status_code == 302

    more = _tanks(room, species, 6, 45, user=technician)
    before = Check.objects.count()
    with django_assert_num_queries(len(post_5)):  # 40 of 50 tanks filled, 10 left empty
        response = client.post(url, _json_post(rows(more[:40]), tanks=[t.code for t in tanks + more]))
    assert response.status_code == 302
    assert Check.objects.count() == before + 40
