"""Writes that span several rows or models. Each is one transaction: all or nothing."""
import math
from dataclasses import dataclass

from django.core.exceptions import ValidationError
from django.db import transaction
from django.utils import timezone
from simple_history.utils import bulk_create_with_history

from . import deviations, parameters, population
from .flags import flags_for
from .models import Census, Check, DeadRemoval, Feeding, Split, SplitPart, Tank, WaterChange
from .validators import check_moment

OBSERVATION_FIELDS = ("activity", "clumping", "dead_removed", "surface_film", "odour", "clarity", "note",
                      "corrective_action")


def _build_check(tank, row: dict, *, user, observed_at) -> Check:
    readings = {key: row.get(key) for key in parameters.KEYS if key in row}
    check = Check(tank=tank, recorded_by=user, observed_at=observed_at, **readings)
    for field in OBSERVATION_FIELDS:
        if field in row and row[field] is not None:
            setattr(check, field, row[field])
    check.flags = flags_for(check.values(), tank.care_targets())
    return check


@transaction.atomic
def record_round(*, user, rows: list[tuple], observed_at=None) -> list[Check]:
    """Save one check per (tank, row) pair, all or nothing, in a fixed number of queries.

    `rows` are validated form data; tanks must come with species targets and overrides prefetched
    (Tank.objects.for_round() does that) so flagging runs no query per tank.
    """
    observed_at = observed_at or timezone.now()
    checks = [_build_check(tank, row, user=user, observed_at=observed_at) for tank, row in rows]
    if not checks:
        return []
    saved = bulk_create_with_history(
        checks, Check, default_user=user, default_change_reason="Logged on the daily round",
        default_date=timezone.now(),
    )
    deviations.evaluate_checks(saved)
    return saved


@transaction.atomic
def record_check(*, user, tank, row: dict, observed_at=None) -> Check:
    check = _build_check(tank, row, user=user, observed_at=observed_at or timezone.now())
    check._history_user = user
    check._change_reason = "Logged on the tank page"
    check.save()
    deviations.evaluate_checks([check])
    return check


@transaction.atomic
def update_check(*, user, check: Check, row: dict, reason: str) -> Check:
    """Correct a check: the earlier values stay in its history with who, when and why."""
    reason = reason.strip()
    if not reason:
        raise ValueError("A reason is required to change a record.")
    before = check.values()
    action_before = check.corrective_action
    for key in parameters.KEYS:
        if key in row:
            setattr(check, key, row[key])
    for field in OBSERVATION_FIELDS:
        if field in row and row[field] is not None:
            setattr(check, field, row[field])
    if "observed_at" in row and row["observed_at"]:
        check.observed_at = row["observed_at"]
    # Only values that changed are flagged afresh; the others keep the flag shown when they were logged.
    after = check.values()
    changed = {key for key in after if after[key] != before.get(key)}
    fresh = flags_for({key: after[key] for key in changed}, check.tank.care_targets())
    check.flags = {key: flag for key, flag in check.flags.items() if key not in changed} | fresh
    check._history_user = user
    check._change_reason = reason
    check.save()
    deviations.evaluate_checks([check])
    if check.corrective_action.strip() and check.corrective_action != action_before:
        deviations.record_action(check, user=user)  # the action reaches the deviation the value opened
    return check


def _save_simple(instance, *, user, reason: str):
    instance.recorded_by = user
    instance._history_user = user
    instance._change_reason = reason
    instance.full_clean()
    instance.save()
    return instance


@transaction.atomic
def save_reference(*, user, obj, rows=(), reason: str):
    """Save a reference-data row (species, room, tank, protocol) and its inline rows under one reason.

    The app's care-profile page and the back office both save through here, so a change made in
    either place records the same who and why. The caller's forms validate the values (and show
    their errors); the database constraints back them up, and the transaction keeps it all or nothing.
    """
    reason = (reason or "").strip()
    if not reason:
        raise ValidationError({"reason": "Reason: please say why; it is kept in the history."})
    for row in (obj, *rows):
        row._history_user = user
        row._change_reason = reason
        row.save()
    return obj


@transaction.atomic
def record_feeding(*, user, feeding: Feeding) -> Feeding:
    return _save_simple(feeding, user=user, reason="Feeding logged")


@transaction.atomic
def record_water_change(*, user, change: WaterChange) -> WaterChange:
    return _save_simple(change, user=user, reason="Water change logged")


# The history's reason for a record saved from the many-tanks screen (colonies/batch_views.py).
BATCH_REASONS = {Feeding: "Feeding logged for several tanks", WaterChange: "Water change logged for several tanks",
                 DeadRemoval: "Dead animals removed (outside the round)"}


@transaction.atomic
def record_batch(*, user, records: list) -> list:
    """Save records of one kind (feedings, water changes or dead-animal removals), one per tank, all or none.

    Two inserts whatever the number of tanks (the records, then their history rows, as the round does),
    then what a single entry of the kind sets off: for removals the mortality rule (feedings and water
    changes set off no rule when saved; the hourly scan reads their times). `records` are built from
    validated forms; who and when they were entered is set here, by the server.
    """
    if not records:
        return []
    model = type(records[0])
    if any(type(r) is not model for r in records):
        raise ValueError("A batch holds one kind of record.")
    now = timezone.now()
    for record in records:
        record.recorded_by, record.recorded_at = user, now
    saved = bulk_create_with_history(records, model, default_user=user, default_change_reason=BATCH_REASONS[model],
                                     default_date=now)
    if model is DeadRemoval:
        deviations.evaluate_removals(saved)
    return saved


MAX_ESTIMATE = 1e8  # animals; beyond this a census is a unit mistake (mg typed as g), not a culture


def census_estimate(census: Census) -> population.Estimate:
    """Compute the population estimate from the census's raw data (raises ValueError on bad data)."""
    estimate = _census_estimate(census)
    if not (math.isfinite(estimate.upper) and estimate.value <= MAX_ESTIMATE):
        raise ValueError(f"the estimate {estimate.value:.3g} animals is impossible (allowed up to {MAX_ESTIMATE:.0e}); "
                         "check the volumes or masses and their units.")
    return estimate


def _census_estimate(census: Census) -> population.Estimate:
    m = Census.Method
    if census.method == m.DIRECT:
        if census.direct_count is None:
            raise ValueError("Direct count: enter the number of animals counted.")
        return population.direct_count_estimate(census.direct_count)
    if census.method == m.ALIQUOT:
        if not census.aliquot_counts or census.aliquot_ml is None or census.total_ml is None:
            raise ValueError("Aliquot counts: enter the counts, the aliquot volume and the total volume.")
        return population.aliquot_estimate(list(census.aliquot_counts), census.aliquot_ml, census.total_ml)
    if census.method == m.MASS:
        if None in (census.total_mass_g, census.sample_mass_g, census.sample_count):
            raise ValueError("Wet mass: enter the total mass, the subsample mass and the subsample count.")
        return population.gravimetric_estimate(census.total_mass_g, census.sample_mass_g, census.sample_count)
    raise ValueError(f"Unknown census method {census.method!r}.")


def apply_estimate(census: Census) -> Census:
    est = census_estimate(census)
    census.estimate = est.value
    census.estimate_lower = est.lower
    census.estimate_upper = est.upper
    census.estimate_method = est.method[:200]
    return census


@transaction.atomic
def record_census(*, user, census: Census) -> Census:
    apply_estimate(census)
    _save_simple(census, user=user, reason="Census logged")
    deviations.apply_findings(list(deviations.evaluate_censuses([census])))
    return census


@transaction.atomic
def void_record(*, user, record, reason: str):
    record.void(user=user, reason=reason)
    return record


# ---------------------------------------------------------------------------------------------
# Splits
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class NewTank:
    """A tank to set up as a split's destination; room, species, system and substrate come from the source."""

    code: str
    volume_l: float
    position: str = ""


# Split numbers are estimates: the parts (stayed + moved) may exceed the estimate before the split
# by this fraction before the books are refused as impossible. Common practice: aliquot or
# gravimetric estimates of worm numbers are rarely better than ±20-30 %, so 50 % is generous.
SPLIT_BOOKS_TOLERANCE = 0.5


@transaction.atomic
def record_split(*, user, source: Tank, source_before: float, stayed: float, parts: list[tuple[Tank | NewTank, float]],
                 split_at=None, note: str = "") -> Split:
    """Record a split, set up any new destination tanks and add the source to each destination's lineage.

    All or nothing. Raises ValueError (message names the field, value and allowed range) on
    impossible input; the caller shows it. The books need not balance (estimates): the tank page
    shows the difference with population.split_balance.
    """
    split_at = split_at or timezone.now()
    if source.status == Tank.Status.RETIRED:
        raise ValueError(f"Tank {source.code} is retired; it cannot be split.")
    try:
        check_moment("Split at", split_at, started_on=source.started_on, what=f"when tank {source.code} was started")
    except ValidationError as error:
        raise ValueError(" ".join(error.messages)) from None
    if not parts:
        raise ValueError("Destinations: a split needs at least one destination tank.")
    if not 0 <= stayed <= source_before:
        raise ValueError(f"Animals left in this tank: {stayed:g} is impossible; allowed range 0 to {source_before:g} "
                         "animals (the animals before the split).")
    balance = population.split_balance(  # raises on impossible numbers
        source_before, [stayed] + [animals for _, animals in parts])
    if balance.parts_total > source_before * (1 + SPLIT_BOOKS_TOLERANCE):
        raise ValueError(
            f"Animals moved: {balance.parts_total - stayed:g} in total is impossible; allowed range 0 to "
            f"{source_before * (1 + SPLIT_BOOKS_TOLERANCE) - stayed:g} animals (the animals before the split, "
            f"{source_before:g}, plus {SPLIT_BOOKS_TOLERANCE:.0%} for counting error, less the {stayed:g} that stayed).")
    split = Split(source=source, split_at=split_at, recorded_by=user, source_before=source_before, stayed=stayed,
                  note=note)
    split._history_user = user
    split._change_reason = "Split recorded"
    split.full_clean()
    split.save()
    destinations = []
    for destination, animals in parts:
        created = isinstance(destination, NewTank)
        if created:
            destination = _new_tank_from(source, destination, user=user, started_on=timezone.localdate(split_at))
        elif destination.pk == source.pk:
            raise ValueError(f"Destination: {source.code} is the source tank; choose another tank.")
        elif destination.species_id != source.species_id:
            raise ValueError(f"Destination: {destination.code} holds {destination.species}, not {source.species}.")
        elif destination.status == Tank.Status.RETIRED:
            raise ValueError(f"Destination: {destination.code} is retired.")
        if destination.pk in {d.pk for d in destinations}:
            raise ValueError(f"Destination: {destination.code} is listed twice; enter its animals once.")
        linked = not created and destination.founded_from.filter(pk=source.pk).exists()
        part = SplitPart(split=split, destination=destination, animals=animals, created_tank=created,
                         added_lineage=not linked)
        part._history_user = user
        part._change_reason = "Split recorded"
        part.full_clean()
        part.save()
        if not linked:
            destination._history_user = user
            destination._change_reason = f"Founded from {source.code} by a split"
            destination.founded_from.add(source)
        destinations.append(destination)
    tanks = list(Tank.objects.select_related("species").filter(pk__in=[source.pk] + [d.pk for d in destinations]))
    deviations.apply_findings(list(deviations.stocking_density_rule(tanks, split_at)), user=user)
    return split


def _new_tank_from(source: Tank, spec: NewTank, *, user, started_on) -> Tank:
    if Tank.objects.filter(code=spec.code).exists():
        raise ValueError(f"New tank code: {spec.code} is already in use; choose another code.")
    tank = Tank(code=spec.code, position=spec.position, volume_l=spec.volume_l, room=source.room,
                species=source.species, system=source.system, substrate=source.substrate, started_on=started_on,
                notes=f"Set up from {source.code} by a split.")
    tank._history_user = user
    tank._change_reason = f"Set up by a split of {source.code}"
    try:
        tank.full_clean()
    except ValidationError as error:
        raise ValueError("; ".join(f"New tank {name}: {' '.join(msgs)}" for name, msgs in error.message_dict.items()))
    tank.save()
    return tank


@transaction.atomic
def void_split(*, user, split: Split, reason: str) -> Split:
    """Void a split recorded in error. Tanks it set up stay (retire them if empty); a lineage edge
    it added is removed unless another current split also links the two tanks (the tank
    history keeps both changes)."""
    split.void(user=user, reason=reason)
    for part in split.parts.filter(added_lineage=True).select_related("destination"):
        still_linked = SplitPart.objects.filter(
            split__source_id=split.source_id, destination_id=part.destination_id, split__voided_at__isnull=True,
        ).exists()
        if not still_linked:
            part.destination._history_user = user
            part.destination._change_reason = f"Split voided: {reason}"
            part.destination.founded_from.remove(split.source_id)
    return split
