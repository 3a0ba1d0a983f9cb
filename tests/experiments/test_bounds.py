"""Refusals on the draw, cohort-end and attachment forms name their field; bookings and protocols keep to plausible dates."""
import pytest
from django.core.files.uploadedfile import SimpleUploadedFile
from django.urls import reverse
from django.utils import timezone

from experiments import services
from experiments.models import Attachment, Booking, Cohort, Protocol
from tests.experiments.builders import days_ago, make_cohort, make_study, record, today
from tests.factories import page_text


def test_a_refused_draw_comes_back_with_the_error_by_the_field(client, researcher, protocol, tank):
    booking = services.book(user=researcher, protocol=protocol, tank=tank, animals=12, needed_on=today())
    client.force_login(researcher)

    response = client.post(reverse("experiments:booking-draw", args=[booking.pk]), {"count": "1e19"})

    assert response.status_code == 400
    assert response.context["draw_form"].errors == {"count": ["Animals drawn: enter a whole number."]}
    assert "Nothing was saved: Animals drawn: enter a whole number." in page_text(response)
    assert not Cohort.objects.exists()


@pytest.mark.parametrize("typed", ["0001-01-01T00:00", "9999-12-31T23:59"])
def test_a_draw_time_of_year_1_or_9999_is_refused_not_a_crash(client, researcher, protocol, tank, typed):
    booking = services.book(user=researcher, protocol=protocol, tank=tank, animals=12, needed_on=today())
    client.force_login(researcher)

    response = client.post(reverse("experiments:booking-draw", args=[booking.pk]), {"count": 12, "drawn_at": typed})

    assert response.status_code == 400
    assert "drawn_at" in response.context["draw_form"].errors
    assert not Cohort.objects.exists()


def test_a_refused_cohort_end_names_the_field(client, researcher, protocol, tank):
    cohort = make_cohort(user=researcher, protocol=protocol, tank=tank, animals=10, at=days_ago(2))
    client.force_login(researcher)

    response = client.post(reverse("experiments:cohort-end", args=[cohort.pk]),
                           {"end": "returned", "returned_to": tank.pk, "returned_count": "99999999999999999999"})

    assert response.status_code == 400
    errors = response.context["end_form"].errors
    assert list(errors) == ["returned_count"]
    assert errors["returned_count"][0].startswith("Animals returned 99999999999999999999 is not possible")
    cohort.refresh_from_db()
    assert cohort.is_active


def test_a_refused_attachment_names_the_field(client, researcher, protocol, tank, settings, tmp_path):
    settings.MEDIA_ROOT = tmp_path
    cohort = make_cohort(user=researcher, protocol=protocol, tank=tank, at=days_ago(10))
    study = make_study(user=researcher, protocol=protocol, replicates=1)
    trial = record(study, cohort, researcher, at=days_ago(9)).trial
    client.force_login(researcher)

    response = client.post(reverse("experiments:attachment-add", args=[trial.pk]),
                           {"kind": "hologram", "caption": "x" * 300,
                            "file": SimpleUploadedFile("dish.png", b"png", content_type="image/png")})

    assert response.status_code == 400
    errors = response.context["attachment_form"].errors
    assert errors["kind"][0].startswith("Kind: select a valid choice.")
    assert errors["caption"] == ["Caption: 300 characters is too long; allowed at most 200."]
    assert not Attachment.objects.exists()


@pytest.mark.parametrize("needed_on,message", [
    ("9999-12-31", "Needed on: 31 Dec 9999 is impossible; allowed range"),  # the lab's date format
    ("0001-01-01", "is in the past"),
])
def test_a_booking_far_ahead_or_in_year_1_is_refused(client, researcher, protocol, tank, needed_on, message):
    client.force_login(researcher)

    response = client.post(reverse("experiments:booking-new"),
                           {"protocol": protocol.pk, "species": tank.species_id, "animals": 5,
                            "needed_on": needed_on, "tank": tank.pk})

    assert response.status_code == 400
    assert message in page_text(response)
    assert not Booking.objects.exists()


def test_the_calendar_far_in_the_future_falls_back_to_today(client, researcher):
    client.force_login(researcher)
    response = client.get(reverse("experiments:calendar"), {"start": "9999-12-31", "view": "month"})
    assert response.status_code == 200
    assert response.context["start"] == timezone.localdate()


def test_the_protocol_page_refuses_a_protocol_expiring_in_9999_with_absurd_maxima(client, manager):
    from datetime import date

    from tests.experiments import protocol_posts

    client.force_login(manager)  # protocols are entered on the app's page; the back office only reads them
    data = protocol_posts.new_protocol(
        reference="AWB-X", starts_on=date(2026, 1, 1), expires_on=date(9999, 12, 31),
        max_animals_per_trial="10000000000000000000", max_exposures_per_group=0,
        allowances=[{"kind": "thermal", "max_temp_step_c": "400", "max_pulse_count": "10000000000000000000"}])

    response = client.post(reverse("experiments:protocol-new"), data)

    text = page_text(response)
    assert response.status_code == 400
    assert "Expires on: 31 Dec 9999 is impossible; allowed range 01 Jan 1950 to" in text
    assert "Animals 10000000000000000000 is not possible here: allowed range 1–100000." in text
    assert "Exposures per dish 0 is not possible here: allowed range 1–10000." in text
    assert "Temperature step (size) 400 °C is not possible here: allowed range 0–40 °C." in text
    assert not Protocol.objects.filter(reference="AWB-X").exists()
