"""Who may open or submit each trials page: anonymous, each role, and the wrong HTTP method.

One table for every URL name of experiments/urls.py; a new page not added here fails
test_every_experiments_url_name_is_in_the_access_table.
"""
from datetime import timedelta
from types import SimpleNamespace
from urllib.parse import quote

import pytest
from django.core.files.uploadedfile import SimpleUploadedFile
from django.urls import get_resolver, reverse

from colonies.models import Signature
from experiments import models
from experiments.models import Cohort
from tests.experiments import protocol_posts
from tests.experiments.builders import days_ago, make_cohort, make_protocol, make_study, record, today
from tests.experiments.dish_pictures import png, ring

READ = {"technician", "researcher", "manager"}
RUN = {"researcher", "manager"}
MANAGE = {"manager"}
OWNER = {"researcher"}  # the study's owner in this world
PERSONAS = ("technician", "researcher", "manager", "outsider")
PNG = b"\x89PNG\r\n\x1a\n"  # the PNG signature, so the upload passes the content check


@pytest.fixture
def world(db, researcher, protocol, tank, settings, tmp_path):
    from experiments import services
    settings.MEDIA_ROOT = tmp_path
    booking = services.book(user=researcher, protocol=protocol, tank=tank, animals=10, needed_on=today())
    # 24 animals: a dish of 10 with a trial, a dish of 2 set up in error (no trial), 12 not in a dish.
    cohort = make_cohort(user=researcher, protocol=protocol, tank=tank, at=days_ago(5), animals=24)
    dish = services.set_up_dish(user=researcher, cohort=cohort, animals=10, at=days_ago(4.5))
    empty_dish = services.set_up_dish(user=researcher, cohort=cohort, animals=2, at=days_ago(4.5))
    spare = make_cohort(user=researcher, protocol=protocol, tank=tank, at=days_ago(5))  # no dish: it can end
    study = make_study(user=researcher, protocol=protocol, code="access-study", blinded=True)
    trial = record(study, dish, researcher, at=days_ago(4)).trial
    attachment = services.add_attachment(user=researcher, trial=trial, kind="photo",
                                         upload=SimpleUploadedFile("a.png", PNG + b"png bytes"))
    # Slot 2 claimed by the owner to record it (trial-new); slot 3 claimed, to be released; slot 4 open, to claim.
    claims = {slot: services.claim_slot(user=researcher, study=study, slot=slot) for slot in (2, 3)}
    frames = [{"t_s": 0.0, "clusters": 1, "largest_fraction": 1.0, "worm_area_px": 900, "largest_area_px": 900}]
    measured = dict(trial=trial, source="photos", sha256="0" * 64, threshold=0.5, window_s=600, frames_total=1,
                    requested_by=researcher)
    done = models.ImageMeasurement.objects.create(**measured, frames=frames, frames_done=1, status="done",
                                                  dispersal_time_s=None, censored=True, finished_at=days_ago(1))
    failed = models.ImageMeasurement.objects.create(**measured, status="failed", error="unreadable")
    draft = make_protocol(status=models.Protocol.Status.DRAFT, approved_on=None)  # to approve
    open_study = make_study(user=researcher, protocol=protocol, code="access-open", blinded=False)  # to lock
    issued = _issue(researcher)  # last: the records as they stand, so it can be signed and printed
    return SimpleNamespace(protocol=protocol, tank=tank, booking=booking, cohort=cohort, study=study, trial=trial,
                           issued=issued,
                           attachment=attachment, claims=claims, measurement=done, failed=failed, dish=dish,
                           empty_dish=empty_dish, spare=spare, draft=draft, open_study=open_study)


def _issue(user):
    """A facility report for the last week as issued from today's records (its manifest is the real one)."""
    from experiments.period_report import queries, render

    report = queries.build("facility", "", queries.Period(today() - timedelta(days=7), today()), None)
    text = render.zip_bytes(report.sections)[1]
    return models.PeriodReport.objects.create(period_from=report.period.first, period_to=report.period.last,
                                              scope="facility", scope_label=report.scope.label, issued_by=user,
                                              manifest=text, manifest_sha256=render.manifest_sha256(text))


def _hand_over_slot_2(w, user):
    """Only the claimant records a slot: a manager recording slot 2 takes the claim over first."""
    from experiments import services
    services.release_claim(user=user, claim=w.claims[2], reason="Handed over")
    services.claim_slot(user=user, study=w.study, slot=2)


PREPARE = {("experiments:trial-new", "post", "manager"): _hand_over_slot_2}


URLS = {
    "experiments:index": lambda w: reverse("experiments:index"),
    "experiments:protocol-detail": lambda w: reverse("experiments:protocol-detail", args=[w.protocol.pk]),
    "experiments:protocol-list": lambda w: reverse("experiments:protocol-list"),
    "experiments:protocol-new": lambda w: reverse("experiments:protocol-new"),
    "experiments:protocol-amend": lambda w: reverse("experiments:protocol-amend", args=[w.protocol.pk]),
    "experiments:protocol-approve": lambda w: reverse("experiments:protocol-approve", args=[w.draft.pk]),
    "experiments:protocol-suspend": lambda w: reverse("experiments:protocol-suspend", args=[w.protocol.pk]),
    "experiments:booking-new": lambda w: reverse("experiments:booking-new"),
    "experiments:calendar": lambda w: reverse("experiments:calendar"),
    "experiments:booking-detail": lambda w: reverse("experiments:booking-detail", args=[w.booking.pk]),
    "experiments:booking-cancel": lambda w: reverse("experiments:booking-cancel", args=[w.booking.pk]),
    "experiments:booking-draw": lambda w: reverse("experiments:booking-draw", args=[w.booking.pk]),
    "experiments:cohort-detail": lambda w: reverse("experiments:cohort-detail", args=[w.cohort.pk]),
    "experiments:cohort-end": lambda w: reverse("experiments:cohort-end", args=[w.spare.pk]),
    "experiments:dish-new": lambda w: reverse("experiments:dish-new", args=[w.cohort.pk]),
    "experiments:dish-end": lambda w: reverse("experiments:dish-end", args=[w.cohort.pk]),
    "experiments:dish-void": lambda w: reverse("experiments:dish-void", args=[w.empty_dish.pk]),
    "experiments:study-new": lambda w: reverse("experiments:study-new"),
    "experiments:study-detail": lambda w: reverse("experiments:study-detail", args=[w.study.code]),
    "experiments:study-unblind": lambda w: reverse("experiments:study-unblind", args=[w.study.code]),
    "experiments:study-lock": lambda w: reverse("experiments:study-lock", args=[w.open_study.code]),
    "experiments:study-csv": lambda w: reverse("experiments:study-csv", args=[w.study.code]),
    "experiments:study-chart": lambda w: reverse("experiments:study-chart", args=[w.study.code, "km", "svg"]),
    "experiments:study-chart-csv": lambda w: reverse("experiments:study-chart-csv", args=[w.study.code, "km"]),
    "experiments:study-methods": lambda w: reverse("experiments:study-methods", args=[w.study.code]),
    "experiments:study-methods-md": lambda w: reverse("experiments:study-methods-md", args=[w.study.code]),
    "experiments:study-validity": lambda w: reverse("experiments:study-validity", args=[w.study.code]),
    "experiments:trial-new": lambda w: reverse("experiments:trial-new", args=[w.study.code]),
    "experiments:slot-claim": lambda w: reverse("experiments:slot-claim", args=[w.study.code, 4]),
    "experiments:slot-release": lambda w: reverse("experiments:slot-release", args=[w.study.code, 3]),
    "experiments:trial-detail": lambda w: reverse("experiments:trial-detail", args=[w.trial.pk]),
    "experiments:trial-score": lambda w: reverse("experiments:trial-score", args=[w.trial.pk]),
    "experiments:trial-set-aside": lambda w: reverse("experiments:trial-set-aside", args=[w.trial.pk, "exclude"]),
    "experiments:attachment-add": lambda w: reverse("experiments:attachment-add", args=[w.trial.pk]),
    "experiments:attachment": lambda w: reverse("experiments:attachment", args=[w.attachment.pk]),
    "experiments:ledger": lambda w: reverse("experiments:ledger"),
    "experiments:ledger-csv": lambda w: reverse("experiments:ledger-csv"),
    "experiments:measurement-new": lambda w: reverse("experiments:measurement-new", args=[w.trial.pk]),
    "experiments:measurement-progress": lambda w: reverse("experiments:measurement-progress", args=[w.measurement.pk]),
    "experiments:measurement-chart": lambda w: reverse("experiments:measurement-chart", args=[w.measurement.pk, "svg"]),
    "experiments:measurement-csv": lambda w: reverse("experiments:measurement-csv", args=[w.measurement.pk]),
    "experiments:measurement-rerun": lambda w: reverse("experiments:measurement-rerun", args=[w.failed.pk]),
    "experiments:measurement-void": lambda w: reverse("experiments:measurement-void", args=[w.measurement.pk]),
    "experiments:period-report": lambda w: reverse("experiments:period-report") + _period(),
    "experiments:period-report-pdf": lambda w: reverse("experiments:period-report-pdf") + _period(),
    "experiments:period-report-zip": lambda w: reverse("experiments:period-report-zip") + _period(),
    "experiments:period-report-issue": lambda w: reverse("experiments:period-report-issue"),
    "experiments:period-report-issued": lambda w: reverse("experiments:period-report-issued", args=[w.issued.pk]),
    "experiments:period-report-issued-pdf": lambda w: reverse("experiments:period-report-issued-pdf", args=[w.issued.pk]),
    "experiments:period-report-sign": lambda w: reverse("experiments:period-report-sign", args=[w.issued.pk]),
    "experiments:protocol-history": lambda w: reverse("experiments:protocol-history", args=[w.protocol.pk]),
    "experiments:booking-history": lambda w: reverse("experiments:booking-history", args=[w.booking.pk]),
    "experiments:cohort-history": lambda w: reverse("experiments:cohort-history", args=[w.cohort.pk]),
    "experiments:study-history": lambda w: reverse("experiments:study-history", args=[w.study.code]),
    "experiments:trial-history": lambda w: reverse("experiments:trial-history", args=[w.trial.pk]),
}


def _period() -> str:
    return f"?period_from={today() - timedelta(days=7)}&period_to={today()}&scope=facility"


def _trial_post(w):
    return {"slot": "2", "cohort": str(w.cohort.pk), "run_at": days_ago(2).strftime("%Y-%m-%dT%H:%M"),
            "vessel": "dish", "animals": "10", "kind": "uv", "wavelength_nm": "365", "irradiance_mw_cm2": "2",
            "duration_s": "10", "disperse_s": "100"}


POST_DATA = {
    "experiments:protocol-new": lambda w: protocol_posts.new_protocol(),
    "experiments:protocol-amend": lambda w: protocol_posts.amend_protocol(w.protocol, {"max_exposures_per_group": 2}),
    "experiments:protocol-approve": lambda w: {"approved_on": today().isoformat(), "password": "pw"},
    "experiments:protocol-suspend": lambda w: {"reason": "Welfare review pending", "password": "pw"},
    "experiments:booking-new": lambda w: {"protocol": w.protocol.pk, "species": w.tank.species_id, "animals": 5,
                                          "needed_on": today().isoformat(), "tank": w.tank.pk, "action": "book"},
    "experiments:booking-cancel": lambda w: {"reason": "Not needed"},
    "experiments:booking-draw": lambda w: {"count": 10},
    "experiments:cohort-end": lambda w: {"end": Cohort.End.DIED, "note": "found dead"},
    "experiments:dish-new": lambda w: {"animals": 5},
    "experiments:dish-end": lambda w: {"dish": w.dish.pk, "end": Cohort.End.RETURNED, "returned_to": w.tank.pk,
                                       "returned_count": 9},
    "experiments:dish-void": lambda w: {"reason": "Set up in error"},
    "experiments:study-new": lambda w: {"code": "new-study", "title": "New", "protocol": w.protocol.pk,
                                        "conditions": "a\nb", "reference_condition": "a", "replicates": 2,
                                        "method": "block",
                                        "observation_window_s": 600, "blinded": "on"},
    "experiments:study-unblind": lambda w: {"reason": "All scored"},
    "experiments:study-validity": lambda w: {"use": ["ph_band"], "ph_band.low": "6", "ph_band.high": "9"},
    "experiments:study-unblind": lambda w: {"reason": "All scored", "password": "pw"},
    "experiments:study-lock": lambda w: {"password": "pw"},
    "experiments:trial-new": _trial_post,
    "experiments:slot-claim": lambda w: {},
    "experiments:slot-release": lambda w: {"reason": "Operator away this week"},
    "experiments:trial-score": lambda w: {"disperse_s": "150", "aggregate_s": "200", "reason": "Misread the timer"},
    "experiments:trial-set-aside": lambda w: {"reason": "Clump never formed"},
    "experiments:attachment-add": lambda w: {"file": SimpleUploadedFile("b.png", PNG + b"more bytes"), "kind": "photo"},
    "experiments:measurement-new": lambda w: {"files": [SimpleUploadedFile("d.png", png(ring(1)))], "interval_s": "30",
                                              "threshold": "0.5", "polarity": "dark", "min_area_px": "12"},
    "experiments:measurement-rerun": lambda w: {},
    "experiments:measurement-void": lambda w: {"reason": "Wrong dish"},
    "experiments:period-report-issue": lambda w: {"period_from": str(today() - timedelta(days=7)),
                                                  "period_to": str(today()), "scope": "facility"},
    "experiments:period-report-sign": lambda w: {"password": "pw"},
}

ACCESS = [
    ("experiments:index", "get", READ),
    ("experiments:protocol-detail", "get", READ),
    ("experiments:protocol-list", "get", RUN),
    ("experiments:protocol-new", "get", MANAGE),
    ("experiments:protocol-new", "post", MANAGE),
    ("experiments:protocol-amend", "get", MANAGE),
    ("experiments:protocol-amend", "post", MANAGE),
    ("experiments:protocol-approve", "post", MANAGE),
    ("experiments:protocol-suspend", "post", MANAGE),
    ("experiments:booking-new", "get", RUN),
    ("experiments:booking-new", "post", RUN),
    ("experiments:calendar", "get", READ),
    ("experiments:booking-detail", "get", READ),
    ("experiments:booking-cancel", "post", RUN),
    ("experiments:booking-draw", "post", RUN),
    ("experiments:cohort-detail", "get", READ),
    ("experiments:cohort-end", "post", RUN),
    ("experiments:dish-new", "post", RUN),  # the researcher drew the cohort: as for ending it
    ("experiments:dish-end", "post", RUN),
    ("experiments:dish-void", "post", RUN),
    ("experiments:study-new", "get", RUN),
    ("experiments:study-new", "post", RUN),
    ("experiments:study-detail", "get", READ),
    ("experiments:study-unblind", "post", RUN),  # the owner, or a manager who must see
    ("experiments:study-lock", "post", RUN),  # the owner or a manager
    ("experiments:study-csv", "get", READ),  # blinded: conditions only on the reader's own trials
    ("experiments:study-chart", "get", READ),  # blinded: pooled
    ("experiments:study-chart-csv", "get", READ),
    ("experiments:study-methods", "get", RUN),  # blinded: pooled numbers only
    ("experiments:study-methods-md", "get", RUN),
    ("experiments:study-validity", "post", RUN),  # the owner or a manager
    ("experiments:trial-new", "get", RUN),
    ("experiments:trial-new", "post", RUN),
    ("experiments:slot-claim", "post", RUN),
    ("experiments:slot-release", "post", RUN),  # the claimant (here the owner) or a manager
    ("experiments:trial-detail", "get", READ),
    ("experiments:trial-score", "get", RUN),
    ("experiments:trial-score", "post", RUN),
    ("experiments:trial-set-aside", "post", RUN),
    ("experiments:attachment-add", "post", RUN),
    ("experiments:attachment", "get", READ),
    ("experiments:ledger", "get", MANAGE),
    ("experiments:ledger-csv", "get", MANAGE),
    ("experiments:measurement-new", "post", RUN),
    ("experiments:measurement-progress", "get", READ),
    ("experiments:measurement-chart", "get", READ),
    ("experiments:measurement-csv", "get", READ),
    ("experiments:measurement-rerun", "post", RUN),
    ("experiments:measurement-void", "post", RUN),
    ("experiments:period-report", "get", MANAGE),
    ("experiments:period-report-pdf", "get", MANAGE),
    ("experiments:period-report-zip", "get", MANAGE),
    ("experiments:period-report-issue", "post", MANAGE),
    ("experiments:period-report-issued", "get", MANAGE),
    ("experiments:period-report-issued-pdf", "get", MANAGE),
    ("experiments:period-report-sign", "post", MANAGE),
    ("experiments:protocol-history", "get", READ),
    ("experiments:booking-history", "get", READ),
    ("experiments:cohort-history", "get", READ),
    ("experiments:study-history", "get", READ),
    ("experiments:trial-history", "get", READ),
]

WRONG_METHODS = [
    ("experiments:index", "post"), ("experiments:protocol-detail", "post"), ("experiments:protocol-list", "post"),
    ("experiments:protocol-new", "put"), ("experiments:protocol-amend", "delete"), ("experiments:protocol-approve", "get"),
    ("experiments:protocol-suspend", "get"), ("experiments:booking-new", "put"),
    ("experiments:calendar", "post"), ("experiments:booking-detail", "post"), ("experiments:booking-cancel", "get"),
    ("experiments:booking-draw", "get"), ("experiments:cohort-detail", "post"), ("experiments:cohort-end", "get"),
    ("experiments:dish-new", "get"), ("experiments:dish-end", "get"), ("experiments:dish-void", "get"),
    ("experiments:study-new", "put"), ("experiments:study-detail", "post"), ("experiments:study-unblind", "get"),
    ("experiments:study-lock", "get"),
    ("experiments:study-csv", "post"), ("experiments:study-chart", "post"), ("experiments:study-chart-csv", "post"),
    ("experiments:study-methods", "post"), ("experiments:study-methods-md", "post"), ("experiments:study-validity", "get"),
    ("experiments:trial-new", "delete"), ("experiments:slot-claim", "get"), ("experiments:slot-release", "get"),
    ("experiments:trial-detail", "post"), ("experiments:trial-score", "put"),
    ("experiments:trial-set-aside", "get"), ("experiments:attachment-add", "get"), ("experiments:attachment", "post"),
    ("experiments:ledger", "post"), ("experiments:ledger-csv", "post"), ("experiments:measurement-new", "get"),
    ("experiments:measurement-progress", "post"), ("experiments:measurement-chart", "post"),
    ("experiments:measurement-csv", "post"), ("experiments:measurement-rerun", "get"), ("experiments:measurement-void", "get"),
    ("experiments:period-report", "post"), ("experiments:period-report-pdf", "post"),
    ("experiments:period-report-zip", "post"), ("experiments:period-report-issue", "get"),
    ("experiments:period-report-issued", "post"), ("experiments:period-report-issued-pdf", "post"),
    ("experiments:period-report-sign", "get"),
    ("experiments:protocol-history", "post"), ("experiments:booking-history", "post"), ("experiments:cohort-history", "post"),
    ("experiments:study-history", "post"), ("experiments:trial-history", "delete"),
]


def _state():
    """Counts any saved change would alter (every write leaves a history row)."""
    return tuple(m.history.count() for m in (models.Protocol, models.Booking, models.Cohort, models.Dish, models.Study, models.Trial,
                                             models.Override, models.Attachment, models.SlotClaim,
                                             models.ImageMeasurement, models.PeriodReport)) + (Signature.objects.count(),)


def _request(client, world, name, method):
    url = URLS[name](world)
    if method == "post":
        return client.post(url, POST_DATA[name](world))
    return getattr(client, method)(url)


def test_every_experiments_url_name_is_in_the_access_table():
    names = {f"experiments:{n}" for n in get_resolver("experiments.urls").reverse_dict if isinstance(n, str)}
    assert names == set(URLS)
    assert {name for name, _, _ in ACCESS} == set(URLS)
    assert {name for name, _ in WRONG_METHODS} == set(URLS)
    assert {name for name, method, _ in ACCESS if method == "post"} == set(POST_DATA)


@pytest.mark.parametrize("name,method", [(n, m) for n, m, _ in ACCESS])
def test_anonymous_is_redirected_to_login_and_nothing_is_saved(client, world, name, method):
    before = _state()
    response = _request(client, world, name, method)
    assert response.status_code == 302
    # Django quotes the next URL (its query string too) as QueryDict.urlencode(safe="/") does.
    assert response["Location"] == f"{reverse('login')}?next={quote(URLS[name](world), safe='/')}"
    assert _state() == before


@pytest.mark.parametrize("persona", PERSONAS)
@pytest.mark.parametrize("name,method,allowed", ACCESS, ids=[f"{n}-{m}" for n, m, _ in ACCESS])
def test_role_is_allowed_or_forbidden(client, request, world, persona, name, method, allowed):
    user = request.getfixturevalue(persona)
    client.force_login(user)
    if (name, method, persona) in PREPARE:
        PREPARE[name, method, persona](world, user)
    before = _state()
    response = _request(client, world, name, method)
    if persona not in allowed:
        assert response.status_code == 403
        assert _state() == before
    elif method == "get":
        assert response.status_code == 200
    else:
        assert response.status_code == 302, response.content.decode()[:3000]
        assert _state() != before


@pytest.mark.parametrize("name,method", WRONG_METHODS)
def test_wrong_method_is_refused_with_405(client, world, manager, name, method):
    client.force_login(manager)
    before = _state()
    response = getattr(client, method)(URLS[name](world))
    assert response.status_code == 405
    assert _state() == before
