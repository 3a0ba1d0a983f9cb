"""The invented demo scenario: Quillmoor Culture Facility, three rooms, 24 tanks, 120 days.

Everything here is made up (facility, people, numbers). Deterministic for a given seed and
"today": the same seed on the same day gives the same records.
"""
import hashlib
import math
import random
from datetime import datetime, time, timedelta

from django.contrib.auth import password_validation
from django.contrib.auth.models import Group, User
from django.db import transaction
from django.utils import timezone
from simple_history.utils import bulk_create_with_history

from scipy.optimize import brentq

from . import care_defaults, chemistry, deviations, schedules, signatures
from .flags import flags_for
from .models import (CareTarget, Census, Check, Deviation, Feeding, Room, Signature, Species, Tank, TankTarget,
                     WaterChange)
from .roles import MANAGER, RESEARCHER, TECHNICIAN
from .services import apply_estimate

DAYS = 120
DEMO_PASSWORD = "worms-demo-2026"
DEMO_USERS = [
    # username, first, last, role
    ("tamsin", "Tamsin", "Okoro-Vale", TECHNICIAN),
    ("ilya", "Ilya", "Brennagh", TECHNICIAN),
    ("ravi", "Ravi", "Lindqvist-Amari", RESEARCHER),
    ("morwen", "Morwen", "Achterberg", MANAGER),
]

ROOMS = [
    ("fw-1", "Freshwater room 1", "Lumbriculus variegatus", "LV", 10, 2.0, "shredded unbleached paper towel"),
    ("pl-1", "Planarian room", "Schmidtea mediterranea", "SM", 8, 1.5, "none (bare glass)"),
    ("mar-1", "Marine room", "Platynereis dumerilii", "PD", 6, 4.0, "none; algal film on walls"),
]

# Typical values per species (centre, noise SD) for the generated readings.
PROFILE = {
    "Lumbriculus variegatus": {"temp_c": (23.0, 0.45), "ph": (7.6, 0.12), "do_mg_l": (7.4, 0.35),
                               "tan_mg_l": (0.25, 0.08), "no2_mg_l": (0.03, 0.01), "no3_mg_l": (4.0, 1.0),
                               "conductivity_us_cm": (420, 25), "hardness_mg_l": (160, 12)},
    "Schmidtea mediterranea": {"temp_c": (20.0, 0.3), "ph": (7.9, 0.1), "do_mg_l": (8.2, 0.3),
                               "tan_mg_l": (0.15, 0.06), "no2_mg_l": (0.02, 0.01), "no3_mg_l": (2.0, 0.6),
                               "conductivity_us_cm": (760, 30), "hardness_mg_l": (210, 8)},
    "Platynereis dumerilii": {"temp_c": (18.0, 0.35), "ph": (8.05, 0.07), "do_mg_l": (7.3, 0.3),
                              "tan_mg_l": (0.08, 0.04), "no2_mg_l": (0.02, 0.01), "no3_mg_l": (8.0, 2.0),
                              "conductivity_us_cm": (40000, 800), "salinity": (30.0, 0.5)},
}
FOOD = {"Lumbriculus variegatus": ("sinking fish-food pellets", 0.05, "g"),
        "Schmidtea mediterranea": ("liver paste", 0.3, "mL"),
        "Platynereis dumerilii": ("spinach and algae mix", 0.2, "g")}
SOURCE_WATER = {"Lumbriculus variegatus": "aged dechlorinated water",
                "Schmidtea mediterranea": "1x planarian salts",
                "Platynereis dumerilii": "mixed natural and artificial seawater"}

# Invented excursions: (tank code, first day, last day, parameter, value function, action)
EXCURSIONS = [
    ("LV-03", 41, 43, "temp_c", lambda d: 27.1 + 0.4 * d, "Heater thermostat stuck on; heater replaced, tank cooled with a 30 % water change."),
    ("LV-07", 88, 89, "do_mg_l", lambda d: 2.1 + 0.1 * d, "Air line kinked behind rack; replaced and aeration checked."),
    ("SM-05", 101, 103, "tan_mg_l", lambda d: 2.4 + 0.6 * d, "Uneaten liver removed, full water change, feeding skipped once."),
    ("PD-02", 79, 79, "salinity", lambda d: 25.6, "Top-up with fresh water overdone; salinity corrected over 24 h."),
    ("SM-02", 60, 61, "temp_c", lambda d: 22.4, "Room air conditioning fault reported to facilities."),
    ("LV-09", DAYS - 1, DAYS - 1, "tan_mg_l", lambda d: 2.3, ""),  # yesterday: flagged, no action yet
]


def database_has_data() -> bool:
    return Tank.objects.exists() or Check.objects.exists() or User.objects.exists()


def _users():
    users = {}
    for username, first, last, role in DEMO_USERS:
        user = User(username=username, email=f"{username}@quillmoor.invalid", first_name=first, last_name=last)
        # The shared demo password goes through the same validators as any other (it passes them).
        password_validation.validate_password(DEMO_PASSWORD, user)
        user = User.objects.create_user(username, user.email, DEMO_PASSWORD, first_name=first, last_name=last)
        user.groups.add(Group.objects.get(name=role))
        if role == MANAGER:
            user.is_staff = True
            user.save()
        users.setdefault(role, []).append(user)
    return users


def _at(day_date, hour, minute, tz):
    return timezone.make_aware(datetime.combine(day_date, time(hour, minute)), tz)


def _logistic(day, n0, k, r):
    return k / (1 + (k - n0) / n0 * math.exp(-r * day))


@transaction.atomic
def load(seed: int = 7, today=None) -> dict:
    rng = random.Random(seed)
    tz = timezone.get_current_timezone()
    today = today or timezone.localdate()
    start = today - timedelta(days=DAYS)
    now = timezone.now()
    for name in (TECHNICIAN, RESEARCHER, MANAGER):
        Group.objects.get_or_create(name=name)
    care_defaults.install(Species, CareTarget)
    users = _users()
    techs, manager = users[TECHNICIAN], users[MANAGER][0]
    for species in Species.objects.filter(scientific_name__in=FOOD):  # the lab's husbandry defaults (invented)
        species.default_food, species.default_feeding_amount, species.default_feeding_unit = FOOD[species.scientific_name]
        species.default_source_water = SOURCE_WATER[species.scientific_name]
        species._history_user, species._change_reason = manager, "Lab's feeding and water defaults"
        species.save()

    tanks = []
    for room_code, room_name, species_name, prefix, n, volume, substrate in ROOMS:
        room = Room(code=room_code, name=room_name, notes="Quillmoor Culture Facility (invented demo).")
        room._history_user = manager
        room.save()
        species = Species.objects.get(scientific_name=species_name)
        for i in range(1, n + 1):
            tank = Tank(code=f"{prefix}-{i:02d}", room=room, position=f"rack {1 + (i - 1) // 4}, shelf {'ABCD'[(i - 1) % 4]}",
                        species=species, volume_l=volume, substrate=substrate,
                        system=Tank.System.RECIRCULATING if prefix == "PD" else Tank.System.STATIC,
                        started_on=start - timedelta(days=rng.randint(10, 200)))
            tank._history_user = manager
            tank.save()
            tanks.append(tank)
    by_code = {t.code: t for t in tanks}
    # Lineage: some cultures were split from others.
    for child, parent in (("LV-06", "LV-01"), ("LV-07", "LV-01"), ("LV-10", "LV-04"), ("SM-07", "SM-03"),
                          ("SM-08", "SM-03"), ("PD-05", "PD-01")):
        child_tank, parent_tank = by_code[child], by_code[parent]
        if child_tank.started_on <= parent_tank.started_on:  # a culture starts after the one it came from
            child_tank.started_on = parent_tank.started_on + timedelta(days=rng.randint(20, 60))
            child_tank.started_on = min(child_tank.started_on, start - timedelta(days=5))
            child_tank._history_user = manager
            child_tank.save()
        child_tank.founded_from.add(parent_tank)
    quarantine = by_code["SM-08"]
    quarantine.status = Tank.Status.QUARANTINE
    quarantine.notes = "New animals from a collaborating lab (invented); quarantined for 4 weeks."
    quarantine._history_user = manager
    quarantine._change_reason = "Arrival of new animals"
    quarantine.save()
    override = TankTarget(tank=by_code["LV-10"], parameter="temp_c", low=18.0, high=22.0,
                          reason="Cool-acclimated line kept at 20 °C for a temperature study.")
    override._history_user = manager
    override.save()

    targets = {t.pk: t.care_targets() for t in Tank.objects.prefetch_related("species__targets", "target_overrides")}
    checks, feedings, changes, censuses = [], [], [], []
    excursions = {}
    for code, first, last, key, fn, action in EXCURSIONS:
        for d in range(first, last + 1):
            excursions[(code, d)] = (key, fn(d - first), action)

    for tank in tanks:
        sp = tank.species.scientific_name
        profile = PROFILE[sp]
        cool = tank.code == "LV-10"
        n0 = rng.uniform(500, 900) if sp.startswith("Lumb") else rng.uniform(40, 70) if sp.startswith("Schm") else rng.uniform(30, 45)
        k = tank.species.max_density_per_l * tank.volume_l * rng.uniform(0.75, 1.05)
        r = rng.uniform(0.035, 0.06) if sp.startswith("Lumb") else rng.uniform(0.02, 0.035)
        drift = {key: 0.0 for key in profile}
        plans = tank.species.plans()  # the readings are taken when the measurement plan says they are due
        last_on, last_at, last_change_at = {}, {}, None
        for day in range(DAYS + 1):
            date = start + timedelta(days=day)
            is_today = day == DAYS
            if is_today and tank.room.code != "fw-1":
                continue  # today's round is under way: only the first room is done
            if not is_today and rng.random() < 0.025:
                continue  # an occasional missed check
            when = _at(date, 8 + rng.randint(0, 1), rng.randint(0, 59), tz)
            if when > now:
                when = now - timedelta(minutes=5)
            readings = {}
            for key, (centre, sd) in profile.items():
                if key in plans and not schedules.due(plans[key], today=date, last_at=last_at.get(key),
                                                      last_on=last_on.get(key), water_change_at=last_change_at,
                                                      deviation_open=False):
                    continue
                drift[key] = 0.8 * drift[key] + rng.gauss(0, sd * 0.5)
                value = centre + drift[key] + rng.gauss(0, sd * 0.6)
                if cool and key == "temp_c":
                    value -= 3.0
                readings[key] = round(max(0.0, value), 3)
            action = ""
            exc = excursions.get((tank.code, day))
            if exc:
                key, value, action = exc
                readings[key] = round(value, 2)
            if "salinity" in readings and "conductivity_us_cm" in readings:
                readings["conductivity_us_cm"] = round(
                    _marine_conductivity_us_cm(readings["salinity"], readings["temp_c"]) * rng.gauss(1, 0.004))
            population = _logistic(day, n0, k, r)
            dead = 0
            if rng.random() < 0.12:
                dead = rng.randint(1, 2 if population < 200 else 4)
            if exc and exc[0] in ("temp_c", "do_mg_l", "tan_mg_l"):
                dead += rng.randint(5, 25) if population > 200 else rng.randint(1, 4)
            check = Check(tank=tank, observed_at=when, recorded_by=rng.choice(techs), dead_removed=dead,
                          activity=Check.Activity.REDUCED if exc else Check.Activity.NORMAL,
                          clumping=sp.startswith("Lumb") and rng.random() < 0.7,
                          clarity=Check.Clarity.CLEAR if rng.random() < 0.9 else Check.Clarity.CLOUDY,
                          corrective_action=action, **readings)
            check.flags = flags_for(check.values(), targets[tank.pk])
            checks.append(check)
            for key in readings:
                last_on[key], last_at[key] = date, when
            if day % tank.species.feeding_interval_days == 0 and not is_today:
                food, amount, unit = FOOD[sp]
                scale = max(0.5, population / 1000) if unit == "g" else 1
                feedings.append(Feeding(tank=tank, observed_at=when + timedelta(minutes=10), recorded_by=check.recorded_by,
                                        food=food, amount=round(amount * scale, 3), unit=unit))
            if day % tank.species.water_change_interval_days == 0 and not is_today:
                changes.append(WaterChange(tank=tank, observed_at=when + timedelta(minutes=20), recorded_by=check.recorded_by,
                                           percent=tank.species.water_change_fraction * 100, source_water=SOURCE_WATER[sp]))
                last_change_at = changes[-1].observed_at
            if day % tank.species.census_interval_days == 3:
                census = _census(rng, tank, population, when + timedelta(minutes=30), check.recorded_by)
                censuses.append(census)

    for record in (*checks, *feedings, *changes, *censuses):
        # Entered a few minutes after the work; about 1 in 100 typed in the next morning (a late entry).
        delay = timedelta(hours=rng.uniform(20, 26)) if rng.random() < 0.01 else timedelta(minutes=rng.randint(1, 25))
        record.recorded_at = min(now, record.observed_at + delay)
    stamp = timezone.now()
    bulk_create_with_history(checks, Check, default_user=techs[0], default_change_reason="Demo data", default_date=stamp)
    bulk_create_with_history(feedings, Feeding, default_user=techs[0], default_change_reason="Demo data", default_date=stamp)
    bulk_create_with_history(changes, WaterChange, default_user=techs[0], default_change_reason="Demo data", default_date=stamp)
    bulk_create_with_history(censuses, Census, default_user=techs[0], default_change_reason="Demo data", default_date=stamp)

    _deviations(rng, checks, techs, manager, now)
    # The trials side of the scenario: protocols, bookings, cohorts, a 30-trial study (draws from LV tanks).
    from experiments import demo as trials_demo
    trials = trials_demo.load(seed=seed, now=now, users=users)

    # One corrected and one voided record, so the history pages have something to show.
    check = Check.objects.filter(tank=by_code["PD-03"]).order_by("-observed_at")[5]
    check.ph, check._history_user, check._change_reason = 8.1, techs[1], "Meter read before it settled; re-measured"
    check.save()
    duplicate = Feeding.objects.filter(tank=by_code["SM-01"]).order_by("-observed_at").first()
    duplicate.void(user=techs[0], reason="Entered twice by mistake")
    return {"rooms": len(ROOMS), "tanks": len(tanks), "checks": len(checks), "feedings": len(feedings),
            "water_changes": len(changes), "censuses": len(censuses), "users": len(DEMO_USERS),
            **trials,
            "deviations": Deviation.objects.count(),
            "unresolved_deviations": Deviation.objects.unresolved().count()}


def _deviations(rng, checks, techs, manager, now):
    """Run the rules over the generated history, then answer most of what they found, as a lab would."""
    deviations.evaluate_checks(checks, now=now)
    deviations.scan(now)
    recent = now - timedelta(days=4)
    for dev in Deviation.objects.select_related("tank").order_by("opened_at"):
        if dev.rule == Deviation.Rule.STOCKING_DENSITY:
            dev.acknowledge(user=manager)  # still over density: a split is planned, not yet done
        elif dev.last_seen_at < recent:
            action = _action_for(dev) or "Checked the tank and its equipment; all normal at the next check."
            who = manager if dev.severity == Deviation.Severity.MAJOR else rng.choice(techs)
            dev.acknowledge(user=who)
            dev.close(user=who, corrective_action=action, password=DEMO_PASSWORD)
            # Back-date the answer to when it happened in the scenario (the history keeps the edit), and
            # its signature with it: signed then, over the record as it was then.
            delay = timedelta(hours=rng.uniform(1, 30))
            Deviation.objects.filter(pk=dev.pk).update(acknowledged_at=dev.last_seen_at + delay / 3,
                                                      closed_at=dev.last_seen_at + delay)
            dev.refresh_from_db()
            text = signatures.canonical(dev.signed_content())
            Signature.objects.filter(object_id=dev.pk, content_type__model="deviation").update(
                signed_at=dev.closed_at, content=text, content_sha256=hashlib.sha256(text.encode()).hexdigest())
        elif dev.rule in (Deviation.Rule.OUT_OF_TARGET, Deviation.Rule.MORTALITY) and rng.random() < 0.5:
            dev.acknowledge(user=rng.choice(techs))


GENERIC_ACTIONS = {
    Deviation.Rule.OUT_OF_TARGET: "Re-measured with a calibrated meter; partial water change; back within target next day.",
    Deviation.Rule.DRIFT: "Looked at the trend with the technician team; heater and aeration checked; trend levelled off.",
    Deviation.Rule.MORTALITY: "Dead animals removed and examined; no film or odour; water changed; counts normal since.",
    Deviation.Rule.MISSED_CHECK: "Check done late; rota changed so weekend checks are covered.",
    Deviation.Rule.FEEDING_OVERDUE: "Fed the same day; feeding added to the shared rota.",
    Deviation.Rule.WATER_CHANGE_OVERDUE: "Water changed the same day; reserve water prepared a day ahead now.",
    Deviation.Rule.CENSUS_OVERDUE: "Census done the next morning.",
}


def _action_for(dev) -> str:
    for code, first, last, key, fn, action in EXCURSIONS:
        if dev.tank and dev.tank.code == code and action and dev.parameter in (key, "", "do_pct_sat", "nh3_mg_l"):
            return action
    return GENERIC_ACTIONS.get(dev.rule, "")


def _marine_conductivity_us_cm(salinity: float, temp_c: float) -> float:
    """Invert PSS-78 so the demo's marine conductivity agrees with its salinity."""
    return 1000.0 * brentq(lambda c: chemistry._pss78_salinity(c / chemistry.C_35_15_0_MS_CM, 1.00024 * temp_c, 0.0)
                           - salinity, 1.0, 80.0)


def _census(rng, tank, population, when, user) -> Census:
    sp = tank.species.scientific_name
    if sp.startswith("Lumb"):
        # Aliquot method: culture stirred into 1000 mL, five 20 mL aliquots counted.
        mean = population * 20 / 1000
        counts = [max(0, int(round(rng.gauss(mean, math.sqrt(mean) * 1.3)))) for _ in range(5)]
        census = Census(tank=tank, observed_at=when, recorded_by=user, method=Census.Method.ALIQUOT,
                        aliquot_counts=counts, aliquot_ml=20.0, total_ml=1000.0)
    else:
        count = max(1, int(round(population + rng.gauss(0, 0.03 * population))))
        census = Census(tank=tank, observed_at=when, recorded_by=user, method=Census.Method.DIRECT, direct_count=count)
    return apply_estimate(census)
