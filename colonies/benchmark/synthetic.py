"""A synthetic facility of any size, for the benchmark: deterministic for a seed and a day.

Invented like the demo (colonies/demo.py): the Quillmoor Culture Facility's north wing, up to 12
rooms of blackworms (LV), planarians (SM) and marine bristle worms (PD), with the demo's tank codes
(LV-01, SM-01, PD-01...) and typical values. Records are written with direct bulk inserts in large
batches (fastinsert.py), each with its history row (recorded by, at the entry time), as real use would leave them. The
species care profiles are the ones the migrations installed. Runs in one transaction.
"""
import hashlib
import math
import random
import time
from dataclasses import dataclass, field
from datetime import timedelta

from django.contrib.auth.hashers import make_password
from django.contrib.auth.models import Group, User
from django.db import connection, transaction
from django.utils import timezone
from simple_history.utils import bulk_create_with_history

from colonies import demo, parameters
from colonies.flags import flags_for
from colonies.models import Census, Check, Feeding, Room, Species, Tank, TankTarget, WaterChange
from colonies.roles import MANAGER, RESEARCHER, TECHNICIAN

# Which readings the synthetic technicians take every day (the rest every 7th day). Fixed here, not read from
# the measurement plans, so a facility built today has the same rows as one built before the plans existed.
MEASURED_DAILY = {"temp_c", "ph", "do_mg_l", "salinity"}

from . import fastinsert, followup

PASSWORD = "bench-worms-2026"
BATCH = 5000  # rows per INSERT statement
FLUSH = 40000  # records held in memory before they are written
SPECIES_SHARE = (("LV", 0.5), ("SM", 0.25), ("PD", 0.25))
ROOM_PLAN = ["LV", "SM", "PD", "LV", "LV", "SM", "PD", "LV", "LV", "SM", "PD", "LV"]
ROOM_NAMES = {"LV": ("fw", "Freshwater room"), "SM": ("pl", "Planarian room"), "PD": ("mar", "Marine room")}
SPECIES = {"LV": "Lumbriculus variegatus", "SM": "Schmidtea mediterranea", "PD": "Platynereis dumerilii"}
USERS = [  # invented people, like the demo's
    ("bench-tech-1", TECHNICIAN), ("bench-tech-2", TECHNICIAN), ("bench-tech-3", TECHNICIAN),
    ("bench-tech-4", TECHNICIAN), ("bench-researcher-1", RESEARCHER), ("bench-researcher-2", RESEARCHER),
    ("bench-manager", MANAGER),
]
MISSED_CHECK_RATE = 0.004  # a check skipped (the scan would open a missed-check deviation)
EXCURSION_RATE = 0.0045  # per tank and day: a reading pushed outside its target for 1-3 days
EXCURSION_KEYS = ("temp_c", "do_mg_l", "tan_mg_l", "ph")


@dataclass
class Facility:
    """What the builder made; events feed the deviations and the summary."""
    today: object
    start: object
    users: dict
    tanks: list
    targets: dict
    excursions: list = field(default_factory=list)  # (tank, check, key, action) on flagged checks
    missed: list = field(default_factory=list)  # (tank, due datetime)
    deaths: list = field(default_factory=list)  # (tank, check) with many dead
    counts: dict = field(default_factory=dict)
    seconds: dict = field(default_factory=dict)


def room_plan(n_tanks: int) -> list[tuple[str, str, str, str]]:
    """Rooms (code, name, prefix, species) for a facility of n tanks: 8-40 tanks a room, at most 12 rooms."""
    n_rooms = min(12, max(3, math.ceil(n_tanks / 34)))
    seen: dict[str, int] = {}
    rooms = []
    for prefix in ROOM_PLAN[:n_rooms]:
        seen[prefix] = seen.get(prefix, 0) + 1
        code, name = ROOM_NAMES[prefix]
        rooms.append((f"{code}-{seen[prefix]}", f"{name} {seen[prefix]}", prefix, SPECIES[prefix]))
    return rooms


def tank_numbers(n_tanks: int) -> dict[str, int]:
    counts = {prefix: int(n_tanks * share) for prefix, share in SPECIES_SHARE}
    counts["LV"] += n_tanks - sum(counts.values())
    return counts


def _users() -> dict:
    users: dict[str, list] = {}
    password = make_password(PASSWORD)  # hashed once: the slow hasher is not what we measure
    for username, role in USERS:
        user = User.objects.create(username=username, email=f"{username}@quillmoor.invalid", password=password,
                                   first_name=username.split("-")[1].title(), last_name=username.split("-")[-1])
        group, _ = Group.objects.get_or_create(name=role)
        user.groups.add(group)
        if role == MANAGER:
            user.is_staff = True
            user.save()
        users.setdefault(role, []).append(user)
    users["superuser"] = [User.objects.create(username="bench-admin", email="bench-admin@quillmoor.invalid",
                                              password=password, is_staff=True, is_superuser=True)]
    return users


def _tanks(rng, n_tanks: int, start, manager) -> list[Tank]:
    rooms = room_plan(n_tanks)
    room_rows = [Room(code=c, name=name, notes="Quillmoor Culture Facility, north wing (synthetic benchmark).")
                 for c, name, _p, _s in rooms]
    saved = {r.code: r for r in bulk_create_with_history(room_rows, Room, default_user=manager)}
    species = {s.scientific_name: s for s in Species.objects.all()}
    tanks = []
    for prefix, total in tank_numbers(n_tanks).items():
        mine = [r[0] for r in rooms if r[2] == prefix] or [r[0] for r in rooms if r[2] == "LV"]
        for i in range(total):
            shelf = i // len(mine)
            tanks.append(Tank(code=f"{prefix}-{i + 1:02d}", room=saved[mine[i % len(mine)]],
                              species=species[SPECIES[prefix]],
                              position=f"rack {1 + shelf // 8}, shelf {'ABCDEFGH'[shelf % 8]}",
                              volume_l={"LV": 2.0, "SM": 1.5, "PD": 4.0}[prefix],
                              system=Tank.System.RECIRCULATING if prefix == "PD" else Tank.System.STATIC,
                              substrate={"LV": "shredded unbleached paper towel", "SM": "none (bare glass)",
                                         "PD": "none; algal film on walls"}[prefix],
                              started_on=start - timedelta(days=rng.randint(10, 200))))
    bulk_create_with_history(tanks, Tank, batch_size=BATCH, default_user=manager, default_change_reason="Set up")
    # A few tanks quarantined, a few with their own temperature target (as in the demo).
    for t in tanks[23::53]:  # never LV-01..LV-10, which the trials draw from
        t.status, t._change_reason, t._history_user = Tank.Status.QUARANTINE, "Arrival of new animals", manager
        t.save()
    overrides = [TankTarget(tank=t, parameter="temp_c", low=18.0, high=22.0, reason="Cool-acclimated line.")
                 for t in tanks[9::61] if t.species.scientific_name == SPECIES["LV"]]
    bulk_create_with_history(overrides, TankTarget, default_user=manager)
    return tanks


class Writer:
    """Buffers records and writes them (with history) in large batches."""

    def __init__(self, counts: dict):
        self.buffers = {Check: [], Feeding: [], WaterChange: [], Census: []}
        self.counts = counts

    def add(self, record) -> None:
        buffer = self.buffers[type(record)]
        buffer.append(record)
        if len(buffer) >= FLUSH:
            self.flush(type(record))

    def flush(self, model=None) -> None:
        for m in [model] if model else list(self.buffers):
            rows = self.buffers[m]
            if rows:
                fastinsert.insert_with_history(m, rows, "Entered")
                self.counts[m._meta.model_name] = self.counts.get(m._meta.model_name, 0) + len(rows)
                self.buffers[m] = []


def _off_target(rng, key: str, target) -> float:
    p = parameters.get(key)
    if target is None or (target.low is None and target.high is None):
        return None
    span = (target.high - target.low) if target.low is not None and target.high is not None else \
        abs(target.high if target.high is not None else target.low) * 0.3 + 0.1
    if target.high is not None and (target.low is None or rng.random() < 0.6):
        value = target.high + span * rng.uniform(0.1, 0.8)
    else:
        value = target.low - span * rng.uniform(0.1, 0.6)
    return round(min(p.maximum, max(p.minimum, value)), 3)


def _tank_records(rng, f: Facility, tank: Tank, writer: Writer, days: int, now, tz) -> None:
    prefix = tank.code.split("-")[0]
    sp = tank.species
    profile = demo.PROFILE[sp.scientific_name]
    targets = f.targets[tank.pk]
    techs = f.users[TECHNICIAN]
    n0 = rng.uniform(500, 900) if prefix == "LV" else rng.uniform(40, 70) if prefix == "SM" else rng.uniform(30, 45)
    k = sp.max_density_per_l * tank.volume_l * rng.uniform(0.6, 0.95)
    r = rng.uniform(0.035, 0.06) if prefix == "LV" else rng.uniform(0.02, 0.035)
    drift = {key: 0.0 for key in profile}
    food, amount, unit = demo.FOOD[sp.scientific_name]
    excursion = None  # (key, last day, action)
    first_room = tank.room.code == f.tanks[0].room.code
    for day in range(days + 1):
        date = f.start + timedelta(days=day)
        is_today = day == days
        if is_today and not first_room:
            continue  # today's round is under way: only the first room is done
        when = demo._at(date, 8 + rng.randint(0, 1), rng.randint(0, 59), tz)
        if when > now:
            when = now - timedelta(minutes=5)
        if not is_today and rng.random() < MISSED_CHECK_RATE:
            f.missed.append((tank, when))
            continue
        user = rng.choice(techs)
        readings = {}
        for key, (centre, sd) in profile.items():
            if key not in MEASURED_DAILY and day % 7 != 0:
                continue
            drift[key] = 0.8 * drift[key] + rng.gauss(0, sd * 0.3)
            readings[key] = round(max(0.0, centre + drift[key] + rng.gauss(0, sd * 0.4)), 3)
        if tank.pk in f.cool:
            readings["temp_c"] = round(readings["temp_c"] - 3.0, 3)
        if excursion is None and not is_today and rng.random() < EXCURSION_RATE:
            key = rng.choice([k for k in EXCURSION_KEYS if k in targets])
            action = rng.choice(list(followup.ACTIONS))
            excursion = (key, day + rng.randint(0, 2), action)
        off = None
        if excursion:
            off = _off_target(rng, excursion[0], targets.get(excursion[0]))
            if off is not None:
                readings[excursion[0]] = off
        if "salinity" in readings and "conductivity_us_cm" in readings:
            readings["conductivity_us_cm"] = round(
                demo._marine_conductivity_us_cm(readings["salinity"], readings["temp_c"]) * rng.gauss(1, 0.004))
        population = demo._logistic(day, n0, k, r)
        dead = rng.randint(1, 2 if population < 200 else 4) if rng.random() < 0.12 else 0
        if off is not None and excursion[0] in ("temp_c", "do_mg_l", "tan_mg_l") and rng.random() < 0.4:
            dead += rng.randint(8, 30) if population > 200 else rng.randint(3, 6)
        check = Check(tank=tank, observed_at=when, recorded_by=user, dead_removed=dead,
                      activity=Check.Activity.REDUCED if off is not None else Check.Activity.NORMAL,
                      clumping=prefix == "LV" and rng.random() < 0.7,
                      clarity=Check.Clarity.CLEAR if rng.random() < 0.9 else Check.Clarity.CLOUDY,
                      corrective_action=followup.ACTIONS[excursion[2]] if off is not None and day < days - 1 else "",
                      **readings)
        check.flags = flags_for(check.values(), targets)
        writer.add(check)
        if check.flags:
            f.excursions.append((tank, check, excursion[2] if excursion else None))
        if dead >= 5:
            f.deaths.append((tank, check))
        if excursion and day >= excursion[1]:
            excursion = None
        if not is_today and day % sp.feeding_interval_days == 0:
            scale = max(0.5, population / 1000) if unit == "g" else 1
            writer.add(Feeding(tank=tank, observed_at=when + timedelta(minutes=10), recorded_by=user,
                               food=food, amount=round(amount * scale, 3), unit=unit))
        if not is_today and day % sp.water_change_interval_days == 0:
            writer.add(WaterChange(tank=tank, observed_at=when + timedelta(minutes=20), recorded_by=user,
                                   percent=sp.water_change_fraction * 100, source_water=demo.SOURCE_WATER[sp.scientific_name]))
        if day % sp.census_interval_days == 3:
            writer.add(demo._census(rng, tank, population, when + timedelta(minutes=30), user))


def _stamp(records, rng, now) -> None:
    """Entered a few minutes after the work (1 in 100 the next morning); history dated and signed then."""
    for record in records:
        late = rng.random() < 0.01
        delay = timedelta(hours=rng.uniform(20, 26)) if late else timedelta(minutes=rng.randint(1, 25))
        record.recorded_at = min(now, record.observed_at + delay)
        record._history_date = record.recorded_at
        record._history_user = record.recorded_by


class StampingWriter(Writer):
    def __init__(self, counts, rng, now):
        super().__init__(counts)
        self.rng, self.now = rng, now

    def flush(self, model=None) -> None:
        for m in [model] if model else list(self.buffers):
            _stamp(self.buffers[m], self.rng, self.now)
        super().flush(model)


def build(*, tanks: int = 400, days: int = 1095, seed: int = 7, today=None, progress=None, trials: bool = True) -> dict:
    """Fill the (empty, migrated) default database with a facility; return counts, checksum, timings.

    trials=False leaves out protocols, bookings and studies (the demo's own tests cover those).
    """
    if tanks < 1 or days < 1:
        raise ValueError(f"tanks={tanks}, days={days}: both must be at least 1.")
    rng = random.Random(seed)
    tz = timezone.get_current_timezone()
    today = today or timezone.localdate()
    now = timezone.now()
    say = progress or (lambda msg: None)
    with transaction.atomic():
        started = time.perf_counter()
        users = _users()
        manager = users[MANAGER][0]
        tank_rows = _tanks(rng, tanks, today - timedelta(days=days), manager)
        loaded = list(Tank.objects.select_related("room", "species").prefetch_related("species__targets",
                                                                                       "target_overrides"))
        f = Facility(today=today, start=today - timedelta(days=days), users=users,
                     tanks=sorted(loaded, key=lambda t: (t.room.code, t.code)),
                     targets={t.pk: t.care_targets() for t in loaded})
        f.cool = {t.pk for t in loaded if any(o.parameter == "temp_c" for o in t.target_overrides.all())}
        f.seconds["facility"] = time.perf_counter() - started
        started = time.perf_counter()
        writer = StampingWriter(f.counts, rng, now)
        for i, tank in enumerate(f.tanks):
            _tank_records(rng, f, tank, writer, days, now, tz)
            if (i + 1) % 50 == 0:
                say(f"  records: {i + 1}/{len(f.tanks)} tanks generated, {f.counts.get('check', 0)} checks written so far")
        writer.flush()
        record_models = list(writer.buffers)
        fastinsert.reset_sequences(record_models + [m.history.model for m in record_models])
        f.seconds["records"] = time.perf_counter() - started
        started = time.perf_counter()
        f.counts["deviation"] = followup.deviations(rng, f, now)
        f.seconds["deviations"] = time.perf_counter() - started
        if trials:
            started = time.perf_counter()
            f.counts.update(followup.trials(rng, f, seed, now))
            f.seconds["trials"] = time.perf_counter() - started
    f.counts.update(tanks=len(tank_rows), rooms=Room.objects.count(), users=User.objects.count())
    started = time.perf_counter()
    gather_statistics()
    f.seconds["statistics"] = time.perf_counter() - started
    return {"counts": f.counts, "checksum": checksum(), "build_seconds": {k: round(v, 2) for k, v in f.seconds.items()},
            "today": today.isoformat()}


def gather_statistics():
    """ANALYZE on PostgreSQL, as autovacuum would soon after a facility's records arrived.

    Without table statistics the planner guesses one row per tank and sorts each tank's feedings and
    censuses instead of reading the (tank, observed_at) index: Today's query took 137 ms instead of
    9 ms on a freshly built full-size facility. A lab's own database has statistics; a benchmark
    without them would time a state no facility is in. SQLite gathers none unless asked (Django never
    asks), so it is left as a lab's file would be.
    """
    if connection.vendor == "postgresql":
        with connection.cursor() as cursor:
            cursor.execute("ANALYZE")


def counts() -> dict:
    """What a database holds (for a reused one, whose build counts are not at hand)."""
    from colonies.models import Deviation
    models = {"tanks": Tank, "rooms": Room, "users": User, "check": Check, "feeding": Feeding,
              "water change": WaterChange, "census": Census, "deviation": Deviation}
    return {name: model.objects.count() for name, model in models.items()}


def checksum() -> str:
    """A digest of the generated values (not of ids or times of day), equal for equal seeds."""
    digest = hashlib.sha256()
    rows = Check.objects.order_by("tank__code", "observed_at").values_list(
        "tank__code", "temp_c", "ph", "do_mg_l", "dead_removed", "flags")
    for row in rows.iterator(chunk_size=5000):
        digest.update(repr(row).encode())
    for model in (Feeding, WaterChange, Census):
        digest.update(f"{model.__name__}:{model.objects.count()}".encode())
    digest.update(repr(sorted(Census.objects.values_list("tank__code", "estimate")[:2000])).encode())
    return digest.hexdigest()[:16]
