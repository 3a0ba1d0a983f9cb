"""Invented demo trials for the Quillmoor Culture Facility: protocols, bookings, cohorts, two studies.

Everything is made up (people, references, numbers). Written through the same services the screens
use, so every record has its history and every limit is checked. Deterministic for a seed and a
`now`. Needs the colonies demo first: tanks LV-01..LV-10 of Lumbriculus variegatus with censuses.

Main study: UV-A (365 nm) dispersal of blackworm clumps at four doses and a sham, 6 dishes each,
30 trials in permuted blocks, 10 dishes of 8 animals each exposed three times a day apart. The
dishes come from four cohorts: three of 24 animals split into three dishes of 8 (run within the
same hour: each dish is its own group of animals for the protocol's limits) and one of 10 with one
dish of 8 (two animals stay in reserve). The
fraction of clumps dispersing within the 600 s window follows a log-logistic curve (EC50 near
12 mJ/cm²); the numbers dispersing per condition are fixed from that curve so that every seed gives
a study with a fit, and the seed chooses which dishes disperse and when.
"""
import math
import random
from datetime import datetime, time, timedelta

from django.db import transaction
from django.utils import timezone

from colonies.demo import DEMO_PASSWORD
from colonies.models import Signature, Tank
from colonies.signatures import sign

from . import demo_imaging, protocols, services
from .models import Allowance, Booking, Cohort, Dish, Protocol, Stimulus, Study

WINDOW_S = 600
DOSES = [0.0, 5.0, 10.0, 20.0, 40.0]  # mJ/cm² per exposure; 0 = sham
CONDITIONS = ["sham (no light)", "UV 5 mJ/cm²", "UV 10 mJ/cm²", "UV 20 mJ/cm²", "UV 40 mJ/cm²"]
IRRADIANCE_MW_CM2 = 2.0  # the dose is varied through the exposure time
REPLICATES = 6
DISH_ANIMALS = 8
COHORTS = (24, 24, 24, 10)  # animals drawn per cohort; 24 = three dishes of 8
EC50, SLOPE, SHAM_P = 12.0, 3.5, 0.12  # invented


def _p_disperse(dose: float) -> float:
    if dose <= 0:
        return SHAM_P
    return 1 / (1 + math.exp(-SLOPE * (math.log10(dose) - math.log10(EC50))))


def _at(day, hour, minute, tz):
    return timezone.make_aware(datetime.combine(day, time(hour, minute)), tz)


def _protocols(manager, today, password):
    def protocol(reference, allowances, **fields):
        p = Protocol(reference=reference, **fields)
        p._history_user, p._change_reason = manager, "Entered from the approval letter"
        p.save()
        for a in allowances:
            row = Allowance(protocol=p, **a)
            row._history_user = manager
            row.save()
        start = timezone.make_aware(datetime.combine(p.starts_on, time(9, 0)))
        protocols.version_at(p, start)  # version 1, in force from its first day
        if p.status == Protocol.Status.APPROVED:  # approved in the app, signed on the day of the approval
            sign(user=manager, password=password, meaning=Signature.Meaning.APPROVED, obj=p)
            p.signatures.update(signed_at=timezone.make_aware(datetime.combine(p.approved_on, time(11, 30))))
        return p

    main = protocol(
        "QAW-2026-031", [
            {"kind": Stimulus.UV, "wavelength_min_nm": 350, "wavelength_max_nm": 400, "max_irradiance_mw_cm2": 4.0,
             "max_duration_s": 30, "max_dose_mj_cm2": 80.0},
            {"kind": Stimulus.ELECTRICAL, "max_voltage_v": 9.0, "max_field_v_cm": 3.0, "max_pulse_width_ms": 20.0,
             "max_pulse_count": 50},
            {"kind": Stimulus.MECHANICAL, "notes": "Pipette jet of 1 mL culture water beside the clump, once."},
        ],
        title="Light- and current-driven dispersal of blackworm aggregates", approver="Dr Halvard Pennick, Quillmoor "
        "animal welfare body", approved_on=today - timedelta(days=62), starts_on=today - timedelta(days=60),
        expires_on=today + timedelta(days=305), status=Protocol.Status.APPROVED, max_animals_per_trial=12,
        max_exposures_per_group=3, min_rest_hours=20, max_cumulative_dose_mj_cm2=150, max_animals_total=600,
        notes="Animals are returned to their culture after the last exposure unless retired for histology.")
    old = protocol(
        "QAW-2025-007", [{"kind": Stimulus.THERMAL, "max_temp_step_c": 4.0, "max_temp_rate_c_min": 0.5}],
        title="Warm-step dispersal pilot", approver="Dr Halvard Pennick, Quillmoor animal welfare body",
        approved_on=today - timedelta(days=400), starts_on=today - timedelta(days=390),
        expires_on=today - timedelta(days=20), status=Protocol.Status.APPROVED, max_animals_per_trial=10,
        max_exposures_per_group=2, min_rest_hours=48, max_animals_total=120)
    draft = protocol(
        "QAW-2026-044", [{"kind": Stimulus.CHEMICAL, "substance": "caffeine", "max_concentration_um": 200.0}],
        title="Caffeine and clump cohesion (draft, awaiting review)", approver="(pending)",
        starts_on=today + timedelta(days=14), expires_on=today + timedelta(days=380), status=Protocol.Status.DRAFT,
        max_animals_per_trial=10, max_exposures_per_group=2, min_rest_hours=24)
    protocol(  # shows on Today: it expires within 30 days
        "QAW-2025-019", [{"kind": Stimulus.LIGHT, "wavelength_min_nm": 450, "wavelength_max_nm": 650,
                          "max_irradiance_mw_cm2": 2.0, "max_duration_s": 60}],
        title="White-light avoidance in juvenile cultures",
        approver="Dr Halvard Pennick, Quillmoor animal welfare body",
        approved_on=today - timedelta(days=340), starts_on=today - timedelta(days=330),
        expires_on=today + timedelta(days=18), status=Protocol.Status.APPROVED, max_animals_per_trial=10,
        max_exposures_per_group=2, min_rest_hours=24)
    return main, old, draft


def _clusters(rng, dispersed_at: float | None, animals: int) -> list[dict]:
    points = []
    for t in (60, 180, 300, 600):
        if dispersed_at is not None and t >= dispersed_at:
            n = rng.randint(max(3, animals // 2), animals)
            largest = round(rng.uniform(1, 2) / animals, 2)
        else:
            n = rng.randint(1, 3)
            largest = round(rng.uniform(0.6, 0.95), 2)
        points.append({"t_s": float(t), "clusters": n, "largest_fraction": largest})
    return points


@transaction.atomic
def load(*, seed: int, now, users: dict, password: str = DEMO_PASSWORD) -> dict:
    """`password`: the manager's and the researcher's, to sign approvals and the unblinding as people do."""
    rng = random.Random(seed)
    tz = timezone.get_current_timezone()
    today = timezone.localdate(now)
    ravi, manager = users["researcher"][0], users["manager"][0]
    main, _old, _draft = _protocols(manager, today, password)
    tanks = list(Tank.objects.filter(code__in=[f"LV-{i:02d}" for i in range(1, 11)]).order_by("code"))
    if len(tanks) < 10:
        raise ValueError("The trials demo needs tanks LV-01..LV-10 from the colonies demo.")

    # Four cohorts drawn on one morning three weeks ago; their ten dishes are set up with their first trials.
    start = today - timedelta(days=21)
    cohorts = []
    for tank, animals in zip(tanks, COHORTS):
        booking = services.book(user=ravi, protocol=main, tank=tank, animals=animals, needed_on=start,
                                purpose="UV dispersal study", today=start - timedelta(days=3))
        cohorts.append(services.draw(user=ravi, booking=booking, at=_at(start, 8, rng.randint(0, 40), tz)))
    dishes: dict[int, Dish] = {}  # position in the day's run order -> its dish
    alive = {position: DISH_ANIMALS for position in range(10)}  # a death at 24 h leaves the dish one short

    study = services.create_study(
        user=ravi, code="uv-dispersal-01", title="UV-A dose and the dispersal of blackworm clumps", protocol=main,
        conditions=CONDITIONS, reference_condition=CONDITIONS[0], replicates=REPLICATES, method=Study.Method.BLOCK,
        seed=seed * 7919 + 31,
        blinded=True, observation_window_s=WINDOW_S,
        question="Does a short UV-A pulse (365 nm) disperse clumps faster as the dose rises?",
        exclusion_criteria="Clump not formed within 15 min of acclimation; animals injured in handling.")
    # Fixed numbers dispersing per condition (see the module docstring); the seed picks the dishes.
    dispersing = {}
    for condition, dose in zip(CONDITIONS, DOSES):
        slots = [a["slot"] for a in study.allocation if a["condition"] == condition]
        chosen = set(rng.sample(slots, int(_p_disperse(dose) * REPLICATES + 0.5)))
        dispersing.update({s: s in chosen for s in slots})

    overrides = 0
    for entry in study.allocation:
        day_index, position = divmod(entry["slot"] - 1, 10)
        cohort = cohorts[position // 3]  # positions 0-2: the first cohort's three dishes, and so on
        run_at = _at(start + timedelta(days=day_index + 1), 9, 0, tz) + timedelta(minutes=25 * position)
        reason = ""
        if day_index == 1 and position == 3:
            run_at = _at(start + timedelta(days=2), 17, 0, tz)  # arena under maintenance that morning
        if day_index == 2 and position == 3:
            reason = ("Day-2 dish delayed to 17:00 by arena maintenance; running at the usual time keeps the block "
                      "order (rest 17 h instead of 20 h). Animals active; agreed with the welfare officer by phone.")
        dose = DOSES[CONDITIONS.index(entry["condition"])]
        rate = -math.log(1 - min(_p_disperse(dose), 0.97)) / WINDOW_S
        if dispersing[entry["slot"]]:
            t = 0.0
            while not 15 <= t < WINDOW_S:
                t = rng.expovariate(rate) if dose > 0 else rng.uniform(200, 590)
            disperse_s, censored = round(t), False
        else:
            disperse_s, censored = float(WINDOW_S), True
        values = {
            "vessel": "glass Petri dish", "arena_diameter_mm": 90.0, "water_volume_ml": 25.0,
            "water_temp_c": round(rng.gauss(21.5, 0.3), 1), "light_lux": 3.0, "acclimation_min": 15.0,
            "animals": alive[position],
            "kind": Stimulus.NONE if dose == 0 else Stimulus.UV, "run_at": run_at,
            "wavelength_nm": 365.0 if dose else None, "irradiance_mw_cm2": IRRADIANCE_MW_CM2 if dose else None,
            "duration_s": dose / IRRADIANCE_MW_CM2 if dose else None,
            "aggregate_s": float(rng.randint(180, 420)), "disperse_s": float(disperse_s), "censored": censored,
            "clusters": _clusters(rng, None if censored else disperse_s, alive[position]),
            "mortality_24h": 1 if rng.random() < 0.07 else 0, "note": "",
        }
        operator = manager if reason else ravi
        services.claim_slot(user=operator, study=study, slot=entry["slot"], now=run_at - timedelta(minutes=20))
        # The first trial of a dish sets it up in the same step; the later ones expose the same animals again.
        group = {"dish": dishes[position]} if position in dishes else {"cohort": cohort, "dish_animals": DISH_ANIMALS}
        result = services.record_trial(user=operator, study=study, slot=entry["slot"],
                                       values=values, override_reason=reason, **group,
                                       now=min(now, run_at + timedelta(hours=25)))  # completed with the 24 h count
        dishes[position] = result.trial.dish
        alive[position] -= values["mortality_24h"]
        overrides += bool(result.override)
    # Photo series of some dishes, measured before unblinding (experiments/demo_imaging.py).
    image_series = demo_imaging.add_series(study=study, user=ravi, seed=seed)
    unblinded_at = _at(start + timedelta(days=5), 16, 0, tz)
    services.unblind(user=ravi, study=study, at=unblinded_at, password=password,
                     reason="All 30 trials scored; primary analysis as planned.")
    study.signatures.update(signed_at=unblinded_at)  # signed when it happened in the scenario

    # Dishes end two days after their last trial: most go back to their tanks, one is retired for histology,
    # the last is kept (with its cohort's two reserve animals); then the three cohorts fully in dishes end.
    at = _at(start + timedelta(days=5), 10, 0, tz)
    for position, dish in sorted(dishes.items()):
        if position == 8:
            services.end_dish(user=ravi, dish=dish, end=Dish.End.RETIRED, at=at, now=now,
                              method="Anaesthetised in carbonated water and fixed for histology (lab SOP 12)")
        elif position < 8:
            dead = sum(t.mortality_24h or 0 for t in dish.trials.all())
            services.end_dish(user=ravi, dish=dish, end=Dish.End.RETURNED, returned_to=cohorts[position // 3].origin_tank,
                              returned_count=dish.animals - dead, at=at, now=now,
                              note=f"{dead} died after exposure" if dead else "")
    for cohort in cohorts[:3]:
        services.end_cohort(user=ravi, cohort=cohort, end=Cohort.End.IN_DISHES, at=at)

    # A small blinded electrical pilot, still running: two of six dishes done and scored blind.
    pilot = services.create_study(
        user=ravi, code="shock-pilot-01", title="Weak field pulses and clump dispersal (pilot)", protocol=main,
        conditions=["sham", "field 1 V/cm", "field 2 V/cm"], reference_condition="sham", replicates=2,
        method=Study.Method.SIMPLE,
        seed=seed + 404, blinded=True, observation_window_s=WINDOW_S,
        question="Is a 1-2 V/cm pulse train enough to break a clump within 10 min?")
    pilot_booking = services.book(user=ravi, protocol=main, tank=tanks[4], animals=10, needed_on=today - timedelta(days=3),
                                  purpose="Electrical pilot", today=today - timedelta(days=4))
    pilot_cohort = services.draw(user=ravi, booking=pilot_booking, at=_at(today - timedelta(days=3), 8, 30, tz))
    for n, entry in enumerate(pilot.allocation[:2]):
        volts = {"sham": 0.0, "field 1 V/cm": 4.0, "field 2 V/cm": 8.0}[entry["condition"]]
        values = {"vessel": "acrylic channel with stainless electrodes", "arena_diameter_mm": 40.0,
                  "water_volume_ml": 10.0, "water_temp_c": 21.0, "light_lux": 3.0, "acclimation_min": 15.0,
                  "animals": DISH_ANIMALS, "run_at": _at(today - timedelta(days=2 - n), 10, 0, tz),
                  "aggregate_s": 260.0, "disperse_s": float(WINDOW_S if volts == 0 else rng.randint(90, 400)),
                  "censored": volts == 0, "clusters": [], "note": ""}
        if volts:
            values.update(kind=Stimulus.ELECTRICAL, voltage_v=volts, electrode_gap_cm=4.0, pulse_width_ms=10.0,
                          pulse_count=20, pulse_frequency_hz=2.0)
        else:
            values.update(kind=Stimulus.NONE)
        services.claim_slot(user=ravi, study=pilot, slot=entry["slot"], now=values["run_at"] - timedelta(minutes=20))
        group = {"dish": pilot_dish} if n else {"cohort": pilot_cohort, "dish_animals": DISH_ANIMALS}
        pilot_dish = services.record_trial(user=ravi, study=pilot, slot=entry["slot"], values=values, **group,
                                           now=min(now, values["run_at"] + timedelta(minutes=15))).trial.dish

    # Bookings ahead, one cancelled and one that was never drawn (expires).
    for days, tank, animals, purpose in ((1, tanks[1], 10, "Pilot dish 3"), (4, tanks[6], 24, "Second UV series"),
                                         (9, tanks[8], 12, "Pilot dishes 4-6")):
        services.book(user=ravi, protocol=main, tank=tank, animals=animals, needed_on=today + timedelta(days=days),
                      purpose=purpose, today=today)
    cancelled = services.book(user=ravi, protocol=main, tank=tanks[2], animals=10, needed_on=today + timedelta(days=2),
                              purpose="Repeat of dish 7", today=today)
    services.cancel_booking(user=ravi, booking=cancelled, reason="Not needed: dish 7 was fine on review.")
    services.book(user=ravi, protocol=main, tank=tanks[3], animals=10, needed_on=today - timedelta(days=6),
                  purpose="Spare animals", today=today - timedelta(days=8))
    expired = services.expire_bookings(today)

    return {"protocols": 3, "bookings": Booking.objects.count(), "cohorts": Cohort.objects.count(),
            "dishes": Dish.objects.count(),
            "studies": 2, "trials": study.trials.count() + pilot.trials.count(), "overrides": overrides,
            "expired_bookings": expired, "image_series": image_series}
