"""Availability, booking, drawing, cancelling and expiring (experiments/services.py)."""
import threading
from datetime import timedelta

import pytest
from django.core.management import call_command
from django.db import connection
from django.utils import timezone

from colonies.models import Census, Tank
from experiments import services
from experiments.models import Booking, Cohort, Protocol
from tests.experiments.builders import days_ago, make_protocol, make_stocked_tank, today
from tests.factories import make_user


def test_available_is_estimate_minus_reserve_minus_active_bookings(researcher, protocol, tank):
    assert services.current_population(tank) == 1000
    assert services.available(tank) == 900
    services.book(user=researcher, protocol=protocol, tank=tank, animals=300, needed_on=today())
    assert services.available(tank) == 600
    assert services.current_population(tank) == 1000  # booked animals are still in the tank


def test_drawn_animals_leave_the_tank_and_returned_ones_come_back(researcher, protocol, tank):
    booking = services.book(user=researcher, protocol=protocol, tank=tank, animals=40, needed_on=today())
    cohort = services.draw(user=researcher, booking=booking)
    assert services.current_population(tank) == 960
    assert services.available(tank) == 860  # the booking no longer holds animals; the draw removed them
    services.end_cohort(user=researcher, cohort=cohort, end=Cohort.End.RETURNED, returned_to=tank, returned_count=35)
    assert services.current_population(tank) == 995


def test_a_split_after_the_census_sets_the_tanks_population(researcher, technician, protocol, tank):
    """Animals moved away in a split cannot be booked: the split's 'stayed' estimate is newer than the census."""
    from colonies.services import NewTank, record_split

    record_split(user=technician, source=tank, source_before=1000, stayed=400,
                 parts=[(NewTank(code="SPL-01", position="shelf Z", volume_l=2.0), 600)])
    assert services.current_population(tank) == 400
    assert services.available(tank) == 300  # 400 - reserve 100
    new_tank = Tank.objects.get(code="SPL-01")
    assert services.current_population(new_tank) == 600  # the animals moved in at its set-up
    with pytest.raises(services.Refused, match="only 300 animals available"):
        services.book(user=researcher, protocol=protocol, tank=tank, animals=500, needed_on=today())


def test_animals_split_into_an_existing_tank_count_there_everywhere(researcher, technician, protocol, tank):
    """Trials availability, the density rule and the tank page agree after a split into an existing tank."""
    from django.urls import reverse
    from django.test import Client

    from colonies.deviations import latest_estimates
    from colonies.services import record_split

    other = make_stocked_tank(estimate=500, user=technician, species=tank.species)
    record_split(user=technician, source=tank, source_before=1000, stayed=700, parts=[(other, 300)])
    assert services.current_population(other) == 800
    assert latest_estimates([other.pk])[other.pk][0] == 800
    client = Client()
    client.force_login(researcher)
    summary = client.get(reverse("colonies:tank-detail", args=[other.code])).context["summary"]
    assert summary.latest.value == 800


def test_a_census_after_the_draw_already_counts_it(researcher, technician, protocol, tank):
    booking = services.book(user=researcher, protocol=protocol, tank=tank, animals=40, needed_on=today())
    services.draw(user=researcher, booking=booking, at=days_ago(1))
    Census.objects.create(tank=tank, recorded_by=technician, method=Census.Method.DIRECT, direct_count=1200,
                          estimate=1200.0, observed_at=timezone.now())
    assert services.current_population(tank) == 1200


def test_an_old_census_without_a_stored_estimate_falls_back_to_its_count(technician):
    tank = make_stocked_tank(estimate=500, reserve=0, user=technician)
    Census.objects.filter(tank=tank).update(estimate=None)
    assert services.current_population(tank) == 500


def test_a_voided_census_does_not_count(technician):
    tank = make_stocked_tank(estimate=500, reserve=0, user=technician, observed_at=days_ago(5))
    newer = Census.objects.create(tank=tank, recorded_by=technician, method=Census.Method.DIRECT, direct_count=50,
                                  estimate=50.0, observed_at=days_ago(1))
    newer.void(user=technician, reason="Counted the wrong tank")
    assert services.current_population(tank) == 500


def test_a_tank_never_counted_cannot_be_booked(researcher, protocol):
    from tests.factories import make_tank
    tank = make_tank()
    assert services.current_population(tank) is None
    with pytest.raises(services.Refused, match="no census yet"):
        services.book(user=researcher, protocol=protocol, tank=tank, animals=1, needed_on=today())


def test_booking_more_than_available_is_refused_with_the_numbers(researcher, protocol, tank):
    services.book(user=researcher, protocol=protocol, tank=tank, animals=850, needed_on=today())
    with pytest.raises(services.Refused) as refusal:
        services.book(user=researcher, protocol=protocol, tank=tank, animals=60, needed_on=today())
    assert str(refusal.value) == ("Tank LV-T1 has only 50 animals available (about 1000 in the tank − reserve 100 − "
                                  "850 already booked); you asked for 60. Nothing was booked.")
    assert Booking.objects.count() == 1


@pytest.mark.parametrize("change,message", [
    ({"status": Protocol.Status.DRAFT}, "is draft, not approved: it cannot be booked or used"),
    ({"status": Protocol.Status.SUSPENDED}, "is suspended, not approved"),
    ({"expires_on": timezone.localdate() - timedelta(days=1)}, "expired on"),
])
def test_an_unapproved_or_expired_protocol_cannot_be_booked(researcher, tank, change, message):
    protocol = make_protocol(**change) if "status" in change else \
        make_protocol(starts_on=timezone.localdate() - timedelta(days=90), **change)
    with pytest.raises(services.Refused, match=message):
        services.book(user=researcher, protocol=protocol, tank=tank, animals=5, needed_on=today())
    assert not Booking.objects.exists()


def test_a_booking_in_the_past_or_from_a_quarantined_tank_is_refused(researcher, protocol, tank):
    with pytest.raises(services.Refused, match="in the past"):
        services.book(user=researcher, protocol=protocol, tank=tank, animals=5, needed_on=today() - timedelta(days=1))
    Tank.objects.filter(pk=tank.pk).update(status=Tank.Status.QUARANTINE)
    with pytest.raises(services.Refused, match="quarantine"):
        services.book(user=researcher, protocol=protocol, tank=tank, animals=5, needed_on=today())


def test_cancelling_frees_the_animals_and_needs_a_reason(researcher, protocol, tank):
    booking = services.book(user=researcher, protocol=protocol, tank=tank, animals=500, needed_on=today())
    with pytest.raises(services.Refused, match="reason"):
        services.cancel_booking(user=researcher, booking=booking, reason="  ")
    services.cancel_booking(user=researcher, booking=booking, reason="Study postponed")
    booking.refresh_from_db()
    assert booking.status == Booking.Status.CANCELLED and booking.cancel_reason == "Study postponed"
    assert services.available(tank) == 900
    assert booking.history.first().history_change_reason == "Cancelled: Study postponed"
    assert booking.history.first().history_user == researcher


def test_draw_makes_a_cohort_once(researcher, protocol, tank):
    booking = services.book(user=researcher, protocol=protocol, tank=tank, animals=12, needed_on=today())
    with pytest.raises(services.Refused, match="allowed range 1–12"):
        services.draw(user=researcher, booking=booking, count=13)
    cohort = services.draw(user=researcher, booking=booking, count=10)
    assert (cohort.size, cohort.origin_tank, cohort.protocol, cohort.booking) == (10, tank, protocol, booking)
    with pytest.raises(services.Refused, match="is drawn; nothing can be drawn"):
        services.draw(user=researcher, booking=booking)


def test_a_booking_past_its_day_cannot_be_drawn_and_expires(researcher, protocol, tank):
    booking = services.book(user=researcher, protocol=protocol, tank=tank, animals=20, needed_on=today() - timedelta(days=2),
                            today=today() - timedelta(days=3))
    with pytest.raises(services.Refused, match="has expired"):
        services.draw(user=researcher, booking=booking)
    assert services.available(tank) == 900  # past its day it holds no animals, even before it is marked expired
    assert services.expire_bookings(dry_run=True) == 1
    assert Booking.objects.get().status == Booking.Status.ACTIVE
    assert services.expire_bookings() == 1
    assert Booking.objects.get().status == Booking.Status.EXPIRED
    assert services.available(tank) == 900
    assert services.expire_bookings() == 0


def test_expire_bookings_command_reports_one_line(researcher, protocol, tank, capsys):
    services.book(user=researcher, protocol=protocol, tank=tank, animals=20, needed_on=today() - timedelta(days=1),
                  today=today() - timedelta(days=1))
    call_command("expire_bookings", "--dry-run")
    out = capsys.readouterr().out.strip()
    assert out.startswith("Dry run: 1 booking would expire") and "\n" not in out
    assert Booking.objects.get().status == Booking.Status.ACTIVE
    call_command("expire_bookings")
    assert capsys.readouterr().out.strip().startswith("1 booking expired")
    assert Booking.objects.get().status == Booking.Status.EXPIRED


def test_suggestions_list_tanks_with_enough_spare_animals_most_first(researcher, technician, protocol):
    rich = make_stocked_tank(estimate=3000, reserve=100, user=technician, code="S-1")
    species = rich.species
    poor = make_stocked_tank(estimate=150, user=technician, code="S-2", species=species)
    middle = make_stocked_tank(estimate=800, user=technician, code="S-3", species=species)
    make_stocked_tank(estimate=5000, user=technician, code="S-4")  # another species
    services.book(user=researcher, protocol=protocol, tank=middle, animals=200, needed_on=today())
    found = services.suggest_tanks(species, 100)
    assert [(t.code, t.available) for t in found] == [("S-1", 2900), ("S-3", 500)]
    assert poor not in found


@pytest.mark.django_db(transaction=True)
def test_simultaneous_bookings_for_the_last_animals_never_overbook():
    """Real concurrent connections (one per thread) racing for the same tank: a row lock on PostgreSQL,
    BEGIN IMMEDIATE with a busy timeout on SQLite (a file database, as in production)."""
    from colonies.roles import RESEARCHER
    users = [make_user(f"racer{i}", role=RESEARCHER) for i in range(16)]
    protocol = make_protocol()
    tank = make_stocked_tank(estimate=200, reserve=30, user=users[0], code="RACE-1")  # 170 available
    barrier = threading.Barrier(len(users))
    outcomes: dict[str, str] = {}

    def attempt(user, animals):
        try:
            barrier.wait(timeout=10)
            services.book(user=user, protocol=protocol, tank=tank, animals=animals, needed_on=today())
            outcomes[user.username] = "booked"
        except services.Refused as refusal:
            outcomes[user.username] = str(refusal)
        except Exception as error:  # pragma: no cover - reported by the assertion below
            outcomes[user.username] = f"error: {error!r}"
        finally:
            connection.close()

    threads = [threading.Thread(target=attempt, args=(u, 20 if i % 2 else 15)) for i, u in enumerate(users)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=60)
    assert len(outcomes) == len(users)
    booked = Booking.objects.active().filter(tank=tank)
    total = sum(b.animals for b in booked)
    winners = [name for name, outcome in outcomes.items() if outcome == "booked"]
    losers = {name: outcome for name, outcome in outcomes.items() if outcome != "booked"}
    assert total <= 170
    assert booked.count() == len(winners) >= 8  # at least 8 × 20 would fit: some attempts must win
    assert 170 - total < 15  # no loser was refused while enough animals were left for it
    assert losers, "more was asked for than available, so someone must lose"
    for outcome in losers.values():
        assert outcome.startswith("Tank RACE-1 has only ") and outcome.endswith("Nothing was booked."), outcome


def test_tank_page_shows_animals_drawn_since_the_estimate(client, researcher, protocol, tank):
    from django.urls import reverse

    booking = services.book(user=researcher, protocol=protocol, tank=tank, animals=40, needed_on=today())
    services.draw(user=researcher, booking=booking)
    client.force_login(researcher)
    response = client.get(reverse("colonies:tank-detail", args=[tank.code]))
    summary = response.context["summary"]
    assert ("drawn for trials", -40) in summary.movements
    assert summary.now_estimate == 960
    assert "-40 drawn for trials" in response.content.decode()
