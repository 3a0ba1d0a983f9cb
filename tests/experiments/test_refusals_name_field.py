"""Each refusal on the booking, cohort, trial and attachment forms names the field it is about."""
import pytest
from django.urls import reverse

from experiments import services
from experiments.models import Attachment, Booking, Cohort
from tests.experiments.builders import days_ago, make_cohort, make_study, record, today
from tests.factories import page_text


@pytest.fixture
def logged_in(client, researcher):
    client.force_login(researcher)
    return client


def test_draw_without_a_count_names_animals_drawn(logged_in, researcher, protocol, tank):
    booking = services.book(user=researcher, protocol=protocol, tank=tank, animals=10, needed_on=today())
    response = logged_in.post(reverse("experiments:booking-draw", args=[booking.pk]), {"count": ""})
    assert response.status_code == 400  # the booking page again, the error beside the field
    assert "Nothing was saved: Animals drawn: this field is required." in page_text(response)
    assert not Cohort.objects.exists()


def test_cancel_without_a_reason_names_the_reason(logged_in, researcher, protocol, tank):
    booking = services.book(user=researcher, protocol=protocol, tank=tank, animals=10, needed_on=today())
    response = logged_in.post(reverse("experiments:booking-cancel", args=[booking.pk]), {"reason": " "}, follow=True)
    assert "Reason: give a reason to cancel the booking; nothing was changed." in page_text(response)
    assert Booking.objects.get().is_active
    with pytest.raises(services.Refused, match="^Reason: "):
        services.cancel_booking(user=researcher, booking=booking, reason="")


def test_cohort_end_returned_without_a_tank_names_returned_to(logged_in, researcher, protocol):
    cohort = make_cohort(user=researcher, protocol=protocol)
    response = logged_in.post(reverse("experiments:cohort-end", args=[cohort.pk]),
                              {"end": Cohort.End.RETURNED, "returned_to": "", "returned_count": "5"}, follow=True)
    assert "Nothing was saved: Returned to: Choose the tank the animals went back to." in page_text(response)
    cohort.refresh_from_db()
    assert cohort.is_active


@pytest.mark.parametrize("action", ["exclude", "void"])
def test_set_aside_without_a_reason_names_the_reason(logged_in, researcher, protocol, action):
    cohort = make_cohort(user=researcher, protocol=protocol, at=days_ago(10))
    trial = record(make_study(user=researcher, protocol=protocol), cohort, researcher, at=days_ago(8)).trial
    response = logged_in.post(reverse("experiments:trial-set-aside", args=[trial.pk, action]), {"reason": ""},
                              follow=True)
    assert f"Reason: give a reason to {action} the trial; nothing was changed." in page_text(response)
    trial.refresh_from_db()
    assert trial.excluded_at is None and trial.voided_at is None
    handler = services.exclude_trial if action == "exclude" else services.void_trial
    with pytest.raises(services.Refused, match="^Reason: a reason is required"):
        handler(user=researcher, trial=trial, reason="")


def test_attachment_without_a_file_names_the_file(logged_in, researcher, protocol):
    cohort = make_cohort(user=researcher, protocol=protocol, at=days_ago(10))
    trial = record(make_study(user=researcher, protocol=protocol), cohort, researcher, at=days_ago(8)).trial
    response = logged_in.post(reverse("experiments:attachment-add", args=[trial.pk]), {"kind": "photo"}, follow=True)
    assert "Nothing was stored: File: choose a file to attach." in page_text(response)
    assert not Attachment.objects.exists()
