"""Researchers' reasons (cancel, unblind, set aside) up to REASON_MAX_CHARS are kept; longer ones are refused."""
from django.urls import reverse

from colonies.models import REASON_MAX_CHARS
from experiments import services
from experiments.models import Booking
from tests.experiments.builders import today
from tests.factories import page_text

LONG = ("Animals needed for the pilot were taken from another tank after the census was revised. " * 12)[:1000]


def test_a_cancellation_reason_of_1000_characters_is_kept_whole(client, researcher, protocol, tank):
    booking = services.book(user=researcher, protocol=protocol, tank=tank, animals=12, needed_on=today())
    client.force_login(researcher)

    response = client.post(reverse("experiments:booking-cancel", args=[booking.pk]), {"reason": LONG})

    assert response.status_code == 302
    booking.refresh_from_db()
    assert (booking.status, booking.cancel_reason) == (Booking.Status.CANCELLED, LONG)
    assert booking.history.order_by("-history_date", "-history_id").first().history_change_reason == f"Cancelled: {LONG}"


def test_a_cancellation_reason_over_the_maximum_is_refused_with_the_limit(client, researcher, protocol, tank):
    booking = services.book(user=researcher, protocol=protocol, tank=tank, animals=12, needed_on=today())
    client.force_login(researcher)

    response = client.post(reverse("experiments:booking-cancel", args=[booking.pk]),
                           {"reason": "y" * (REASON_MAX_CHARS + 1)}, follow=True)

    assert response.status_code == 200
    assert ("Reason: at most 2,000 characters are kept; this one has 2001. Shorten it. Nothing was changed."
            in page_text(response))
    booking.refresh_from_db()
    assert booking.is_active
