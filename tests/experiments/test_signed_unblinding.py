"""Unblinding (which locks a study's outcomes) and locking an open study's outcomes are signed: the password is re-entered; a wrong one unblinds
nothing; the signature is shown on the study page and a later change of a locked outcome is detectable."""
import pytest
from django.urls import reverse

from colonies.models import Signature
from colonies.signatures import signatures_for
from experiments.models import Study, Trial
from tests.experiments.builders import days_ago, make_cohort, make_study, record
from tests.factories import page_text

pytestmark = pytest.mark.django_db


@pytest.fixture
def blind_study(researcher, protocol, tank):
    cohort = make_cohort(user=researcher, protocol=protocol, tank=tank, animals=24, at=days_ago(6))
    study = make_study(user=researcher, protocol=protocol, blinded=True, replicates=1)
    record(study, cohort, researcher, at=days_ago(4))
    return study


def _state(study):
    study.refresh_from_db()
    return study.unblinded_at, study.outcomes_locked_at, study.history.count(), Signature.objects.count()


def test_a_wrong_password_unblinds_nothing(client, researcher, blind_study):
    client.force_login(researcher)
    before = _state(blind_study)
    for password in ("", "wrong"):
        response = client.post(reverse("experiments:study-unblind", args=[blind_study.code]),
                               {"reason": "All scored", "password": password}, follow=True)
        assert "Password:" in page_text(response)
        assert _state(blind_study) == before
    assert blind_study.is_blind


def test_unblinding_is_signed_and_shown_and_a_later_change_of_an_outcome_is_detected(client, researcher, blind_study):
    researcher.first_name, researcher.last_name = "Rhea", "Calloway"
    researcher.save()
    client.force_login(researcher)
    assert "Your password" in page_text(client.get(blind_study.get_absolute_url()))

    client.post(reverse("experiments:study-unblind", args=[blind_study.code]),
                {"reason": "All scored", "password": "pw"})

    blind_study.refresh_from_db()
    assert not blind_study.is_blind and blind_study.is_locked
    sig = blind_study.signatures.get()
    assert (sig.signer_name, sig.meaning) == ("Rhea Calloway", Signature.Meaning.UNBLINDED)
    page = page_text(client.get(blind_study.get_absolute_url()))
    assert "Signed by Rhea Calloway," in page and "meaning: unblinded (outcomes locked)" in page

    Trial.objects.filter(study=blind_study).update(disperse_s=5)  # a locked outcome changed behind the app's back
    assert [s.current for s in signatures_for(Study.objects.get(pk=blind_study.pk))] == [False]
    assert "record changed since this signature" in page_text(client.get(blind_study.get_absolute_url()))


def test_locking_an_open_studys_outcomes_is_signed_and_a_wrong_password_locks_nothing(client, researcher, protocol,
                                                                                    tank):
    cohort = make_cohort(user=researcher, protocol=protocol, tank=tank, animals=24, at=days_ago(6))
    study = make_study(user=researcher, protocol=protocol, blinded=False, replicates=1)
    record(study, cohort, researcher, at=days_ago(4))
    client.force_login(researcher)
    url = reverse("experiments:study-lock", args=[study.code])
    assert "Sign and lock outcomes" in page_text(client.get(study.get_absolute_url()))
    before = _state(study)

    assert "Password:" in page_text(client.post(url, {"password": "wrong"}, follow=True))
    assert _state(study) == before and not study.is_locked

    client.post(url, {"password": "pw"})
    study.refresh_from_db()
    assert study.is_locked
    assert study.signatures.get().meaning == Signature.Meaning.LOCKED
    page = page_text(client.get(study.get_absolute_url()))
    assert "meaning: outcomes locked" in page and "Sign and lock outcomes" not in page
