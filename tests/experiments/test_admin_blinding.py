"""The back office keeps a blinded study blind: a manager reading trials, overrides and studies there
sees no condition, stimulus or allocation until the study is unblinded, as on the app's own pages; the
manager who ran a trial sees that trial (experiments/blinding.py)."""
import pytest
from django.urls import reverse

from colonies.roles import MANAGER
from experiments import services
from experiments.models import Override
from tests.experiments.builders import days_ago, make_cohort, make_study, record
from tests.factories import make_user

CONDITIONS = ("zz-dark-arm", "qq-bright-arm")
SECRET_IRRADIANCE = 2.345  # mW/cm², a value that appears nowhere else on the pages
OVERRIDE_REASON = "Repeat of the qq arm at the higher irradiance"


@pytest.fixture
def staff_manager(db):
    return make_user("mira", role=MANAGER, is_staff=True)


@pytest.fixture
def operator_manager(db):
    """The manager who runs the second trial (with an override) and so knows its condition."""
    return make_user("omar", role=MANAGER, is_staff=True)


@pytest.fixture
def blinded(researcher, operator_manager, protocol):
    cohort = make_cohort(user=researcher, protocol=protocol, at=days_ago(10))
    study = make_study(user=researcher, protocol=protocol, conditions=CONDITIONS, replicates=2, blinded=True)
    first = record(study, cohort, researcher, at=days_ago(9), irradiance=2.0).trial
    # A settings correction made outside the app (the shell): the history's list of changes would show it.
    first.irradiance_mw_cm2, first._change_reason = SECRET_IRRADIANCE, "Meter recalibrated"
    first.save()
    second = record(study, cohort, operator_manager, at=days_ago(8.9), irradiance=SECRET_IRRADIANCE,
                    override_reason=OVERRIDE_REASON).trial  # too soon after the first: an override
    services.score_trial(user=researcher, trial=first, values={"disperse_s": 200, "censored": False},
                         reason="Re-read the video")  # a second version, so the history has changes
    return study, first, second


def _url(model, view, *args):
    return reverse(f"admin:experiments_{model}_{view}", args=args)


def _pages(study, trial, override):
    return [_url("trial", "changelist"), _url("trial", "change", trial.pk), _url("trial", "history", trial.pk),
            _url("override", "changelist"), _url("override", "change", override.pk),
            _url("override", "history", override.pk),
            _url("study", "change", study.pk), _url("study", "history", study.pk)]


def _leaks(html: str) -> list[str]:
    secrets = [*CONDITIONS, "2.345", OVERRIDE_REASON, "mJ/cm²</", "Ultraviolet", "UV light"]
    return [s for s in secrets if s in html]


def test_manager_sees_no_condition_stimulus_or_allocation_of_a_blinded_study(client, staff_manager, blinded):
    study, trial, second = blinded
    override = Override.objects.get(trial=second)
    client.force_login(staff_manager)

    for url in _pages(study, trial, override):
        response = client.get(url)
        assert response.status_code == 200, url
        assert _leaks(response.content.decode()) == [], url
    listing = client.get(_url("trial", "changelist")).content.decode()
    assert "blinded" in listing and trial.code in listing


def test_the_operator_sees_the_trial_they_ran_and_no_other(client, operator_manager, blinded):
    study, first, second = blinded
    client.force_login(operator_manager)
    own = client.get(_url("trial", "change", second.pk)).content.decode()
    assert second.condition in own and "2.345" in own
    other = client.get(_url("trial", "change", first.pk)).content.decode()
    assert _leaks(other) == []
    listing = client.get(_url("trial", "changelist")).content.decode()
    assert listing.count(second.condition) == 1 and "blinded" in listing


def test_the_same_pages_show_them_once_the_owner_unblinds(client, researcher, staff_manager, blinded):
    study, trial, second = blinded
    services.unblind(user=researcher, study=study, reason="All dishes scored", password="pw")
    client.force_login(staff_manager)

    html = client.get(_url("trial", "change", trial.pk)).content.decode()
    assert trial.condition in html and "2.345" in html
    assert "2.345" in client.get(_url("trial", "history", trial.pk)).content.decode()  # 2.0 → 2.345
    assert OVERRIDE_REASON in client.get(_url("override", "change", Override.objects.get(trial=second).pk)).content.decode()
    assert trial.condition in client.get(_url("trial", "changelist")).content.decode()


@pytest.mark.parametrize("lookup", ["condition", "condition__startswith", "kind", "irradiance_mw_cm2__gt",
                                    "dose_mj_cm2__isnull"])
def test_trial_list_cannot_be_filtered_by_a_blinded_field(client, staff_manager, blinded, lookup):
    client.force_login(staff_manager)

    response = client.get(_url("trial", "changelist"), {lookup: "zz-dark-arm" if "condition" in lookup else "1"})

    assert response.status_code == 400  # a count per condition would give the allocation away


def test_revert_form_of_a_blinded_trial_is_refused(client, superuser, blinded):
    study, trial, _ = blinded
    client.force_login(superuser)
    version = trial.history.earliest("history_date")

    response = client.get(reverse("admin:experiments_trial_simple_history", args=[trial.pk, version.pk]))

    assert response.status_code == 403
    assert _leaks(response.content.decode()) == []


def test_study_change_page_withholds_the_seed_until_unblinding(client, researcher, staff_manager, blinded):
    # The seed with the design (conditions x replicates) would rebuild the allocation (experiments/allocation.py).
    study, _trial, _second = blinded
    client.force_login(staff_manager)
    html = client.get(_url("study", "change", study.pk)).content.decode()
    assert "field-seed" not in html and 'name="seed"' not in html
    services.unblind(user=researcher, study=study, reason="All dishes scored", password="pw")
    html = client.get(_url("study", "change", study.pk)).content.decode()
    assert "field-seed" in html
