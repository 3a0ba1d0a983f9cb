"""Writes that span several rows or models, each one transaction, and the population arithmetic.

Population of a tank
    current_population(tank) = latest current census estimate (its direct count when an old
    census has no stored estimate) − animals drawn from the tank after that census + animals
    returned to it after that census. None when the tank has never been counted. A census taken
    after a draw already reflects it, so only draws after the census are subtracted.

    Animals come back by two routes, never both for the same animal: a dish that ends "returned"
    (its animals), and a cohort that ends "returned" (the animals it never put in a dish). So a
    cohort's return is bounded by its size less the animals in its (not voided) dishes.

    available = current_population − the species' reserve (reserve_min_animals) − animals in
    active bookings on the tank not yet drawn.

Races
    Two researchers booking the last animals of a tank at the same moment: `book` and `draw` take
    a row lock on the tank (SELECT ... FOR UPDATE) inside the transaction before counting, so the
    second waits, then counts again with the first booking in place and is refused with a message.
    Under PostgreSQL's READ COMMITTED each statement after the lock sees the other's committed
    rows. SQLite has no row locks but serialises writers, and is not the multi-user database.
    `set_up_dish` and `record_trial` lock the cohort row the same way: two dishes set up at once
    cannot take more animals than the cohort holds, and two trials cannot both take a dish's last
    permitted exposure (every trial's dish belongs to the locked cohort). `claim_slot` locks the
    study row (FOR NO KEY UPDATE, which does not hold up trials being saved), so of two operators
    claiming the same slot at once one wins and the other is told to claim another; a partial unique
    constraint (one active claim per slot) backs it up. `record_trial` locks the slot's claim, so a
    manager releasing it waits for the trial.
"""
from __future__ import annotations

import hashlib
from dataclasses import dataclass
from datetime import date, datetime, timedelta
from datetime import timezone as dt_timezone

from django.core.exceptions import PermissionDenied, ValidationError
from django.db import IntegrityError, transaction
from django.db.models import DateTimeField, FloatField, IntegerField, Max, OuterRef, Subquery, Sum, Value
from django.db.models.functions import Cast, Coalesce, Greatest
from django.utils import timezone
from simple_history.utils import bulk_update_with_history

from colonies.deviations import Finding, apply_findings
from colonies.models import Census, Deviation, Signature, Split, SplitPart, Tank
from colonies.roles import MANAGER, has_role
from colonies.signatures import sign
from colonies.validators import FUTURE_LEEWAY
from vermilog.lab_time import lab_date, lab_moment

from . import allocation, blinding, limits, protocols, stimulus
from .models import (LATE_OUTCOME_FIELDS, LIGHT_KINDS, SETTING_FIELDS, UV_BELOW_NM, Attachment, Booking, Cohort,
                     Dish, Override, Protocol, SlotClaim, Stimulus, Study, Trial)


class Refused(Exception):
    """An action the records do not allow; the message is shown to the user as it is."""


class LimitRefused(Refused):
    def __init__(self, breaches: list[limits.Breach]):
        self.breaches = breaches
        hard = [b for b in breaches if not b.overridable]
        if hard:
            lead = "Refused: the protocol does not cover this trial."
        else:
            lead = "Refused: this trial would break a protocol limit. A manager may record an override with a reason."
        super().__init__(" ".join([lead] + [b.message for b in breaches]))

    @property
    def overridable(self) -> bool:
        return all(b.overridable for b in self.breaches)


# ---------------------------------------------------------------------------------------------
# Population and availability
# ---------------------------------------------------------------------------------------------
EPOCH = datetime(1970, 1, 1, tzinfo=dt_timezone.utc)


def tanks_with_availability(queryset=None, today: date | None = None):
    """Annotate the tank's newest estimate and what happened since, in one query.

    The newest estimate is the latest of: its current census, the animals that stayed at its
    latest split, and (for a tank set up by a split) the animals moved into it — the same events
    colonies.deviations.latest_estimates() uses. Then drawn_since counts cohorts drawn after that
    moment, returned_since the animals cohorts and dishes returned after it, and booked counts
    active bookings. Call `population_of(tank)` /
    `available_of(tank)` on the rows (needs species loaded).
    """
    qs = queryset if queryset is not None else Tank.objects.all()
    latest = Census.objects.current().filter(tank=OuterRef("pk")).order_by("-observed_at", "-pk")
    value = Coalesce("estimate", Cast("direct_count", FloatField()))
    split = Split.objects.current().filter(source=OuterRef("pk")).order_by("-split_at", "-pk")
    setup = (SplitPart.objects.filter(destination=OuterRef("pk"), created_tank=True, split__voided_at__isnull=True)
             .order_by("-split__split_at"))
    drawn = (Cohort.objects.filter(origin_tank=OuterRef("pk"), drawn_at__gt=OuterRef("base_at"))
             .order_by().values("origin_tank").annotate(n=Sum("size")).values("n"))
    split_in = (SplitPart.objects.filter(destination=OuterRef("pk"), created_tank=False, split__voided_at__isnull=True,
                                         split__split_at__gt=OuterRef("base_at"))
                .order_by().values("destination").annotate(n=Sum("animals")).values("n"))
    returned = (Cohort.objects.filter(returned_to=OuterRef("pk"), end=Cohort.End.RETURNED,
                                      ended_at__gt=OuterRef("base_at"))
                .order_by().values("returned_to").annotate(n=Sum("returned_count")).values("n"))
    dish_returned = (Dish.objects.current().filter(returned_to=OuterRef("pk"), end=Dish.End.RETURNED,
                                                   ended_at__gt=OuterRef("base_at"))
                     .order_by().values("returned_to").annotate(n=Sum("returned_count")).values("n"))
    # A booking past its day holds no animals, even before expire_bookings has marked it expired.
    booked = (Booking.objects.holding(today or timezone.localdate()).filter(tank=OuterRef("pk"))
              .order_by().values("tank").annotate(n=Sum("animals")).values("n"))
    zero = Value(0, output_field=IntegerField())
    epoch = Value(EPOCH, output_field=DateTimeField())
    return qs.annotate(
        census_at=Subquery(latest.values("observed_at")[:1]),
        census_estimate=Subquery(latest.annotate(v=value).values("v")[:1], output_field=FloatField()),
        split_at=Subquery(split.values("split_at")[:1]),
        split_stayed=Subquery(split.values("stayed")[:1], output_field=FloatField()),
        setup_at=Subquery(setup.values("split__split_at")[:1]),
        setup_animals=Subquery(setup.values("animals")[:1], output_field=FloatField()),
    ).annotate(
        # Greatest() with a NULL is NULL on SQLite but not on PostgreSQL: coalesce to the epoch first.
        base_at=Greatest(Coalesce("census_at", epoch), Coalesce("split_at", epoch), Coalesce("setup_at", epoch)),
    ).annotate(
        drawn_since=Coalesce(Subquery(drawn, output_field=IntegerField()), zero),
        split_in_since=Coalesce(Subquery(split_in, output_field=FloatField()), Value(0.0, output_field=FloatField())),
        returned_since=Coalesce(Subquery(returned, output_field=IntegerField()), zero)
        + Coalesce(Subquery(dish_returned, output_field=IntegerField()), zero),
        booked=Coalesce(Subquery(booked, output_field=IntegerField()), zero),
    )


def base_estimate_of(tank) -> float | None:
    """The newest of the census estimate, what stayed after a split, and a split set-up count."""
    candidates = [(at, value) for at, value in ((tank.census_at, tank.census_estimate),
                                                  (tank.split_at, tank.split_stayed),
                                                  (tank.setup_at, tank.setup_animals))
                  if at is not None and value is not None]
    return max(candidates, key=lambda c: c[0])[1] if candidates else None


def population_of(tank) -> int | None:
    base = base_estimate_of(tank)
    if base is None:
        return None
    return max(0, round(base + tank.split_in_since) - tank.drawn_since + tank.returned_since)


def available_of(tank) -> int | None:
    population = population_of(tank)
    if population is None:
        return None
    return max(0, population - tank.species.reserve_min_animals - tank.booked)


def current_population(tank) -> int | None:
    """Newest estimate (census or split) − animals drawn after it + animals returned after it (one query)."""
    return population_of(tanks_with_availability(Tank.objects.filter(pk=tank.pk)).get())


def available(tank) -> int | None:
    row = tanks_with_availability(Tank.objects.filter(pk=tank.pk).select_related("species")).get()
    return available_of(row)


def suggest_tanks(species, animals: int) -> list:
    """Active tanks of the species with at least `animals` available, most spare first (one query)."""
    rows = tanks_with_availability(Tank.objects.active().filter(species=species).select_related("room", "species"))
    out = []
    for t in rows:
        t.population = population_of(t)
        t.available = available_of(t)
        if t.available is not None and t.available >= animals:
            out.append(t)
    return sorted(out, key=lambda t: (-t.available, t.code))


# ---------------------------------------------------------------------------------------------
# Bookings
# ---------------------------------------------------------------------------------------------
def _save(obj, user, reason: str):
    obj._history_user = user
    obj._change_reason = reason
    obj.save()
    return obj


def book(*, user, protocol: Protocol, tank: Tank, animals: int, needed_on: date, purpose: str = "",
         today: date | None = None) -> Booking:
    """Book animals from a tank; refused with a message when the protocol or the numbers do not allow it."""
    today = today or timezone.localdate()
    if animals < 1:
        raise Refused(f"Animals {animals} is not possible: book at least 1.")
    if needed_on < today:
        raise Refused(f"Date {lab_date(needed_on)} is in the past; book for today or later.")
    problem = Protocol.objects.prefetch_related("allowances").get(pk=protocol.pk).problem(needed_on)
    if problem:
        raise Refused(problem)
    with transaction.atomic():
        locked = Tank.objects.select_for_update().get(pk=tank.pk)  # serialises bookings and draws on this tank
        if locked.status != Tank.Status.ACTIVE:
            raise Refused(f"Tank {locked.code} is {locked.get_status_display().lower()}; animals cannot be booked from it.")
        row = tanks_with_availability(Tank.objects.filter(pk=tank.pk).select_related("species"), today).get()
        population, free = population_of(row), available_of(row)
        if population is None:
            raise Refused(f"Tank {row.code} has no census yet, so nothing can be booked from it.")
        if animals > free:
            raise Refused(
                f"Tank {row.code} has only {free} animals available (about {population} in the tank − reserve "
                f"{row.species.reserve_min_animals} − {row.booked} already booked); you asked for {animals}. "
                f"Nothing was booked.")
        booking = Booking(protocol=protocol, tank=row, species=row.species, animals=animals, needed_on=needed_on,
                          purpose=purpose, booked_by=user)
        return _save(booking, user, "Booked")


def cancel_booking(*, user, booking: Booking, reason: str) -> Booking:
    reason = (reason or "").strip()
    if not reason:
        raise Refused("Reason: a reason is required to cancel a booking.")
    with transaction.atomic():
        booking = Booking.objects.select_for_update().get(pk=booking.pk)
        if not booking.is_active:
            raise Refused(f"Booking {booking.pk} is {booking.get_status_display().lower()}; it cannot be cancelled.")
        booking.status = Booking.Status.CANCELLED
        booking.cancelled_at, booking.cancelled_by, booking.cancel_reason = timezone.now(), user, reason
        return _save(booking, user, f"Cancelled: {reason}")


def draw(*, user, booking: Booking, count: int | None = None, at: datetime | None = None) -> Cohort:
    """The booked animals leave the tank and become a cohort.

    `at` may lie before the booking was made (the demo and imports back-date draws); the draw
    form holds typed times to booked_at..now.
    """
    now = timezone.now()
    at = at or now
    if at > now + FUTURE_LEEWAY:
        raise Refused(f"Drawn at {lab_moment(at)} is in the future; record a draw once "
                      "it has happened.")
    day = timezone.localdate(at)
    with transaction.atomic():
        Tank.objects.select_for_update().get(pk=booking.tank_id)
        booking = Booking.objects.select_for_update().select_related("protocol", "tank").get(pk=booking.pk)
        if not booking.is_active:
            raise Refused(f"Booking {booking.pk} is {booking.get_status_display().lower()}; nothing can be drawn.")
        if day > booking.needed_on:
            raise Refused(f"Booking {booking.pk} was for {lab_date(booking.needed_on)} and has expired; book again.")
        problem = booking.protocol.problem(day)
        if problem:
            raise Refused(problem)
        count = booking.animals if count is None else count
        if not 1 <= count <= booking.animals:
            raise Refused(f"Animals drawn {count} is not possible: allowed range 1–{booking.animals} (the booking).")
        booking.status = Booking.Status.DRAWN
        _save(booking, user, "Drawn")
        cohort = Cohort(booking=booking, protocol=booking.protocol, origin_tank=booking.tank, size=count,
                        drawn_at=at, drawn_by=user)
        return _save(cohort, user, f"Drawn from {booking.tank.code}")


def expire_bookings(today: date | None = None, *, dry_run: bool = False) -> int:
    """Bookings still active after their day expire. Returns how many (would) expire."""
    today = today or timezone.localdate()
    stale = list(Booking.objects.active().filter(needed_on__lt=today))
    if dry_run or not stale:
        return len(stale)
    for b in stale:
        b.status = Booking.Status.EXPIRED
    with transaction.atomic():
        bulk_update_with_history(stale, Booking, ["status"], default_change_reason="Expired: not drawn by its date")
    return len(stale)


# ---------------------------------------------------------------------------------------------
# Cohorts and dishes
# ---------------------------------------------------------------------------------------------
def _set_end(row, *, user, end: str, returned_to: Tank | None, returned_count: int | None, method: str, note: str,
             at: datetime, species_id: int, most: int, most_text: str) -> None:
    """Validate and set the end fields shared by cohorts and dishes (the caller holds the locks).

    `most` is how many animals the row can return alive, `most_text` says what they are."""
    if end not in type(row).End.values:
        choices = ", ".join(f"'{label}'" for label in type(row).End.labels)
        raise Refused(f"End: '{end}' is not one of {choices}.")
    if end == Cohort.End.RETURNED:
        if returned_to is None or returned_count is None:
            raise Refused("Returned to / Animals returned: give the tank and the number of animals put back.")
        if not 0 <= returned_count <= most:
            raise Refused(f"Animals returned {returned_count} is not possible: allowed range 0–{most} ({most_text}).")
        if returned_to.species_id != species_id:
            raise Refused(f"Returned to: tank {returned_to.code} holds another species; animals go back to a tank "
                          "of their own.")
        if returned_to.status == Tank.Status.RETIRED:
            raise Refused(f"Returned to: tank {returned_to.code} is retired.")
        row.returned_to, row.returned_count = returned_to, returned_count
    elif end == Cohort.End.RETIRED:
        if not method.strip():
            raise Refused("Retired: say which method was used.")
    row.end, row.ended_at, row.ended_by = end, at, user
    row.end_method, row.end_note = method.strip(), note.strip()


def animals_in_dishes(cohort: Cohort) -> int:
    """Animals of the cohort put in dishes that were not voided (one query)."""
    return cohort.dishes.current().aggregate(n=Sum("animals"))["n"] or 0


def end_cohort(*, user, cohort: Cohort, end: str, returned_to: Tank | None = None, returned_count: int | None = None,
               method: str = "", note: str = "", at: datetime | None = None) -> Cohort:
    """The end of the cohort's animals that were never put in a dish; every dish must have ended first
    (each dish's animals have their own end, so none is counted twice)."""
    at = at or timezone.now()
    with transaction.atomic():
        if end == Cohort.End.RETURNED and returned_to is not None:
            Tank.objects.select_for_update().get(pk=returned_to.pk)
        cohort = Cohort.objects.select_for_update().select_related("origin_tank").get(pk=cohort.pk)
        if not cohort.is_active:
            raise Refused(f"Cohort {cohort.label} has already ended ({cohort.get_end_display().lower()}).")
        open_dishes = [d.label for d in cohort.dishes.open().order_by("number")]
        if open_dishes:
            raise Refused(f"Cohort {cohort.label} still has {len(open_dishes)} open dish"
                          f"{'es' if len(open_dishes) > 1 else ''} ({', '.join(open_dishes)}): record each dish's end "
                          "first. Nothing was changed.")
        if at < cohort.drawn_at:
            raise Refused(f"End time {lab_moment(at)} is before the cohort was drawn "
                          f"({lab_moment(cohort.drawn_at)}).")
        free = cohort.size - animals_in_dishes(cohort)
        if free == 0 and end != Cohort.End.IN_DISHES:
            raise Refused(f"End: all {cohort.size} animals of cohort {cohort.label} went into dishes, and each dish "
                          f"has recorded its end: choose '{Cohort.End.IN_DISHES.label}'.")
        if free and end == Cohort.End.IN_DISHES:
            raise Refused(f"End: {free} animal{'s' if free > 1 else ''} of cohort {cohort.label} never went into a "
                          "dish: say what became of them (returned to a tank, retired or died).")
        _set_end(cohort, user=user, end=end, returned_to=returned_to, returned_count=returned_count, method=method,
                 note=note, at=at, species_id=cohort.origin_tank.species_id, most=free,
                 most_text="the cohort's animals never put in a dish")
        return _save(cohort, user, f"Ended: {cohort.get_end_display()}")


def _set_up_dish(*, user, cohort: Cohort, animals, at: datetime, now: datetime) -> Dish:
    """A new dish from `cohort`, which the caller has locked (SELECT ... FOR UPDATE)."""
    if not cohort.is_active:
        raise Refused(f"Cohort {cohort.label} has ended ({cohort.get_end_display().lower()}); no dish can be set up "
                      "from it.")
    free = cohort.size - animals_in_dishes(cohort)
    if free < 1:
        raise Refused(f"Animals in the dish {animals} is not possible: all {cohort.size} animals of cohort "
                      f"{cohort.label} are in dishes already. Nothing was set up.")
    if not 1 <= animals <= free:
        raise Refused(f"Animals in the dish {animals} is not possible: allowed range 1–{free} (the animals of cohort "
                      f"{cohort.label} not in a dish yet, of {cohort.size} drawn). Nothing was set up.")
    if at < cohort.drawn_at.replace(second=0, microsecond=0):  # forms record whole minutes
        raise Refused(f"Set up at {lab_moment(at)} is before cohort {cohort.label} was drawn "
                      f"({lab_moment(cohort.drawn_at)}).")
    if at > now + FUTURE_LEEWAY:
        raise Refused(f"Set up at {lab_moment(at)} is in the future; record a dish once it is set up.")
    # Numbers are never reused, voided dishes included, so a label always means one group of animals.
    number = (cohort.dishes.aggregate(n=Max("number"))["n"] or 0) + 1
    dish = Dish(cohort=cohort, number=number, animals=animals, set_up_at=at, set_up_by=user)
    return _save(dish, user, f"Set up with {animals} animals from cohort {cohort.label}")


def set_up_dish(*, user, cohort: Cohort, animals: int, at: datetime | None = None,
                now: datetime | None = None) -> Dish:
    """Put `animals` of the cohort in a new dish; refused when the cohort has fewer left outside its dishes."""
    now = now or timezone.now()
    with transaction.atomic():
        cohort = Cohort.objects.select_for_update().get(pk=cohort.pk)
        return _set_up_dish(user=user, cohort=cohort, animals=animals, at=at or now, now=now)


def _locked_dish(dish: Dish) -> Dish:
    """The dish with its cohort row locked first (the lock order of record_trial: cohort, then dish)."""
    cohort = Cohort.objects.select_for_update().select_related("origin_tank").get(pk=dish.cohort_id)
    dish = Dish.objects.select_for_update().get(pk=dish.pk)
    dish.cohort = cohort
    return dish


def end_dish(*, user, dish: Dish, end: str, returned_to: Tank | None = None, returned_count: int | None = None,
             method: str = "", note: str = "", at: datetime | None = None, now: datetime | None = None) -> Dish:
    """The end of a dish's animals: returned to a tank (they count in its population from `at`), retired
    or died. After it the dish takes no more trials."""
    now = now or timezone.now()
    at = at or now
    with transaction.atomic():
        if end == Cohort.End.RETURNED and returned_to is not None:
            Tank.objects.select_for_update().get(pk=returned_to.pk)
        dish = _locked_dish(dish)
        if dish.is_voided:
            raise Refused(f"Dish {dish.label} is voided; it has no animals to end.")
        if dish.end:
            raise Refused(f"Dish {dish.label} has already ended ({dish.get_end_display().lower()}).")
        last_run = dish.trials.counting().aggregate(last=Max("run_at"))["last"]
        earliest = max(dish.set_up_at, last_run) if last_run else dish.set_up_at
        if at < earliest.replace(second=0, microsecond=0):
            what = (f"the last trial on dish {dish.label} ran" if last_run and last_run >= dish.set_up_at
                    else f"dish {dish.label} was set up")
            raise Refused(f"End time {lab_moment(at)} is before {what} ({lab_moment(earliest)}).")
        if at > now + FUTURE_LEEWAY:
            raise Refused(f"End time {lab_moment(at)} is in the future; record the end once it has happened.")
        _set_end(dish, user=user, end=end, returned_to=returned_to, returned_count=returned_count, method=method,
                 note=note, at=at, species_id=dish.cohort.origin_tank.species_id, most=dish.animals,
                 most_text="the animals put in the dish")
        return _save(dish, user, f"Ended: {dish.get_end_display()}")


def void_dish(*, user, dish: Dish, reason: str) -> Dish:
    """A dish set up in error (no trial ran on it): its animals count as the cohort's again."""
    reason = (reason or "").strip()
    if not reason:
        raise Refused("Reason: a reason is required to void a dish.")
    with transaction.atomic():
        dish = _locked_dish(dish)
        n = dish.trials.counting().count()
        if n:
            raise Refused(f"Dish {dish.label} has {n} trial{'s' if n > 1 else ''}: its animals were exposed, so it "
                          "cannot be voided; record its end instead.")
        if dish.end:
            raise Refused(f"Dish {dish.label} has ended ({dish.get_end_display().lower()}); it cannot be voided.")
        try:
            dish.void(user=user, reason=reason)
        except ValueError as error:
            raise Refused(str(error)) from None
        return dish


def dish_state(dish: Dish, at: datetime, *, exclude_trial: int | None = None) -> limits.GroupState:
    """The dish's exposures as the limit checker needs them (one query; `dish.cohort` loaded).

    Animals alive = animals put in the dish less the deaths recorded 24 h after its trials (each
    trial's count is of its own arena, so they add up)."""
    trials = dish.trials.counting()
    if exclude_trial:
        trials = trials.exclude(pk=exclude_trial)
    rows = list(trials.values_list("run_at", "dose_mj_cm2", "mortality_24h"))
    before = [r for r, _, _ in rows if r <= at]
    after = [r for r, _, _ in rows if r > at]
    return limits.GroupState(
        label=dish.label, animals=max(0, dish.animals - sum(m or 0 for _, _, m in rows)),
        ended=not dish.is_open or not dish.cohort.is_active, exposures=len(rows),
        last_exposure_at=max(before) if before else None,
        next_exposure_at=min(after) if after else None,
        cumulative_dose_mj_cm2=sum(d or 0.0 for _, d, _ in rows),
    )


# ---------------------------------------------------------------------------------------------
# Studies
# ---------------------------------------------------------------------------------------------
def may_change_study(user, study: Study) -> bool:
    """The study's owner and managers add trials, correct scores and attach files."""
    return user.pk == study.owner_id or has_role(user, MANAGER)


def require_study_owner(user, study: Study, action: str) -> None:
    if not may_change_study(user, study):
        raise PermissionDenied(f"Only the study's owner ({study.owner.get_username()}) or a manager may {action} "
                               f"in study {study.code}.")


def create_study(*, user, code: str, title: str, protocol: Protocol, conditions: list[str], replicates: int,
                 method: str, seed: int, reference_condition: str = "", blinded: bool = True,
                 observation_window_s: int = 600, question: str = "", exclusion_criteria: str = "",
                 scorer_not_operator: bool = False) -> Study:
    """The study and its realised allocation, written together.

    With two or more conditions the reference condition (the one the others are compared with) is
    required and must be one of them: ValidationError naming the field and the allowed values.
    """
    plan = allocation.allocate(conditions, replicates, method, seed)
    study = Study(code=code, title=title, owner=user, protocol=protocol, conditions=[c.strip() for c in conditions],
                  reference_condition=(reference_condition or "").strip(),
                  replicates=replicates, method=method, seed=seed, generator=allocation.GENERATOR,
                  allocated_at=timezone.now(), allocation=plan, blinded=blinded, scorer_not_operator=scorer_not_operator,
                  observation_window_s=observation_window_s, question=question, exclusion_criteria=exclusion_criteria)
    problem = study.reference_problem()
    if problem:
        raise ValidationError({"reference_condition": problem})
    with transaction.atomic():
        return _save(study, user, "Study created and allocation generated")


def may_unblind(user, study: Study) -> bool:
    """The owner, when the trials are done; a manager who must see (a welfare question, say), with a reason."""
    return user.pk == study.owner_id or has_role(user, MANAGER)


def unblind(*, user, study: Study, reason: str, password: str, at: datetime | None = None) -> Study:
    """The owner or a manager unblinds, with a reason kept in the history and their signature
    (password re-entered; meaning "unblinded (outcomes locked)"); outcomes are locked first
    (unblinding never precedes the lock), except the late ones (LATE_OUTCOME_FIELDS)."""
    reason = (reason or "").strip()
    if not may_unblind(user, study):
        raise PermissionDenied("Only the study's owner or a manager may unblind it.")
    if not reason:
        raise Refused("Reason: a reason is required to unblind a study.")
    with transaction.atomic():
        study = Study.objects.select_for_update().get(pk=study.pk)
        if not study.is_blind:
            raise Refused(f"Study {study.code} is not blinded or was already unblinded.")
        at = at or timezone.now()
        study.outcomes_locked_at = study.outcomes_locked_at or at
        study.unblinded_at, study.unblinded_by, study.unblind_reason = at, user, reason
        _save(study, user, f"Outcomes locked and unblinded (signed): {reason}")
        sign(user=user, password=password, meaning=Signature.Meaning.UNBLINDED, obj=study)
        return study


def lock_outcomes(*, user, study: Study, password: str, at: datetime | None = None) -> Study:
    """The owner or a manager locks the outcomes of a study that is not blinded (a blinded one is locked by
    unblinding), signed ("outcomes locked"): no trials, scores or exclusions after it; late outcomes
    (LATE_OUTCOME_FIELDS) stay recordable, as after unblinding."""
    if not may_unblind(user, study):
        raise PermissionDenied("Only the study's owner or a manager may lock its outcomes.")
    with transaction.atomic():
        study = Study.objects.select_for_update().get(pk=study.pk)
        if study.is_locked:
            raise Refused(f"Study {study.code} has locked outcomes already.")
        if study.is_blind:
            raise Refused(f"Study {study.code} is blinded: its outcomes are locked when it is unblinded.")
        study.outcomes_locked_at = at or timezone.now()
        _save(study, user, "Outcomes locked (signed)")
        sign(user=user, password=password, meaning=Signature.Meaning.LOCKED, obj=study)
        return study


# ---------------------------------------------------------------------------------------------
# Claims: "I will run slot N"
# ---------------------------------------------------------------------------------------------
def _slot_name(study: Study, slot: int) -> str:
    entry = study.slot(slot)
    return f"Slot {slot} ({entry['code']})" if entry else f"Slot {slot}"


def claim_slot(*, user, study: Study, slot: int, now: datetime | None = None) -> SlotClaim:
    """`user` will run `slot`: from now on only they see its condition and may record its trial.

    Claiming a slot one already holds returns that claim. Refused when the slot does not exist,
    has its trial, or is held by someone else (claim another open slot).
    """
    require_study_owner(user, study, "claim slots")
    now = now or timezone.now()
    with transaction.atomic():
        # Serialises claims on this study. NO KEY UPDATE (PostgreSQL): trials being saved meanwhile take a key-share
        # lock on the study for their foreign key, which this does not block.
        study = Study.objects.select_for_update(no_key=True).get(pk=study.pk)
        if study.slot(slot) is None:
            raise Refused(f"Slot {slot} is not in the allocation of study {study.code} (1–{len(study.allocation)}).")
        if study.is_locked:
            raise Refused(f"Study {study.code} has locked outcomes; no more trials can be run.")
        if study.trials.counting().filter(slot=slot).exists():
            raise Refused(f"{_slot_name(study, slot)} of study {study.code} already has a trial.")
        held = SlotClaim.objects.active().filter(study=study, slot=slot).select_related("claimed_by").first()
        if held is not None and held.claimed_by_id == user.pk:
            return held
        if held is not None:
            raise _claimed_by_another(study, held)
        claim = SlotClaim(study=study, slot=slot, claimed_by=user, claimed_at=now)
        try:
            with transaction.atomic():
                _save(claim, user, "Slot claimed")
        except IntegrityError:  # the constraint caught a claim the lock did not (a database without row locks)
            held = SlotClaim.objects.active().filter(study=study, slot=slot).select_related("claimed_by").first()
            raise _claimed_by_another(study, held) from None
        return claim


def _claimed_by_another(study: Study, held: SlotClaim | None) -> Refused:
    who = f"by {held.claimed_by.get_username()} at {lab_moment(held.claimed_at)}" if held else "by someone else"
    return Refused(f"{_slot_name(study, held.slot if held else 0)} of study {study.code} was claimed {who}; "
                   "claim another open slot.")


def may_release_claim(user, claim: SlotClaim) -> bool:
    return claim.claimed_by_id == user.pk or has_role(user, MANAGER)


def release_claim(*, user, claim: SlotClaim, reason: str, now: datetime | None = None) -> SlotClaim:
    """A stale claim (the operator is away, the dish could not be run) is released with a reason; the slot is open
    again. A claim whose trial has been recorded stays: it is the record of who ran the slot."""
    reason = (reason or "").strip()
    if not may_release_claim(user, claim):
        raise PermissionDenied("Only a manager or the operator who claimed the slot may release the claim.")
    if not reason:
        raise Refused("Reason: a reason is required to release a claim.")
    with transaction.atomic():
        study = Study.objects.select_for_update(no_key=True).get(pk=claim.study_id)
        claim = SlotClaim.objects.select_for_update().get(pk=claim.pk)
        if not claim.is_active:
            raise Refused(f"{_slot_name(study, claim.slot)} of study {study.code} is not claimed any more.")
        if study.trials.counting().filter(slot=claim.slot).exists():
            raise Refused(f"{_slot_name(study, claim.slot)} of study {study.code} has its trial; the claim stays as "
                          "the record of who ran it.")
        claim.released_at, claim.released_by, claim.release_reason = now or timezone.now(), user, reason
        return _save(claim, user, f"Claim released: {reason}")


# ---------------------------------------------------------------------------------------------
# Trials
# ---------------------------------------------------------------------------------------------
OUTCOME_FIELDS = ("aggregate_s", "disperse_s", "censored", "clusters", "mortality_24h")
MAIN_OUTCOME_FIELDS = tuple(name for name in OUTCOME_FIELDS if name not in LATE_OUTCOME_FIELDS)


def derive(trial: Trial) -> Trial:
    """Fill the derived stimulus values from the settings; clear settings of other stimulus types."""
    for name, kinds in SETTING_FIELDS.items():
        if trial.kind not in kinds:
            setattr(trial, name, None)
    if trial.kind != Stimulus.CHEMICAL:
        trial.substance = ""
    if trial.kind != Stimulus.MECHANICAL:
        trial.mechanical_note = ""
    trial.dose_mj_cm2 = stimulus.light_dose_mj_cm2(trial.irradiance_mw_cm2, trial.duration_s) \
        if trial.kind in LIGHT_KINDS else None
    trial.field_v_cm = stimulus.field_strength_v_cm(trial.voltage_v, trial.electrode_gap_cm)
    try:
        train = stimulus.pulse_train(trial.pulse_width_ms, trial.pulse_count, trial.pulse_frequency_hz)
    except ValueError as error:
        raise ValidationError({"pulse_width_ms": str(error)}) from None
    trial.pulse_on_s, trial.train_s = train.on_s, train.train_s
    return trial


def normalise_outcome(trial: Trial) -> None:
    """Censored means still clumped at the end of the window: the dispersal time is the window."""
    if trial.censored:
        trial.disperse_s = float(trial.observation_window_s)


def _check_order(trial: Trial, cohort: Cohort, now: datetime) -> None:
    if trial.run_at < cohort.drawn_at.replace(second=0, microsecond=0):  # forms record whole minutes
        raise ValidationError({"run_at": f"Run at {lab_moment(trial.run_at)} is before cohort "
                                         f"{cohort.label} was drawn ({lab_moment(cohort.drawn_at)})."})
    if trial.run_at > now + FUTURE_LEEWAY:
        raise ValidationError({"run_at": "Run at is in the future; record a trial once it has run."})
    if trial.mortality_24h is not None and now < trial.run_at + timedelta(hours=24):
        raise ValidationError({"mortality_24h": "Mortality at 24 h can only be recorded from 24 h after the trial ran."})


def _check_light_is_visible(trial: Trial) -> None:
    # A "light" trial is checked against the visible-light allowance; UV must meet the UV one.
    if trial.kind == Stimulus.LIGHT and trial.wavelength_nm is not None and trial.wavelength_nm < UV_BELOW_NM:
        raise ValidationError({"wavelength_nm": f"Wavelength {trial.wavelength_nm:g} nm is ultraviolet, not visible "
                                                f"light (visible: {UV_BELOW_NM} nm and above). Use the stimulus type "
                                                f"'{Stimulus.UV.label}'."})


@dataclass
class TrialResult:
    trial: Trial
    override: Override | None = None
    deviation: Deviation | None = None


def record_trial(*, user, study: Study, slot: int, values: dict, dish: Dish | None = None,
                 cohort: Cohort | None = None, dish_animals: int | None = None, override_reason: str = "",
                 now: datetime | None = None) -> TrialResult:
    """Save a trial if the protocol allows it; a manager's override with a reason opens a deviation.

    The animals are an open `dish`, or a new dish set up from `cohort` in the same step with
    `dish_animals` animals (default: the trial's animals); a refused trial sets up no dish.
    `values` are arena, stimulus and (optionally) outcome fields. Raises ValidationError for
    impossible or out-of-order values, Refused when the cohort cannot feed the dish, and
    LimitRefused when a protocol limit stands in the way.
    """
    now = now or timezone.now()
    override_reason = (override_reason or "").strip()
    if (dish is None) == (cohort is None):
        raise Refused("Dish: choose an open dish, or a cohort to set up a new dish from (not both).")
    require_study_owner(user, study, "add trials")
    if study.scorer_not_operator and any(values.get(name) not in (None, False) for name in OUTCOME_FIELDS):
        field = next(name for name in OUTCOME_FIELDS if values.get(name) not in (None, False))
        raise ValidationError({field: f"Study {study.code} requires that the scorer is not the operator: leave the "
                                      "outcomes empty and have another person score the trial."})
    with transaction.atomic():
        # The cohort row is the lock for its dishes' animals and exposures (see Races above).
        cohort = Cohort.objects.select_for_update().select_related("origin_tank").get(
            pk=cohort.pk if cohort is not None else dish.cohort_id)
        protocol = Protocol.objects.prefetch_related("allowances").get(pk=cohort.protocol_id)
        if study.protocol_id != protocol.pk:
            raise Refused(f"Cohort {cohort.label} was drawn under protocol {protocol.reference}, but study "
                          f"{study.code} runs under {study.protocol.reference}.")
        entry = study.slot(slot)
        if entry is None:
            raise Refused(f"Slot {slot} is not in the allocation of study {study.code} (1–{len(study.allocation)}).")
        if study.trials.counting().filter(slot=slot).exists():
            raise Refused(f"Slot {slot} ({entry['code']}) of study {study.code} already has a trial.")
        if study.is_locked:
            raise Refused(f"Study {study.code} has locked outcomes; no more trials can be added.")
        _require_claim(user, study, slot)
        trial = Trial(study=study, slot=slot, code=entry["code"], condition=entry["condition"],
                      replicate=entry["replicate"], cohort=cohort, protocol=protocol, run_by=user,
                      observation_window_s=study.observation_window_s, **values)
        derive(trial)
        _check_light_is_visible(trial)
        normalise_outcome(trial)
        if trial.disperse_s is not None:
            trial.scored_at, trial.scored_by = now, user
        for name in LATE_OUTCOME_FIELDS:
            if getattr(trial, name) is not None:
                setattr(trial, f"{name}_entered_at", now)
        _check_order(trial, cohort, now)
        trial.full_clean(exclude=["dish"])
        if dish is None:
            dish = _set_up_dish(user=user, cohort=cohort, now=now, at=trial.run_at,
                                animals=trial.animals if dish_animals is None else dish_animals)
        else:
            dish = Dish.objects.select_for_update().get(pk=dish.pk)
            if trial.run_at < dish.set_up_at.replace(second=0, microsecond=0):
                raise ValidationError({"run_at": f"Run at {lab_moment(trial.run_at)} is before dish {dish.label} was "
                                                 f"set up ({lab_moment(dish.set_up_at)})."})
        dish.cohort = cohort
        trial.dish = dish
        # The terms in force when the trial ran (experiments/protocols.py), not necessarily the newest.
        trial.protocol_version = protocols.version_at(protocol, trial.run_at)
        proposal = limits.Proposal(at=trial.run_at, animals=trial.animals, kind=trial.kind,
                                   settings=trial.settings(), substance=trial.substance)
        breaches = limits.check_exposure(trial.protocol_version.terms(protocol), dish_state(dish, trial.run_at),
                                         proposal, timezone.localdate(trial.run_at))
        if breaches and (not all(b.overridable for b in breaches) or not override_reason):
            raise LimitRefused(breaches)
        if breaches and not has_role(user, MANAGER):
            raise PermissionDenied("Only a manager may override a protocol limit.")
        _save(trial, user, "Trial recorded" + (" with a manager's override" if breaches else ""))
        if not breaches:
            return TrialResult(trial)
        override = Override(trial=trial, cohort=cohort, protocol=protocol, reason=override_reason,
                            breaches=[b.message for b in breaches], recorded_by=user, recorded_at=now)
        _save(override, user, "Override recorded")
        deviation = _open_deviation(override, breaches, now, user)
        override.deviation = deviation
        _save(override, user, "Deviation linked")
        return TrialResult(trial, override, deviation)


def _require_claim(user, study: Study, slot: int) -> None:
    """The slot is `user`'s; the claim row stays locked to the end of the transaction, so a release waits."""
    claim = SlotClaim.objects.select_for_update().active().filter(study=study, slot=slot).first()
    if claim is None:
        raise Refused(f"{_slot_name(study, slot)} of study {study.code} is not claimed: claim it first (\"I will run "
                      f"slot {slot}\"); its condition is shown to the operator who claims it.")
    if claim.claimed_by_id != user.pk:
        raise _claimed_by_another(study, claim)


def _open_deviation(override: Override, breaches: list[limits.Breach], now: datetime, user) -> Deviation:
    cohort = override.cohort
    severity = Deviation.Severity.MODERATE
    for b in breaches:
        if b.value is not None and b.allowed and b.limit != "rest" and b.value > 1.5 * b.allowed:
            severity = Deviation.Severity.MAJOR
        if b.limit == "rest" and b.value is not None and b.allowed and b.value < 0.5 * b.allowed:
            severity = Deviation.Severity.MAJOR
    details = [b.message for b in breaches]
    reason = override.reason
    study = override.trial.study
    if study.is_blind:
        # Deviations are read by every role; values such as a dose would reveal the blinded condition.
        # The limit's name too, unless it holds for any stimulus (rest, exposures): a dose limit says "light".
        details = [f"{blinding.neutral_limit(b.limit)} (values hidden while study {study.code} is blinded)"
                   for b in breaches]
        reason = f"hidden while study {study.code} is blinded; see the trial after unblinding"
    dish = override.trial.dish
    summary = (f"Protocol {override.protocol.reference} limit overridden for dish {dish.label} (cohort {cohort.label}): "
               + "; ".join(details))
    finding = Finding(
        tank_id=cohort.origin_tank_id, rule=Deviation.Rule.PROTOCOL_LIMIT, severity=severity, summary=summary,
        evidence={"ref": f"trial:{override.trial_id}", "trial": override.trial_id, "override": override.pk,
                  "dish": dish.label,
                  "protocol": override.protocol.reference,
                  "limits": [blinding.neutral_limit(b.limit) if study.is_blind else b.limit for b in breaches],
                  "breaches": details, "reason": reason,
                  "manager": user.get_username(), "at": timezone.localtime(now).strftime("%Y-%m-%d %H:%M")},
        at=now, subject=dish.subject,  # the group of animals the limits count
    )
    apply_findings([finding], now=now, user=user)
    return Deviation.objects.unresolved().get(tank_id=cohort.origin_tank_id, rule=Deviation.Rule.PROTOCOL_LIMIT,
                                              parameter="", subject=dish.subject)


@dataclass
class OutcomeChanges:
    """What a scoring would change: main outcomes, late outcomes entered for the first time, late ones corrected."""
    main: list[str]
    late_new: list[str]
    late_changed: list[str]

    @property
    def late_only(self) -> bool:
        """Only late outcomes change (the 24 h count entered the day after scoring, or after unblinding)."""
        return not self.main and bool(self.late_new or self.late_changed)


def outcome_changes(trial: Trial, values: dict) -> OutcomeChanges:
    after = {name: values[name] for name in OUTCOME_FIELDS if name in values}
    if after.get("censored"):
        after["disperse_s"] = float(trial.observation_window_s)  # as normalise_outcome will
    main = [n for n in MAIN_OUTCOME_FIELDS if n in after and after[n] != getattr(trial, n)]
    late_new = [n for n in LATE_OUTCOME_FIELDS if after.get(n) is not None and getattr(trial, n) is None]
    late_changed = [n for n in LATE_OUTCOME_FIELDS
                    if n in after and getattr(trial, n) is not None and after[n] != getattr(trial, n)]
    return OutcomeChanges(main, late_new, late_changed)


def is_correction(trial: Trial, changes: OutcomeChanges) -> bool:
    """Resubmitting a scored trial or changing a late count already recorded needs a reason; entering a late
    count for the first time (the 24 h count the day after scoring) does not."""
    first_late_entry = changes.late_new and not changes.main and not changes.late_changed
    return bool((trial.is_scored and not first_late_entry) or changes.late_changed)


def score_trial(*, user, trial: Trial, values: dict, reason: str = "", now: datetime | None = None,
                source_note: str = "") -> Trial:
    """Enter or correct the outcomes (blinded scorers see only the code); a correction needs a reason.

    Once the study is unblinded its outcomes are locked, except the late ones (LATE_OUTCOME_FIELDS,
    the 24 h count): they stay recordable, and each one entered then is marked as entered after
    unblinding, with its time. `source_note` says where the values came from (e.g. an image
    measurement) in the history.
    """
    now = now or timezone.now()
    reason = (reason or "").strip()
    with transaction.atomic():
        # Only the trial row is locked (of=self): locking its study and cohort too could deadlock with a trial
        # being recorded on the same cohort (record_trial holds the cohort and needs a key-share lock on the study).
        trial = Trial.objects.select_for_update(of=("self",)).select_related("study", "cohort").get(pk=trial.pk)
        study = trial.study
        if trial.is_voided:
            raise Refused(f"{trial} is voided.")
        changes = outcome_changes(trial, values)
        if study.is_locked and not changes.late_only:
            raise Refused(f"Study {study.code} has locked outcomes; scores can no longer change. Only late outcomes "
                          f"({late_outcome_labels()}) can still be entered, marked as entered after unblinding.")
        if study.scorer_not_operator and trial.run_by_id == user.pk:
            raise PermissionDenied(f"Scorer: you ran {trial.code}, and study {study.code} requires that the "
                                   "scorer is not the operator; another person scores it.")
        correcting = is_correction(trial, changes)
        if correcting or trial.is_scored:
            require_study_owner(user, study, "correct scores")
        if correcting and not reason:
            raise Refused(f"{trial} is already scored: give a reason to correct the score.")
        for name in changes.main + changes.late_new + changes.late_changed:
            setattr(trial, name, values[name])
        normalise_outcome(trial)
        _check_order(trial, trial.cohort, now)
        trial.full_clean()
        if not changes.late_only:
            trial.scored_at, trial.scored_by = now, user
        after_unblinding = study.unblinded_at is not None
        for name in changes.late_new + changes.late_changed:
            setattr(trial, f"{name}_entered_at", now)
            setattr(trial, f"{name}_after_unblinding", after_unblinding)
        what = "Outcome corrected" if correcting else ("Late outcome entered" if changes.late_only else "Outcome scored")
        if after_unblinding and (changes.late_new or changes.late_changed):
            what += " after unblinding"
        if source_note:
            what += f" ({source_note})"
        return _save(trial, user, f"{what}: {reason}" if reason else what)


def late_outcome_labels() -> str:
    return ", ".join(label.lower() for label in LATE_OUTCOME_FIELDS.values())


def exclude_trial(*, user, trial: Trial, reason: str) -> Trial:
    reason = (reason or "").strip()
    if not reason:
        raise Refused("Reason: a reason is required to exclude a trial.")
    if trial.is_excluded:
        raise Refused(f"{trial} is already excluded.")
    if trial.study.is_locked:
        raise Refused(f"Study {trial.study.code} has locked outcomes; exclusions can no longer change.")
    trial.excluded_at, trial.excluded_by, trial.exclusion_reason = timezone.now(), user, reason
    with transaction.atomic():
        return _save(trial, user, f"Excluded: {reason}")


def void_trial(*, user, trial: Trial, reason: str) -> Trial:
    """A trial entered in error (wrong study, never ran): hidden from analyses and from exposure counts."""
    if not (reason or "").strip():
        raise Refused("Reason: a reason is required to void a trial.")
    if trial.study.is_locked:
        raise Refused(f"Study {trial.study.code} has locked outcomes; trials can no longer be voided.")
    if hasattr(trial, "override"):
        raise Refused(f"{trial} carries a manager's override; it cannot be voided.")
    try:
        with transaction.atomic():
            trial.void(user=user, reason=reason)
    except ValueError as error:
        raise Refused(str(error)) from None
    return trial


def add_attachment(*, user, trial: Trial, upload, kind: str, caption: str = "") -> Attachment:
    """Store a photo or video with the SHA-256 of the bytes as received.

    Only the study's owner or a manager attaches; never to a voided trial or a study with locked
    outcomes (checked on the locked trial row, so a void at the same moment cannot slip past).
    """
    require_study_owner(user, trial.study, "attach files")
    digest = hashlib.sha256()
    size = 0
    for chunk in upload.chunks():
        digest.update(chunk)
        size += len(chunk)
    upload.seek(0)
    with transaction.atomic():
        trial = Trial.objects.select_for_update().select_related("study").get(pk=trial.pk)
        if trial.is_voided:
            raise Refused(f"File: {trial} is voided; nothing can be attached to a voided trial.")
        if trial.study.is_locked:
            raise Refused(f"File: study {trial.study.code} has locked outcomes; no more files can be attached.")
        attachment = Attachment(trial=trial, file=upload, name=upload.name[:200], kind=kind, caption=caption,
                                sha256=digest.hexdigest(), size_bytes=size, uploaded_by=user)
        return _save(attachment, user, "Attachment added")


def file_checksum(attachment: Attachment) -> str:
    digest = hashlib.sha256()
    with attachment.file.open("rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 16), b""):
            digest.update(chunk)
    return digest.hexdigest()


def cohort_movements(tank_id: int, since: datetime) -> list[tuple[str, int]]:
    """For the tank page: animals drawn from the tank for trials and returned to it after `since`, by
    cohorts (animals never put in a dish) and by dishes (one query)."""
    drawn = (Cohort.objects.filter(origin_tank_id=tank_id, drawn_at__gt=since)
             .order_by().values("origin_tank").annotate(n=Sum("size")).values("n"))
    returned = (Cohort.objects.filter(returned_to_id=tank_id, end=Cohort.End.RETURNED, ended_at__gt=since)
                .order_by().values("returned_to").annotate(n=Sum("returned_count")).values("n"))
    dish_returned = (Dish.objects.current().filter(returned_to_id=tank_id, end=Dish.End.RETURNED, ended_at__gt=since)
                     .order_by().values("returned_to").annotate(n=Sum("returned_count")).values("n"))
    totals = Tank.objects.filter(pk=tank_id).annotate(
        drawn=Subquery(drawn, output_field=IntegerField()),
        returned=Subquery(returned, output_field=IntegerField()),
        dish_returned=Subquery(dish_returned, output_field=IntegerField()),
    ).values("drawn", "returned", "dish_returned").first() or {}
    back = (totals.get("returned") or 0) + (totals.get("dish_returned") or 0)
    return [("drawn for trials", -(totals.get("drawn") or 0)), ("returned from trials", back)]
