"""Late outcomes (the count of dead animals 24 h after a trial) stay recordable after unblinding, marked.

Unblinding locks the outcomes, and the 24 h count is only accepted from 24 h after the trial: before
this, unblinding within a day of the last trial made that count impossible to record. Now the late
outcomes (models.LATE_OUTCOME_FIELDS) stay open, and a value entered after unblinding carries the
time it was entered and a mark, on the trial page, the study page and in the CSV.
"""
import csv
import io
from datetime import timedelta

import pytest
from django.core.exceptions import ValidationError
from django.urls import reverse
from django.utils import timezone

from experiments import services
from tests.experiments.builders import make_cohort, make_study, record
from tests.factories import page_text


@pytest.fixture
def finished(researcher, protocol):
    """A blinded study whose last trial ran 25 h ago, scored blind, unblinded one hour after it."""
    now = timezone.now()
    last_run = now - timedelta(hours=25)
    cohort = make_cohort(user=researcher, protocol=protocol, at=last_run - timedelta(days=2))
    study = make_study(user=researcher, protocol=protocol, blinded=True)
    trial = record(study, cohort, researcher, at=last_run, now=last_run + timedelta(minutes=15)).trial
    services.unblind(user=researcher, study=study, reason="Last dish scored; primary analysis now", password="pw",
                     at=last_run + timedelta(hours=1))
    return study, trial, last_run


def test_unblinding_an_hour_after_the_last_trial_leaves_the_24_h_count_recordable_and_marked(researcher, finished):
    study, trial, last_run = finished
    with pytest.raises(ValidationError, match="from 24 h after the trial ran"):
        services.score_trial(user=researcher, trial=trial, values={"mortality_24h": 2},
                             now=last_run + timedelta(hours=23))

    services.score_trial(user=researcher, trial=trial, values={"mortality_24h": 2}, now=last_run + timedelta(hours=25))

    trial.refresh_from_db()
    assert trial.mortality_24h == 2
    assert trial.mortality_24h_after_unblinding is True
    assert trial.mortality_24h_entered_at == last_run + timedelta(hours=25)
    assert (trial.disperse_s, trial.scored_at) == (120.0, last_run + timedelta(minutes=15))  # the blind score stays
    assert trial.history.latest("history_date").history_change_reason == "Late outcome entered after unblinding"


def test_other_outcomes_stay_locked_after_unblinding(researcher, finished):
    study, trial, _ = finished
    with pytest.raises(services.Refused, match="locked outcomes; scores can no longer change. Only late outcomes "
                                               r"\(dead at 24 h\) can still be entered"):
        services.score_trial(user=researcher, trial=trial, values={"disperse_s": 90.0, "mortality_24h": 1},
                             reason="Re-read the video")
    trial.refresh_from_db()
    assert (trial.disperse_s, trial.mortality_24h) == (120.0, None)


def test_the_score_page_after_unblinding_asks_only_for_late_outcomes_and_pages_show_the_mark(
        client, researcher, technician, finished):
    study, trial, _ = finished
    client.force_login(researcher)
    url = reverse("experiments:trial-score", args=[trial.pk])
    form = client.get(url)
    assert list(form.context["form"].fields) == ["mortality_24h"]
    assert "Enter late outcomes" in page_text(client.get(trial.get_absolute_url()))

    response = client.post(url, {"mortality_24h": "3", "disperse_s": "5"})  # the locked field is not even read

    assert response.status_code == 302
    trial.refresh_from_db()
    assert (trial.mortality_24h, trial.disperse_s, trial.mortality_24h_after_unblinding) == (3, 120.0, True)
    client.force_login(technician)
    assert "entered after unblinding" in page_text(client.get(trial.get_absolute_url()))
    assert "after unblinding" in page_text(client.get(study.get_absolute_url()))
    body = b"".join(client.get(reverse("experiments:study-csv", args=[study.code])).streaming_content).decode()
    [row] = csv.DictReader(io.StringIO(body))
    assert (row["mortality_24h"], row["mortality_24h_after_unblinding"]) == ("3", "True")
    assert row["mortality_24h_entered_at"] == timezone.localtime(trial.mortality_24h_entered_at).strftime(
        "%Y-%m-%d %H:%M")


def test_a_count_entered_before_unblinding_is_not_marked_and_needs_no_reason_the_first_time(researcher, protocol):
    now = timezone.now()
    cohort = make_cohort(user=researcher, protocol=protocol, at=now - timedelta(days=4))
    study = make_study(user=researcher, protocol=protocol, blinded=True)
    trial = record(study, cohort, researcher, at=now - timedelta(days=3)).trial  # scored when run

    services.score_trial(user=researcher, trial=trial, values={"mortality_24h": 1})  # the next day: no reason

    trial.refresh_from_db()
    assert trial.mortality_24h == 1 and trial.mortality_24h_after_unblinding is False
    assert trial.mortality_24h_entered_at is not None
    with pytest.raises(services.Refused, match="give a reason"):
        services.score_trial(user=researcher, trial=trial, values={"mortality_24h": 2})
    services.unblind(user=researcher, study=study, reason="All scored", password="pw")
    services.score_trial(user=researcher, trial=trial, values={"mortality_24h": 2}, reason="Recount: one more dead")
    trial.refresh_from_db()
    assert (trial.mortality_24h, trial.mortality_24h_after_unblinding) == (2, True)
    assert trial.history.latest("history_date").history_change_reason == \
        "Outcome corrected after unblinding: Recount: one more dead"


def test_nothing_else_can_be_written_to_a_locked_study_through_the_late_door(researcher, finished):
    study, trial, last_run = finished
    with pytest.raises(services.Refused, match="locked outcomes"):
        services.score_trial(user=researcher, trial=trial, values={}, reason="touch")  # no late value: nothing
    trial.refresh_from_db()
    assert trial.scored_at == last_run + timedelta(minutes=15)
