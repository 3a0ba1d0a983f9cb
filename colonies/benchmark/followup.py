"""What follows the records in the synthetic facility: deviations in every state, bookings, trials.

Deviations are written directly (not by running the rules, which is what the benchmark times) in the
shape the rules leave them: same evidence refs, one unresolved per tank/rule/parameter, older ones
closed with a corrective action, and a history row for opening, acknowledging and closing.
"""
from datetime import datetime, time, timedelta

from django.utils import timezone
from simple_history.utils import bulk_create_with_history

from colonies import derived
from colonies.deviations import severity_outside
from colonies.models import Deviation, Tank
from colonies.roles import MANAGER, RESEARCHER, TECHNICIAN

ACTIONS = {  # invented corrective actions, by cause
    "heater": "Heater thermostat stuck; heater replaced and tank brought back with a partial water change.",
    "aeration": "Air line kinked behind the rack; replaced and aeration checked.",
    "feeding": "Uneaten food removed, full water change, feeding skipped once.",
    "meter": "Re-measured with a calibrated meter; the first reading was a meter fault.",
    "room": "Room air conditioning fault reported to facilities; tanks watched until fixed.",
}
EPISODE_GAP = timedelta(days=3)  # flagged checks closer than this belong to one deviation
RECENT = timedelta(days=4)  # deviations last seen more recently than this are still unresolved
BOOKINGS_PER_TANK_DAY = 0.0016  # ~700 bookings over 400 tanks and 3 years


def _local(dt) -> str:
    return timezone.localtime(dt).strftime("%Y-%m-%d %H:%M")


def _findings(f) -> list[tuple]:
    """(tank, rule, parameter, at, evidence, severity, summary, cause) for every flagged event."""
    out = []
    for tank, check, cause in f.excursions:
        targets = f.targets[tank.pk]
        for key, flag in check.flags.items():
            entry = derived.label_for(key)
            target = targets[key]
            out.append((tank, Deviation.Rule.OUT_OF_TARGET, key, check.observed_at,
                        {"ref": f"check:{check.pk}:{key}", "check": check.pk, "at": _local(check.observed_at),
                         "value": flag["value"], "low": flag["low"], "high": flag["high"], "side": flag["side"]},
                        severity_outside(flag["value"], target),
                        f"{entry.label} {entry.format(flag['value'])} {entry.unit} "
                        f"{'below' if flag['side'] == 'low' else 'above'} target {target.text(entry.unit)}", cause))
    for tank, check in f.deaths:
        out.append((tank, Deviation.Rule.MORTALITY, "", check.observed_at,
                    {"ref": f"check:{check.pk}:dead", "check": check.pk, "at": _local(check.observed_at),
                     "dead": check.dead_removed},
                    Deviation.Severity.MODERATE, f"{check.dead_removed} dead removed (above baseline)", None))
    for tank, due in f.missed:
        out.append((tank, Deviation.Rule.MISSED_CHECK, "", due + timedelta(hours=6),
                    {"ref": f"due:{due.isoformat()}", "due": _local(due)},
                    Deviation.Severity.MINOR, f"Daily check missed (due {_local(due)})", None))
    return out


def _episodes(findings) -> list[dict]:
    by_key: dict[tuple, list] = {}
    for item in sorted(findings, key=lambda x: (x[0].code, x[1], x[2], x[3])):
        by_key.setdefault((item[0].pk, item[1], item[2]), []).append(item)
    episodes = []
    for key, items in by_key.items():
        current = None
        for item in items:
            if current is None or item[3] - current["last"] > EPISODE_GAP:
                current = {"key": key, "tank": item[0], "first": item[3], "last": item[3], "items": [],
                           "cause": item[7], "is_last": False}
                episodes.append(current)
            current["items"].append(item)
            current["last"] = item[3]
        current["is_last"] = True
    return episodes


def _history(dev, date, kind, user, reason, **state):
    model = Deviation.history.model
    values = {fld.attname: getattr(dev, fld.attname) for fld in model.tracked_fields}
    values.update(state)
    return model(history_date=date, history_type=kind, history_user=user, history_change_reason=reason, **values)


def deviations(rng, f, now) -> int:
    techs, manager = f.users[TECHNICIAN], f.users[MANAGER][0]
    rows, answered = [], []
    for ep in _episodes(_findings(f)):
        tank_id, rule, parameter = ep["key"]
        items = ep["items"]
        dev = Deviation(tank_id=tank_id, rule=rule, parameter=parameter, severity=max(i[5] for i in items),
                        opened_at=ep["first"], last_seen_at=ep["last"], summary=items[-1][6][:300],
                        evidence=[i[4] for i in items][-60:], evidence_count=len(items))
        if ep["is_last"] and now - ep["last"] < RECENT:
            if rng.random() < 0.5:
                who = rng.choice(techs)
                dev.status, dev.acknowledged_at, dev.acknowledged_by = (Deviation.Status.ACKNOWLEDGED,
                                                                        ep["last"] + timedelta(hours=2), who)
        else:
            who = manager if dev.severity == Deviation.Severity.MAJOR else rng.choice(techs)
            delay = timedelta(hours=rng.uniform(1, 30))
            dev.status = Deviation.Status.CLOSED
            dev.acknowledged_at, dev.acknowledged_by = ep["last"] + delay / 3, who
            dev.closed_at, dev.closed_by = ep["last"] + delay, who
            dev.corrective_action = ACTIONS.get(ep["cause"]) or "Checked the tank and its equipment; normal at the next check."
        rows.append(dev)
    saved = Deviation.objects.bulk_create(rows, batch_size=2000)  # history written below, one row per step
    history = []
    for dev in saved:
        blank = dict(status=Deviation.Status.OPEN, acknowledged_at=None, acknowledged_by_id=None, closed_at=None,
                     closed_by_id=None, corrective_action="")
        history.append(_history(dev, dev.opened_at, "+", None, "Opened by rule", **blank))
        if dev.acknowledged_at:
            state = dict(blank, status=Deviation.Status.ACKNOWLEDGED, acknowledged_at=dev.acknowledged_at,
                         acknowledged_by_id=dev.acknowledged_by_id)
            history.append(_history(dev, dev.acknowledged_at, "~", dev.acknowledged_by, "Acknowledged", **state))
        if dev.closed_at:
            history.append(_history(dev, dev.closed_at, "~", dev.closed_by, "Closed with corrective action"))
    Deviation.history.model.objects.bulk_create(history, batch_size=2000)
    return len(saved)


def _protocol(f, manager):
    from experiments.models import Protocol
    p = Protocol(reference="QAW-2023-002", title="Culture sampling for teaching and pilot counts (synthetic)",
                 approver="Dr Halvard Pennick, Quillmoor animal welfare body", approved_on=f.start - timedelta(days=10),
                 starts_on=f.start - timedelta(days=5), expires_on=f.today + timedelta(days=400),
                 status=Protocol.Status.APPROVED, max_animals_per_trial=12, max_exposures_per_group=3,
                 min_rest_hours=24)
    p._history_user, p._change_reason = manager, "Entered from the approval letter"
    p.save()
    return p


def trials(rng, f, seed: int, now) -> dict:
    """The demo's protocols, cohorts and two studies (if LV-01..LV-10 exist), then bulk bookings."""
    from experiments import demo as trials_demo
    from experiments.models import Booking, Cohort, Study, Trial

    from .synthetic import PASSWORD  # synthetic imports this module; its users sign the demo's approvals
    counts = {}
    lv = set(Tank.objects.filter(code__in=[f"LV-{i:02d}" for i in range(1, 11)]).values_list("code", flat=True))
    if len(lv) == 10:
        trials_demo.load(seed=seed, now=now, users={k: v for k, v in f.users.items()
                                                    if k in (RESEARCHER, MANAGER)}, password=PASSWORD)
    manager, researchers = f.users[MANAGER][0], f.users[RESEARCHER]
    protocol = _protocol(f, manager)
    days = (f.today - f.start).days
    n = max(3, round(BOOKINGS_PER_TANK_DAY * len(f.tanks) * days))
    bookings = []
    for _ in range(n):
        tank = rng.choice(f.tanks)
        needed = f.start + timedelta(days=rng.randint(5, days + 30))
        who = rng.choice(researchers)
        booked = timezone.make_aware(datetime.combine(needed - timedelta(days=rng.randint(1, 10)), time(10)))
        b = Booking(protocol=protocol, tank=tank, species=tank.species, animals=rng.randint(5, 24), needed_on=needed,
                    purpose=rng.choice(["Teaching lab sample", "Pilot counts", "Regeneration pilot", "Spare animals"]),
                    booked_by=who, booked_at=min(booked, now))
        if rng.random() < 0.2:
            b.status, b.cancelled_at, b.cancelled_by = Booking.Status.CANCELLED, b.booked_at + timedelta(hours=5), who
            b.cancel_reason = "Not needed after all."
        elif needed < f.today:
            b.status = Booking.Status.EXPIRED
        b._history_user, b._history_date = who, b.booked_at
        bookings.append(b)
    bulk_create_with_history(bookings, Booking, batch_size=2000, default_change_reason="Booked")
    counts.update(booking=Booking.objects.count(), cohort=Cohort.objects.count(), study=Study.objects.count(),
                  trial=Trial.objects.count())
    return counts
