"""Writes that span several rows or models. Each is one transaction: all or nothing."""
from django.db import transaction
from django.utils import timezone
from simple_history.utils import bulk_create_with_history

from . import deviations, parameters, population
from .flags import flags_for
from .models import Census, Check, Feeding, WaterChange

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
    for key in parameters.KEYS:
        if key in row:
            setattr(check, key, row[key])
    for field in OBSERVATION_FIELDS:
        if field in row and row[field] is not None:
            setattr(check, field, row[field])
    if "observed_at" in row and row["observed_at"]:
        check.observed_at = row["observed_at"]
    check.flags = flags_for(check.values(), check.tank.care_targets())
    check._history_user = user
    check._change_reason = reason
    check.save()
    deviations.evaluate_checks([check])
    return check


def _save_simple(instance, *, user, reason: str):
    instance.recorded_by = user
    instance._history_user = user
    instance._change_reason = reason
    instance.full_clean()
    instance.save()
    return instance


@transaction.atomic
def record_feeding(*, user, feeding: Feeding) -> Feeding:
    return _save_simple(feeding, user=user, reason="Feeding logged")


@transaction.atomic
def record_water_change(*, user, change: WaterChange) -> WaterChange:
    return _save_simple(change, user=user, reason="Water change logged")


def census_estimate(census: Census) -> population.Estimate:
    """Compute the population estimate from the census's raw data (raises ValueError on bad data)."""
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
    return _save_simple(census, user=user, reason="Census logged")


@transaction.atomic
def void_record(*, user, record, reason: str):
    record.void(user=user, reason=reason)
    return record
