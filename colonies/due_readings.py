"""Which readings are due on which tanks now: the measurement plans applied to the records.

Reads the annotations of `Tank.objects.with_last_measured().with_last_events()` and the prefetched plans,
plus one query for the unresolved deviations of the tanks concerned, so a page's query count does not
depend on how many tanks it shows.
"""
from collections import defaultdict
from collections.abc import Sequence
from datetime import datetime

from django.utils import timezone

from . import derived, schedules
from .models import Deviation, Tank, TankMeasurementPlan


def open_deviation_keys(tank_ids) -> dict[int, set[str]]:
    """The measured parameters concerned by each tank's unresolved deviations (one query)."""
    out: dict[int, set[str]] = defaultdict(set)
    rows = (Deviation.objects.unresolved().filter(tank_id__in=list(tank_ids)).exclude(parameter="")
            .values_list("tank_id", "parameter"))
    for tank_id, key in rows:
        out[tank_id].update(derived.measured_keys(key))
    return out


def due_by_tank(tanks: Sequence[Tank], now: datetime | None = None) -> dict[int, dict[str, str]]:
    """{tank id: {parameter key: why it is due}} for the parameters due now, in registry order.

    Two queries whatever the number of tanks: the tanks' own plans and their unresolved deviations (the
    species' plans come prefetched: `species__measurement_plans`).
    """
    now = now or timezone.now()
    zone = timezone.get_current_timezone()
    today = now.astimezone(zone).date()
    ids = [t.pk for t in tanks]
    deviations = open_deviation_keys(ids)
    overrides: dict[int, dict] = defaultdict(dict)
    for row in TankMeasurementPlan.objects.filter(tank_id__in=ids):
        overrides[row.tank_id][row.parameter] = row.as_plan("tank")
    plans_by_species: dict[int, dict] = {}
    out = {}
    for tank in tanks:
        species_plans = plans_by_species.get(tank.species_id)
        if species_plans is None:
            species_plans = plans_by_species[tank.species_id] = tank.species.plans()
        own = overrides.get(tank.pk)
        plans = {**species_plans, **{k: v for k, v in own.items() if k in species_plans}} if own else species_plans
        open_keys = deviations.get(tank.pk, ())
        water_change_at = tank.last_water_change_at
        due = {}
        for key, plan in plans.items():
            last_at = getattr(tank, f"last_{key}_at")
            why = schedules.due(plan, today=today, last_at=last_at,
                                last_on=last_at.astimezone(zone).date() if last_at else None,
                                water_change_at=water_change_at, deviation_open=key in open_keys)
            if why:
                due[key] = why
        out[tank.pk] = due
    return out
