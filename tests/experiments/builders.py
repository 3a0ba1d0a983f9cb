"""Builders for experiment test data: protocols, stocked tanks, bookings, cohorts, studies, trials.

Each saves and returns one object through the same services the screens use; keywords override defaults.
"""
import itertools
from datetime import date, timedelta

from django.utils import timezone

from colonies.models import Census
from experiments import services
from experiments.models import Allowance, Dish, Protocol, Stimulus
from tests.factories import make_species, make_tank

_numbers = itertools.count(1)

UV = {"kind": Stimulus.UV, "wavelength_min_nm": 340, "wavelength_max_nm": 400, "max_irradiance_mw_cm2": 5.0,
      "max_duration_s": 60, "max_dose_mj_cm2": 100.0}
ELECTRICAL = {"kind": Stimulus.ELECTRICAL, "max_voltage_v": 12.0, "max_field_v_cm": 4.0, "max_pulse_width_ms": 50.0,
              "max_pulse_count": 100}
THERMAL = {"kind": Stimulus.THERMAL, "max_temp_step_c": 4.0, "max_temp_rate_c_min": 1.0}
CHEMICAL = {"kind": Stimulus.CHEMICAL, "substance": "caffeine", "max_concentration_um": 500.0}


def make_protocol(*, allowances=(UV, ELECTRICAL, THERMAL, CHEMICAL), **overrides) -> Protocol:
    today = timezone.localdate()
    fields = {"title": "Aggregation and dispersal under light and current", "reference": f"AWB-T-{next(_numbers):03d}",
              "approver": "Dr Test, animal-welfare body", "approved_on": today - timedelta(days=40),
              "starts_on": today - timedelta(days=30), "expires_on": today + timedelta(days=300),
              "status": Protocol.Status.APPROVED, "max_animals_per_trial": 12, "max_exposures_per_group": 3,
              "min_rest_hours": 20.0, "max_cumulative_dose_mj_cm2": 150.0}
    fields.update(overrides)
    protocol = Protocol.objects.create(**fields)
    for a in allowances:
        Allowance.objects.create(protocol=protocol, **a)
    return protocol


def make_stocked_tank(*, estimate: float = 1000, reserve: int = 100, observed_at=None, user=None, **overrides):
    """A tank whose latest census estimate is `estimate`; its species keeps `reserve` animals."""
    species = overrides.pop("species", None) or make_species(reserve_min_animals=reserve)
    tank = make_tank(species=species, **overrides)
    if user is None:
        from tests.factories import make_user
        user = make_user()
    Census.objects.create(tank=tank, recorded_by=user, method=Census.Method.DIRECT, direct_count=int(estimate),
                          estimate=estimate, estimate_lower=estimate, estimate_upper=estimate,
                          observed_at=observed_at or timezone.now() - timedelta(days=2))
    return tank


def make_cohort(*, user, protocol=None, tank=None, animals: int = 10, at=None):
    protocol = protocol or make_protocol()
    tank = tank or make_stocked_tank(user=user)
    at = at or timezone.now() - timedelta(days=5)
    booking = services.book(user=user, protocol=protocol, tank=tank, animals=animals,
                            needed_on=timezone.localdate(at), today=timezone.localdate(at))
    return services.draw(user=user, booking=booking, at=at)


def make_study(*, user, protocol, conditions=("sham", "UV low", "UV high"), replicates: int = 2, blinded=False,
               **overrides):
    fields = {"code": f"study-{next(_numbers)}", "title": "Test study", "method": "block", "seed": 20260101,
              "observation_window_s": 600, "reference_condition": conditions[0] if len(conditions) > 1 else ""}
    fields.update(overrides)
    return services.create_study(user=user, protocol=protocol, conditions=list(conditions), replicates=replicates,
                                 blinded=blinded, **fields)


def uv_values(*, irradiance=2.0, duration=10.0, wavelength=365.0, at=None, **overrides) -> dict:
    values = {"vessel": "glass Petri dish", "arena_diameter_mm": 90, "water_volume_ml": 20, "water_temp_c": 21.5,
              "light_lux": 5, "acclimation_min": 10, "animals": 10, "kind": Stimulus.UV, "wavelength_nm": wavelength,
              "irradiance_mw_cm2": irradiance, "duration_s": duration,
              "run_at": at or timezone.now() - timedelta(days=3), "aggregate_s": 300, "disperse_s": 120,
              "censored": False}
    values.update(overrides)
    return values


def record(study, group, user, *, slot=None, override_reason="", now=None, claim=True, **values):
    """Record a trial in `slot` (default: the first open one), claimed first by `user` unless `claim=False`,
    on `group`: a Dish, or a Cohort whose animals form one dish (as before dishes, and as migration 0006
    turned every cohort with trials into one dish): its first open dish, else a new dish holding all the
    cohort's animals not yet in a dish."""
    taken = set(study.trials.counting().values_list("slot", flat=True))
    slot = slot or next(s["slot"] for s in study.allocation if s["slot"] not in taken)
    if claim:
        services.claim_slot(user=user, study=study, slot=slot)
    if isinstance(group, Dish):
        where = {"dish": group}
    else:
        dish = group.dishes.open().order_by("number").first()
        where = {"dish": dish} if dish else {"cohort": group,
                                              "dish_animals": group.size - services.animals_in_dishes(group)}
    return services.record_trial(user=user, study=study, slot=slot, values=uv_values(**values),
                                 override_reason=override_reason, now=now, **where)


def days_ago(n: float):
    return timezone.now() - timedelta(days=n)


def today() -> date:
    return timezone.localdate()
