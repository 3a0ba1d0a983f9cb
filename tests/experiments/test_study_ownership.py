"""A study stays its owner's: who adds trials, scores, corrects scores and attaches files (views and services).

Roles: the owner (a researcher), another researcher, a manager, a technician. A study may also
require that a trial's scorer is not its operator (Study.scorer_not_operator).
"""
import pytest
from django.core.exceptions import PermissionDenied, ValidationError
from django.core.files.uploadedfile import SimpleUploadedFile
from django.urls import reverse

from colonies.roles import RESEARCHER
from experiments import services
from experiments.models import Attachment, Study, Trial
from tests.experiments.builders import days_ago, make_cohort, make_study, record
from tests.factories import make_user

PNG = b"\x89PNG\r\n\x1a\n" + b"\x00" * 16  # the PNG signature (ISO/IEC 15948 §5.2)


@pytest.fixture
def other(db):
    """A researcher who does not own the study."""
    return make_user("olaf", role=RESEARCHER)


@pytest.fixture
def world(researcher, protocol, settings, tmp_path):
    settings.MEDIA_ROOT = tmp_path
    cohort = make_cohort(user=researcher, protocol=protocol, at=days_ago(10))
    study = make_study(user=researcher, protocol=protocol, replicates=3)
    return cohort, study


def _trial_post(study, cohort, **extra):
    taken = set(study.trials.values_list("slot", flat=True))
    slot = next(s["slot"] for s in study.allocation if s["slot"] not in taken)
    data = {"slot": str(slot), "cohort": str(cohort.pk), "run_at": days_ago(8).strftime("%Y-%m-%dT%H:%M"),
            "vessel": "dish", "animals": "10", "kind": "uv", "wavelength_nm": "365", "irradiance_mw_cm2": "2",
            "duration_s": "10"}
    data.update(extra)
    return data


# ---------------------------------------------------------------------------------------------
# Adding trials
# ---------------------------------------------------------------------------------------------
def test_another_researcher_cannot_open_or_post_the_trial_form(client, world, other):
    cohort, study = world
    client.force_login(other)
    url = reverse("experiments:trial-new", args=[study.code])
    response = client.get(url)
    assert response.status_code == 403
    assert "Only the study&#x27;s owner (rhea) or a manager may add trials" in response.content.decode()
    assert client.post(url, _trial_post(study, cohort)).status_code == 403
    assert not Trial.objects.exists()


def test_the_service_refuses_a_trial_from_another_researcher(world, other):
    cohort, study = world
    with pytest.raises(PermissionDenied, match="may claim slots in study"):
        record(study, cohort, other, at=days_ago(8))
    with pytest.raises(PermissionDenied, match="may add trials in study"):
        record(study, cohort, other, at=days_ago(8), claim=False)
    assert not Trial.objects.exists()


@pytest.mark.parametrize("who", ["researcher", "manager"])
def test_the_owner_and_a_manager_add_trials(client, request, world, who):
    cohort, study = world
    client.force_login(request.getfixturevalue(who))
    data = _trial_post(study, cohort)
    assert client.post(reverse("experiments:slot-claim", args=[study.code, data["slot"]])).status_code == 302
    response = client.post(reverse("experiments:trial-new", args=[study.code]), data)
    assert response.status_code == 302, response.content.decode()[:2000]
    assert Trial.objects.get().run_by == request.getfixturevalue(who)


def test_the_study_page_offers_the_trial_form_to_the_owner_only(client, world, other, researcher):
    _, study = world
    client.force_login(other)
    assert "Record the next trial" not in client.get(study.get_absolute_url()).content.decode()
    client.force_login(researcher)
    assert "Record the next trial" in client.get(study.get_absolute_url()).content.decode()


# ---------------------------------------------------------------------------------------------
# Scoring and correcting
# ---------------------------------------------------------------------------------------------
def test_another_researcher_may_score_an_unscored_trial_but_not_correct_it(client, world, researcher, other):
    cohort, study = world
    trial = record(study, cohort, researcher, at=days_ago(8), disperse_s=None, aggregate_s=None).trial
    client.force_login(other)
    url = reverse("experiments:trial-score", args=[trial.pk])
    assert client.post(url, {"disperse_s": "150", "aggregate_s": "200"}).status_code == 302
    trial.refresh_from_db()
    assert (trial.disperse_s, trial.scored_by) == (150.0, other)

    response = client.post(url, {"disperse_s": "90", "aggregate_s": "200", "reason": "Misread"})
    assert response.status_code == 403
    assert "may correct scores in study" in response.content.decode()
    trial.refresh_from_db()
    assert trial.disperse_s == 150.0
    with pytest.raises(PermissionDenied, match="correct scores"):
        services.score_trial(user=other, trial=trial, values={"disperse_s": 90.0}, reason="Misread")


@pytest.mark.parametrize("who", ["researcher", "manager"])
def test_the_owner_and_a_manager_correct_scores(client, request, world, researcher, who):
    cohort, study = world
    trial = record(study, cohort, researcher, at=days_ago(8)).trial
    client.force_login(request.getfixturevalue(who))
    response = client.post(reverse("experiments:trial-score", args=[trial.pk]),
                           {"disperse_s": "90", "aggregate_s": "200", "reason": "Misread the timer"})
    assert response.status_code == 302
    trial.refresh_from_db()
    assert trial.disperse_s == 90.0


def test_a_technician_cannot_score(client, world, researcher, technician):
    cohort, study = world
    trial = record(study, cohort, researcher, at=days_ago(8), disperse_s=None, aggregate_s=None).trial
    client.force_login(technician)
    assert client.post(reverse("experiments:trial-score", args=[trial.pk]), {"disperse_s": "150"}).status_code == 403


# ---------------------------------------------------------------------------------------------
# The scorer is not the operator
# ---------------------------------------------------------------------------------------------
def test_the_new_study_form_sets_scorer_not_operator(client, researcher, protocol):
    client.force_login(researcher)
    response = client.post(reverse("experiments:study-new"), {
        "code": "sno-study", "title": "Scored by another", "protocol": protocol.pk, "conditions": "a\nb",
        "reference_condition": "a",
        "replicates": 2, "method": "block", "observation_window_s": 600, "blinded": "on",
        "scorer_not_operator": "on"})
    assert response.status_code == 302
    assert Study.objects.get(code="sno-study").scorer_not_operator is True
    assert make_study(user=researcher, protocol=protocol).scorer_not_operator is False  # the default


@pytest.fixture
def sno(researcher, protocol, settings, tmp_path):
    settings.MEDIA_ROOT = tmp_path
    cohort = make_cohort(user=researcher, protocol=protocol, at=days_ago(10))
    study = make_study(user=researcher, protocol=protocol, replicates=3, blinded=True, scorer_not_operator=True)
    trial = record(study, cohort, researcher, at=days_ago(8), disperse_s=None, aggregate_s=None).trial
    return cohort, study, trial


def test_the_operator_is_refused_as_scorer_with_a_message(client, sno, researcher):
    _, study, trial = sno
    client.force_login(researcher)
    url = reverse("experiments:trial-score", args=[trial.pk])
    for response in (client.get(url), client.post(url, {"disperse_s": "150", "aggregate_s": "200"})):
        assert response.status_code == 403
        assert f"Scorer: you ran {trial.code}, and study {study.code} requires that the scorer is not the operator" \
            in response.content.decode()
    with pytest.raises(PermissionDenied, match="scorer is not the operator"):
        services.score_trial(user=researcher, trial=trial, values={"disperse_s": 150.0})
    trial.refresh_from_db()
    assert trial.disperse_s is None


@pytest.mark.parametrize("who", ["other", "manager"])
def test_someone_other_than_the_operator_scores(client, request, sno, who):
    _, _, trial = sno
    scorer = request.getfixturevalue(who)
    client.force_login(scorer)
    response = client.post(reverse("experiments:trial-score", args=[trial.pk]), {"disperse_s": "150",
                                                                                 "aggregate_s": "200"})
    assert response.status_code == 302
    trial.refresh_from_db()
    assert (trial.disperse_s, trial.scored_by) == (150.0, scorer)


def test_the_operator_cannot_enter_outcomes_with_the_trial(sno, researcher):
    cohort, study, _ = sno
    with pytest.raises(ValidationError) as error:
        record(study, cohort, researcher, at=days_ago(7))
    assert "disperse_s" in error.value.message_dict or "aggregate_s" in error.value.message_dict
    assert "requires that the scorer is not the operator" in str(error.value)
    assert study.trials.count() == 1


def test_a_manager_who_ran_the_trial_is_refused_too(manager, researcher, protocol):
    cohort = make_cohort(user=researcher, protocol=protocol, at=days_ago(10))
    study = make_study(user=researcher, protocol=protocol, scorer_not_operator=True)
    trial = record(study, cohort, manager, at=days_ago(8), disperse_s=None, aggregate_s=None).trial
    with pytest.raises(PermissionDenied, match="scorer is not the operator"):
        services.score_trial(user=manager, trial=trial, values={"disperse_s": 150.0})


# ---------------------------------------------------------------------------------------------
# Attachments
# ---------------------------------------------------------------------------------------------
def test_another_researcher_cannot_attach_files(client, world, researcher, other):
    cohort, study = world
    trial = record(study, cohort, researcher, at=days_ago(8)).trial
    client.force_login(other)
    response = client.post(reverse("experiments:attachment-add", args=[trial.pk]),
                           {"file": SimpleUploadedFile("a.png", PNG), "kind": "photo"})
    assert response.status_code == 403
    assert "may attach files in study" in response.content.decode()
    assert not Attachment.objects.exists()
    with pytest.raises(PermissionDenied):
        services.add_attachment(user=other, trial=trial, upload=SimpleUploadedFile("a.png", PNG), kind="photo")


@pytest.mark.parametrize("who", ["researcher", "manager"])
def test_the_owner_and_a_manager_attach_files(client, request, world, researcher, who):
    cohort, study = world
    trial = record(study, cohort, researcher, at=days_ago(8)).trial
    client.force_login(request.getfixturevalue(who))
    response = client.post(reverse("experiments:attachment-add", args=[trial.pk]),
                           {"file": SimpleUploadedFile("a.png", PNG), "kind": "photo"})
    assert response.status_code == 302
    assert Attachment.objects.get().uploaded_by == request.getfixturevalue(who)
