"""One-time submission keys (colonies/idempotency.py): a resubmitted form saves nothing twice.

One table of every husbandry form that writes; each is posted twice with the same key (one
change, the same redirect, "already saved") and, where a second record is legitimate, with a
fresh key (a second change, so the first test can fail). The concurrency test sends two identical
submits at the same moment from two threads, each with its own database connection.
"""
import re
import threading
import uuid
from types import SimpleNamespace

import pytest
from django.contrib.messages import get_messages
from django.test import Client
from django.urls import reverse

from colonies import services
from colonies.idempotency import ALREADY_SAVED, SUBMISSION_FIELD
from colonies.models import (CareTarget, Census, Check, DeadRemoval, Deviation, Feeding, Species, Split, SplitPart,
                             Submission, Tank, WaterChange)
from tests.factories import make_check, make_room, make_species, make_tank, page_text, round_data, species_edit_data


@pytest.fixture
def world(db, technician):
    species = make_species(scientific_name="Testworm idempotens", targets={"temp_c": (20.0, 24.0)})
    room = make_room(code="wet-1", name="Wet lab 1")
    tank = make_tank(code="A-01", room=room, species=species)
    other = make_tank(code="A-02", room=room, species=species)
    flagged = make_check(tank, user=technician, temp_c=26.0)  # opens an out-of-target deviation
    plain = make_check(tank, user=technician, temp_c=22.0)
    split = services.record_split(user=technician, source=tank, source_before=300, stayed=200, parts=[(other, 100)])
    return SimpleNamespace(species=species, room=room, tank=tank, other=other, plain=plain, split=split,
                           deviation=Deviation.objects.get(tank=tank), flagged=flagged)


def _split_data(w):
    return {"split-source_before": "400", "split-stayed": "180", "part-TOTAL_FORMS": "3", "part-INITIAL_FORMS": "0",
            "part-MIN_NUM_FORMS": "0", "part-MAX_NUM_FORMS": "6", "part-0-destination": "A-02",
            "part-0-animals": "200"}


# name: (persona, url, POST data, a fresh key may save again)
FORMS = {
    "round": ("technician", lambda w: reverse("colonies:round"), lambda w: round_data({"A-01": {"temp_c": "22"}}), True),
    "check": ("technician", lambda w: reverse("colonies:tank-add", args=["A-01", "check"]),
              lambda w: {"check-temp_c": "22.5"}, True),
    "feeding": ("technician", lambda w: reverse("colonies:tank-add", args=["A-01", "feeding"]),
                lambda w: {"feeding-food": "pellets", "feeding-amount": "0.05", "feeding-unit": "g"}, True),
    "water-change": ("technician", lambda w: reverse("colonies:tank-add", args=["A-01", "water-change"]),
                     lambda w: {"water-litres": "1.5", "water-source_water": "aged tap water"}, True),
    "census": ("technician", lambda w: reverse("colonies:tank-add", args=["A-01", "census"]),
               lambda w: {"census-method": "direct", "census-direct_count": "180"}, True),
    "split": ("technician", lambda w: reverse("colonies:tank-split", args=["A-01"]), _split_data, True),
    "batch-feeding": ("technician", lambda w: reverse("colonies:batch", args=["feeding"]) + "?room=wet-1",
                      lambda w: {"tanks": "A-01,A-02", "A-01-record": "on", "A-01-food": "pellets", "A-01-amount": "0.05",
                                 "A-01-unit": "g", "A-02-record": "on", "A-02-food": "pellets", "A-02-amount": "0.04",
                                 "A-02-unit": "g"}, True),
    "batch-water-change": ("technician", lambda w: reverse("colonies:batch", args=["water-change"]),
                           lambda w: {"tanks": "A-01,A-02", "A-01-record": "on", "A-01-percent": "30",
                                      "A-02-record": "on", "A-02-litres": "1"}, True),
    "batch-dead-removed": ("technician", lambda w: reverse("colonies:batch", args=["dead-removed"]),
                           lambda w: {"tanks": "A-01,A-02", "A-01-count": "2", "A-02-count": "1"}, True),
    "check-edit": ("technician", lambda w: reverse("colonies:check-edit", args=[w.plain.pk]),
                   lambda w: {"check-temp_c": "23", "reason": "Misread the thermometer"}, True),
    "void": ("technician", lambda w: reverse("colonies:void", args=["check", w.plain.pk]),
             lambda w: {"reason": "Entered on the wrong tank"}, False),
    "split-void": ("technician", lambda w: reverse("colonies:split-void", args=[w.split.pk]),
                   lambda w: {"reason": "Entered on the wrong tank"}, False),
    "species-edit": ("manager", lambda w: reverse("colonies:species-edit", args=[w.species.pk]),
                     lambda w: species_edit_data(w.species, notes="Reviewed"), True),
    "deviation-acknowledge": ("technician", lambda w: reverse("colonies:deviation-acknowledge", args=[w.deviation.pk]),
                              lambda w: {}, False),
    "deviation-close": ("technician", lambda w: reverse("colonies:deviation-close", args=[w.deviation.pk]),
                        lambda w: {"corrective_action": "Heater reset; 22.4 °C an hour later", "password": "pw"}, False),
}
REPEATABLE = [name for name, (*_, again) in FORMS.items() if again]


def _state():
    """Every saved change leaves a history row; this counts them all."""
    return tuple(m.history.count() for m in (Check, Feeding, WaterChange, Census, DeadRemoval, Split, SplitPart,
                                             Deviation, Species, CareTarget, Tank))


def _post(client, w, name, key):
    _, url, data, _ = FORMS[name]
    return client.post(url(w), {**data(w), SUBMISSION_FIELD: str(key)})


def _login(client, request, name):
    client.force_login(request.getfixturevalue(FORMS[name][0]))


def _messages(response) -> list[str]:
    return [str(m) for m in get_messages(response.wsgi_request)]


@pytest.mark.parametrize("name", FORMS)
def test_resubmitting_the_same_key_saves_nothing_and_redirects_to_the_same_place(client, request, world, name):
    _login(client, request, name)
    key = uuid.uuid4()
    before = _state()
    first = _post(client, world, name, key)
    assert first.status_code == 302, page_text(first)[:2000]
    assert ALREADY_SAVED not in _messages(first)
    saved = _state()
    assert saved != before

    second = _post(client, world, name, key)

    assert second.status_code == 302 and second["Location"] == first["Location"]
    assert ALREADY_SAVED in _messages(second)
    assert _state() == saved
    assert Submission.objects.get(key=key).result_url == first["Location"]


@pytest.mark.parametrize("name", REPEATABLE)
def test_a_fresh_key_saves_the_same_form_again(client, request, world, name):
    _login(client, request, name)
    _post(client, world, name, uuid.uuid4())
    saved = _state()

    response = _post(client, world, name, uuid.uuid4())

    assert response.status_code == 302 and ALREADY_SAVED not in _messages(response)
    assert _state() != saved


def test_resubmitted_round_keeps_one_check_per_tank(client, world, technician):
    client.force_login(technician)
    data = {**round_data({"A-01": {"temp_c": "22"}, "A-02": {"ph": "7.1"}}), SUBMISSION_FIELD: str(uuid.uuid4())}
    before = Check.objects.count()
    for _ in range(3):
        assert client.post(reverse("colonies:round"), data).status_code == 302
    assert Check.objects.count() == before + 2


def test_a_form_with_errors_releases_its_key_for_the_corrected_submit(client, world, technician):
    client.force_login(technician)
    url = reverse("colonies:tank-add", args=["A-01", "feeding"])
    key = str(uuid.uuid4())
    bad = client.post(url, {"feeding-food": "pellets", "feeding-amount": "-1", "feeding-unit": "g",
                            SUBMISSION_FIELD: key})
    assert bad.status_code == 400
    assert not Submission.objects.exists() and not Feeding.objects.exists()

    good = client.post(url, {"feeding-food": "pellets", "feeding-amount": "0.05", "feeding-unit": "g",
                             SUBMISSION_FIELD: key})

    assert good.status_code == 302 and ALREADY_SAVED not in _messages(good)
    assert Feeding.objects.count() == 1


def test_a_refusal_that_redirects_with_an_error_also_releases_the_key(client, world, technician):
    world.tank.status = Tank.Status.RETIRED
    world.tank.save()
    client.force_login(technician)
    key = str(uuid.uuid4())
    response = client.post(reverse("colonies:tank-add", args=["A-01", "feeding"]),
                           {"feeding-food": "pellets", "feeding-amount": "0.05", "feeding-unit": "g",
                            SUBMISSION_FIELD: key})
    assert response.status_code == 302 and "retired" in " ".join(_messages(response))
    assert not Submission.objects.exists()


def test_a_key_that_is_not_a_uuid_is_refused_naming_the_field_and_nothing_is_saved(client, world, technician):
    client.force_login(technician)
    response = client.post(reverse("colonies:tank-add", args=["A-01", "feeding"]),
                           {"feeding-food": "pellets", "feeding-amount": "0.05", "feeding-unit": "g",
                            SUBMISSION_FIELD: "twice-please"})
    assert response.status_code == 400
    assert "Submission key: 'twice-please' is not a valid key" in response.content.decode()
    assert not Feeding.objects.exists() and not Submission.objects.exists()


def test_a_post_without_a_key_is_processed_as_before(client, world, technician):
    client.force_login(technician)
    data = {"feeding-food": "pellets", "feeding-amount": "0.05", "feeding-unit": "g"}
    for _ in range(2):
        assert client.post(reverse("colonies:tank-add", args=["A-01", "feeding"]), data).status_code == 302
    assert Feeding.objects.count() == 2 and not Submission.objects.exists()


def test_keys_are_per_user_and_another_users_result_does_not_leak(client, world, technician):
    from colonies.roles import TECHNICIAN
    from tests.factories import make_user
    key = str(uuid.uuid4())
    data = {"feeding-food": "pellets", "feeding-amount": "0.05", "feeding-unit": "g", SUBMISSION_FIELD: key}
    client.force_login(technician)
    client.post(reverse("colonies:tank-add", args=["A-01", "feeding"]), data)
    client.force_login(make_user("tom", role=TECHNICIAN))

    response = client.post(reverse("colonies:tank-add", args=["A-02", "feeding"]), data)

    assert response.status_code == 302 and response["Location"] == world.other.get_absolute_url()
    assert ALREADY_SAVED not in _messages(response)
    assert Feeding.objects.filter(tank=world.other).count() == 1 and Feeding.objects.count() == 2


def test_a_key_reused_on_another_form_is_refused_and_saves_nothing(client, world, technician):
    client.force_login(technician)
    key = str(uuid.uuid4())
    client.post(reverse("colonies:tank-add", args=["A-01", "feeding"]),
                {"feeding-food": "pellets", "feeding-amount": "0.05", "feeding-unit": "g", SUBMISSION_FIELD: key})
    response = client.post(reverse("colonies:tank-add", args=["A-01", "census"]),
                           {"census-method": "direct", "census-direct_count": "180", SUBMISSION_FIELD: key})
    assert response.status_code == 409 and "Submission key" in response.content.decode()
    assert not Census.objects.exists()


def test_a_refused_role_claims_no_key(client, world, researcher):
    client.force_login(researcher)
    response = client.post(reverse("colonies:round"),
                           {**round_data({"A-01": {"temp_c": "22"}}), SUBMISSION_FIELD: str(uuid.uuid4())})
    assert response.status_code == 403
    assert not Submission.objects.exists()


# ---------------------------------------------------------------------------------------------
# Every form that writes carries a key
# ---------------------------------------------------------------------------------------------
POST_FORM = re.compile(r"<form\b([^>]*method=\"post\"[^>]*)>(.*?)</form>", re.S | re.I)
KEY_INPUT = re.compile(r'<input type="hidden" name="submission_key" value="([0-9a-f-]{36})">')


def post_forms_without_key(html: str) -> tuple[int, list[str]]:
    """How many POST forms the page has (signing out aside) and the openings of those lacking a key."""
    logout = f'action="{reverse("logout")}"'
    forms = [body for attrs, body in POST_FORM.findall(html) if logout not in attrs]
    return len(forms), [f[:200] for f in forms if not KEY_INPUT.search(f)]


PAGES = {
    "colonies:round": (lambda w: reverse("colonies:round"), 1),
    "colonies:round-room": (lambda w: reverse("colonies:round-room", args=["wet-1"]), 1),
    "colonies:tank-detail": (lambda w: w.tank.get_absolute_url(), 5),
    "colonies:check-edit": (lambda w: reverse("colonies:check-edit", args=[w.plain.pk]), 1),
    "colonies:batch": (lambda w: reverse("colonies:batch", args=["feeding"]) + "?room=wet-1", 1),
    "colonies:void": (lambda w: reverse("colonies:void", args=["check", w.plain.pk]), 1),
    "colonies:split-void": (lambda w: reverse("colonies:split-void", args=[w.split.pk]), 1),
    "colonies:species-edit": (lambda w: reverse("colonies:species-edit", args=[w.species.pk]), 1),
    "colonies:deviation-detail": (lambda w: w.deviation.get_absolute_url(), 2),
}


@pytest.mark.parametrize("name", PAGES)
def test_every_form_that_writes_carries_a_fresh_submission_key(client, world, technician, manager, name):
    url, n_forms = PAGES[name]
    client.force_login(manager if name == "colonies:species-edit" else technician)
    html = client.get(url(world)).content.decode()
    count, missing = post_forms_without_key(html)
    assert (count, missing) == (n_forms, [])
    again = client.get(url(world)).content.decode()
    assert set(KEY_INPUT.findall(html)).isdisjoint(KEY_INPUT.findall(again))  # one key per rendering


def test_a_form_shown_again_with_errors_carries_a_key(client, world, technician):
    client.force_login(technician)
    response = client.post(reverse("colonies:tank-add", args=["A-01", "feeding"]),
                           {"feeding-food": "pellets", "feeding-amount": "-1", "feeding-unit": "g"})
    assert response.status_code == 400
    assert post_forms_without_key(response.content.decode()) == (5, [])


# ---------------------------------------------------------------------------------------------
# Two identical submits at the same moment (real threads, each its own connection)
# ---------------------------------------------------------------------------------------------
@pytest.mark.django_db(transaction=True)
def test_two_simultaneous_identical_submits_save_one_record_and_both_succeed(technician):
    from django.db import connections
    tank = make_tank(code="C-01")
    url = reverse("colonies:tank-add", args=[tank.code, "feeding"])
    data = {"feeding-food": "pellets", "feeding-amount": "0.05", "feeding-unit": "g",
            SUBMISSION_FIELD: str(uuid.uuid4())}
    barrier = threading.Barrier(2)
    answers = []

    def submit():
        try:
            client = Client()
            client.force_login(technician)
            barrier.wait()
            response = client.post(url, data)
            answers.append((response.status_code, response["Location"], _messages(response)))
        finally:
            connections.close_all()

    threads = [threading.Thread(target=submit) for _ in range(2)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()

    assert Feeding.objects.filter(tank=tank).count() == 1
    assert [(status, location) for status, location, _ in answers] == [(302, tank.get_absolute_url())] * 2
    assert sum(ALREADY_SAVED in texts for _, _, texts in answers) == 1
