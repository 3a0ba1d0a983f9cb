"""One-time submission keys on the trials forms (colonies/idempotency.py): a resubmit saves nothing twice.

The world, URLs and POST data are the access table's (tests/experiments/test_access.py), so a
form added there with data is one line away from being covered here too.
"""
import threading
import uuid

import pytest
from django.contrib.messages import get_messages
from django.test import Client
from django.urls import reverse

from colonies.idempotency import ALREADY_SAVED, SUBMISSION_FIELD
from colonies.models import Submission
from experiments.models import Booking
from tests.colonies.test_idempotency import post_forms_without_key
from tests.experiments.builders import make_stocked_tank, today
from tests.experiments.test_access import POST_DATA, URLS, _state, world  # noqa: F401 (world is a fixture)

# Every trials form that writes, and whether a fresh key may save the same data again.
FORMS = {
    "experiments:booking-new": True,
    "experiments:booking-cancel": False,
    "experiments:booking-draw": False,
    "experiments:cohort-end": False,
    "experiments:dish-new": True,  # a second dish of 5 from the 12 animals left
    "experiments:dish-end": False,
    "experiments:dish-void": False,
    "experiments:study-new": False,  # the study code is taken by the first
    "experiments:study-unblind": False,
    "experiments:study-validity": True,  # saving the same criteria again is another history entry
    "experiments:study-lock": False,  # locked already
    "experiments:trial-new": False,  # the slot is taken by the first
    "experiments:slot-claim": False,  # claiming a slot one holds changes nothing
    "experiments:slot-release": False,  # the claim is released by the first
    "experiments:trial-score": True,  # a second correction is a second history entry
    "experiments:trial-set-aside": False,
    "experiments:attachment-add": True,
    "experiments:measurement-new": True,  # the same files measured again: a second measurement
    "experiments:measurement-rerun": True,  # each re-run of a failed measurement is another attempt
    "experiments:measurement-void": False,  # voided already
    "experiments:protocol-new": False,  # the reference is taken by the first
    "experiments:protocol-amend": True,  # a second amendment is a second version
    "experiments:protocol-approve": False,  # approved already
    "experiments:protocol-suspend": False,  # suspended already
    "experiments:period-report-issue": True,  # issuing again is a second issued report
    "experiments:period-report-sign": True,  # signing again is a second signature (a second reviewer, say)
}
MANAGER_FORMS = {"experiments:protocol-new", "experiments:protocol-amend", "experiments:protocol-approve",
                 "experiments:protocol-suspend", "experiments:period-report-issue", "experiments:period-report-sign"}


def _post(client, w, name, key, url=None):
    return client.post(url or URLS[name](w), {**POST_DATA[name](w), SUBMISSION_FIELD: str(key)})


def _messages(response) -> list[str]:
    return [str(m) for m in get_messages(response.wsgi_request)]


def test_every_writing_form_of_the_access_table_is_covered():
    assert set(POST_DATA) == set(FORMS)


@pytest.mark.parametrize("name,url", [(n, None) for n in FORMS] + [("experiments:trial-set-aside", "void")],
                         ids=list(FORMS) + ["experiments:trial-void"])
def test_resubmitting_the_same_key_saves_nothing_and_redirects_to_the_same_place(client, world, researcher, manager,
                                                                                 name, url):
    client.force_login(manager if name in MANAGER_FORMS else researcher)
    if url == "void":
        url = reverse("experiments:trial-set-aside", args=[world.trial.pk, "void"])
    key = uuid.uuid4()
    before = _state()
    first = _post(client, world, name, key, url)
    assert first.status_code == 302, first.content.decode()[:2000]
    assert not [m for m in get_messages(first.wsgi_request) if m.level_tag == "error"]
    saved = _state()
    assert saved != before

    second = _post(client, world, name, key, url)

    assert second.status_code == 302 and second["Location"] == first["Location"]
    assert ALREADY_SAVED in _messages(second)
    assert _state() == saved
    assert Submission.objects.get(key=key).result_url == first["Location"]


@pytest.mark.parametrize("name", [n for n, again in FORMS.items() if again])
def test_a_fresh_key_saves_the_same_form_again(client, world, researcher, manager, name):
    client.force_login(manager if name in MANAGER_FORMS else researcher)
    _post(client, world, name, uuid.uuid4())
    saved = _state()

    response = _post(client, world, name, uuid.uuid4())

    assert response.status_code == 302 and ALREADY_SAVED not in _messages(response)
    assert _state() != saved


def test_a_refused_booking_releases_its_key(client, world, researcher):
    client.force_login(researcher)
    key = str(uuid.uuid4())
    data = {**POST_DATA["experiments:booking-new"](world), SUBMISSION_FIELD: key}
    refused = client.post(reverse("experiments:booking-new"), {**data, "animals": 100000})
    assert refused.status_code in (400, 409)
    assert not Submission.objects.exists()
    n = Booking.objects.count()

    booked = client.post(reverse("experiments:booking-new"), data)

    assert booked.status_code == 302 and Booking.objects.count() == n + 1


def test_an_attachment_that_is_refused_releases_its_key(client, world, researcher):
    client.force_login(researcher)
    response = client.post(reverse("experiments:attachment-add", args=[world.trial.pk]),
                           {"kind": "photo", SUBMISSION_FIELD: str(uuid.uuid4())})  # no file
    assert response.status_code == 400 and "Nothing was stored" in " ".join(_messages(response))
    assert not Submission.objects.exists()


PAGES = {
    "experiments:booking-new": (lambda w: reverse("experiments:booking-new"), 1),
    "experiments:booking-detail": (lambda w: w.booking.get_absolute_url(), 2),
    # void the empty dish, set up a dish, end a dish (the cohort's own end waits for its open dishes)
    "experiments:cohort-detail": (lambda w: w.cohort.get_absolute_url(), 3),
    "experiments:study-new": (lambda w: reverse("experiments:study-new"), 1),
    # unblind; declare the validity criteria
    "experiments:study-detail": (lambda w: w.study.get_absolute_url(), 2),
    # three open slots to claim, two claims to release, the trial form for the slots claimed
    "experiments:trial-new": (lambda w: reverse("experiments:trial-new", args=[w.study.code]), 6),
    # attach, exclude, void, measure images; and the world's two measurements: void each, re-run the failed one
    "experiments:trial-detail": (lambda w: w.trial.get_absolute_url(), 7),
    "experiments:trial-score": (lambda w: reverse("experiments:trial-score", args=[w.trial.pk]), 1),
}


@pytest.mark.parametrize("name", PAGES)
def test_every_form_that_writes_carries_a_submission_key(client, world, researcher, name):
    url, n_forms = PAGES[name]
    client.force_login(researcher)
    response = client.get(url(world))
    assert response.status_code == 200
    assert post_forms_without_key(response.content.decode()) == (n_forms, [])


@pytest.mark.django_db(transaction=True)
def test_two_simultaneous_identical_bookings_save_one(researcher, protocol, technician):
    from django.db import connections
    tank = make_stocked_tank(estimate=1000, reserve=100, user=technician, code="LV-C1")
    data = {"protocol": protocol.pk, "species": tank.species_id, "animals": 5, "needed_on": today().isoformat(),
            "tank": tank.pk, "action": "book", SUBMISSION_FIELD: str(uuid.uuid4())}
    barrier = threading.Barrier(2)
    answers = []

    def submit():
        try:
            client = Client()
            client.force_login(researcher)
            barrier.wait()
            response = client.post(reverse("experiments:booking-new"), data)
            answers.append((response.status_code, response.get("Location"), _messages(response)))
        finally:
            connections.close_all()

    threads = [threading.Thread(target=submit) for _ in range(2)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()

    booking = Booking.objects.get(tank=tank)
    assert [(status, location) for status, location, _ in answers] == [(302, booking.get_absolute_url())] * 2
    assert sum(ALREADY_SAVED in texts for _, _, texts in answers) == 1
