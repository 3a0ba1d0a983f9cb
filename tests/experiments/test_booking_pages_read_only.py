"""Pages never write: a booking past its day is shown as expired on the index and calendar, and only the
expire_bookings command (or a POST) marks it so."""
from datetime import timedelta

import pytest
from django.core.management import call_command
from django.urls import reverse

from colonies.models import Deviation
from experiments import services
from experiments.models import Booking, Cohort, Study, Trial
from tests.experiments.builders import today


def _state():
    """Every row and every history row of the records a page could touch."""
    models = (Booking, Cohort, Study, Trial, Deviation)
    return (tuple(m.objects.count() for m in models), tuple(m.history.count() for m in models),
            tuple(Booking.objects.order_by("pk").values_list("status", flat=True)))


@pytest.fixture
def stale(researcher, protocol, tank):
    """A booking for two days ago that was never drawn, and one for tomorrow."""
    old = services.book(user=researcher, protocol=protocol, tank=tank, animals=20,
                        needed_on=today() - timedelta(days=2), today=today() - timedelta(days=3))
    new = services.book(user=researcher, protocol=protocol, tank=tank, animals=30, needed_on=today() + timedelta(days=1))
    return old, new


@pytest.mark.parametrize("persona", ["technician", "researcher", "manager"])
def test_index_and_calendar_leave_the_database_unchanged(client, request, stale, persona):
    client.force_login(request.getfixturevalue(persona))
    before = _state()
    start = (today() - timedelta(days=2)).isoformat()
    for url in (reverse("experiments:index"), reverse("experiments:calendar"),
                reverse("experiments:calendar") + f"?view=month&start={start}",
                reverse("experiments:booking-detail", args=[stale[0].pk])):
        assert client.get(url).status_code == 200
    assert _state() == before
    assert Booking.objects.get(pk=stale[0].pk).status == Booking.Status.ACTIVE


def test_index_lists_only_bookings_that_still_hold_animals(client, researcher, stale):
    old, new = stale
    client.force_login(researcher)
    bookings = list(client.get(reverse("experiments:index")).context["bookings"])
    assert bookings == [new]


def test_calendar_and_booking_page_show_a_stale_booking_as_expired(client, researcher, stale):
    old, _ = stale
    client.force_login(researcher)
    start = old.needed_on.isoformat()
    page = client.get(reverse("experiments:calendar") + f"?view=week&start={start}").content.decode()
    assert 'class="cal-item booking-expired"' in page and "Expired (not drawn)" in page
    detail = client.get(reverse("experiments:booking-detail", args=[old.pk])).content.decode()
    assert 'class="pill booking-expired">Expired (not drawn)' in detail


def test_a_stale_booking_holds_no_animals_and_the_command_marks_it(researcher, stale, tank):
    assert services.available(tank) == 900 - 30  # only tomorrow's booking holds animals
    call_command("expire_bookings")
    old, new = stale
    old.refresh_from_db()
    new.refresh_from_db()
    assert (old.status, new.status) == (Booking.Status.EXPIRED, Booking.Status.ACTIVE)
    assert old.history.first().history_change_reason == "Expired: not drawn by its date"
    assert services.available(tank) == 900 - 30
