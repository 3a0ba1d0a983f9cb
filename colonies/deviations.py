"""The deviation engine: rules that turn husbandry records into deviations.

Two kinds of rule:
- record rules run when checks are saved (`evaluate_checks`): reading or derived value outside the
  care target, mortality above baseline, drift on a control chart; the mortality rule also runs when
  dead animals removed outside the round are saved (`evaluate_removals`);
- scan rules run from `python manage.py scan_deviations` (`scan`): missed checks and overdue
  feeding, water change and census.

A rule returns `Finding`s; `apply_findings` turns them into deviations. An ongoing problem keeps a
single unresolved deviation per (tank, rule, parameter, subject), which gains evidence; each piece
of evidence has a `ref` so running a rule twice on the same records adds nothing. Nothing closes a
deviation automatically: a value back in range is new evidence, not a corrective action.

The record rules themselves live in colonies/record_rules.py and read checks as columns
(colonies/check_frames.py). Later rules (stocking density, protocol limits) register with
`record_rule` / `scan_rule`, or call `apply_findings` directly.
"""
from collections import defaultdict
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from datetime import datetime, timedelta

from django.db import IntegrityError, transaction
from django.db.models import Max, Min, OuterRef, Q, Subquery
from django.utils import timezone
from simple_history.utils import bulk_create_with_history, bulk_update_with_history

from vermilog.lab_time import lab_moment

from . import check_frames
from .check_frames import HISTORY_DAYS, WINDOW_DAYS, CheckFrame  # noqa: F401 (HISTORY_DAYS, WINDOW_DAYS: API)
from .flags import Target
from .models import EVIDENCE_KEEP, ArchivedEvidence, Census, Check, DeadRemoval, Deviation, Tank, overdue_grace

Severity = Deviation.Severity
Rule = Deviation.Rule


@dataclass(frozen=True)
class Finding:
    tank_id: int | None
    rule: str
    severity: int
    summary: str
    evidence: dict  # must carry a "ref" that identifies the underlying record/event
    at: datetime
    parameter: str = ""
    subject: str = ""

    @property
    def key(self) -> tuple:
        return (self.tank_id, self.rule, self.parameter, self.subject)


@dataclass
class Outcome:
    created: list = field(default_factory=list)
    updated: list = field(default_factory=list)

    def __str__(self):
        return f"{len(self.created)} opened, {len(self.updated)} updated"


RecordRule = Callable[[CheckFrame], Iterable[Finding]]
ScanRule = Callable[[list[Tank], datetime], Iterable[Finding]]
RECORD_RULES: list[RecordRule] = []
SCAN_RULES: list[ScanRule] = []


def record_rule(fn: RecordRule) -> RecordRule:
    RECORD_RULES.append(fn)
    return fn


def scan_rule(fn: ScanRule) -> ScanRule:
    SCAN_RULES.append(fn)
    return fn


# ---------------------------------------------------------------------------------------------
# Severity
# ---------------------------------------------------------------------------------------------
def severity_outside(value: float, target: Target) -> int:
    """How far outside the target: within 10 % of the band (or of the limit, for a one-sided
    target) is minor, within 50 % moderate, beyond that major."""
    if target.low is not None and target.high is not None and target.high > target.low:
        scale = target.high - target.low
    else:
        limit = target.low if target.low is not None else target.high
        scale = abs(limit) if limit else 1.0
    if target.low is not None and value < target.low:
        distance = target.low - value
    elif target.high is not None and value > target.high:
        distance = value - target.high
    else:
        return 0
    ratio = distance / scale
    if ratio <= 0.10:
        return Severity.MINOR
    if ratio <= 0.50:
        return Severity.MODERATE
    return Severity.MAJOR


# ---------------------------------------------------------------------------------------------
# Running the record rules
# ---------------------------------------------------------------------------------------------
def local_text(dt: datetime) -> str:
    """A time in the evidence (stored data): ISO-like, local to the lab; pages show it the lab's way."""
    return timezone.localtime(dt).strftime("%Y-%m-%d %H:%M")


def findings_in(frame: CheckFrame) -> list[Finding]:
    return [f for rule in RECORD_RULES for f in rule(frame)]


def evaluate_checks(checks: list[Check], now: datetime | None = None) -> Outcome:
    """Run every record rule on freshly saved checks (fixed number of queries for a round).

    Each check is judged against the current checks of its tank in the HISTORY_DAYS before it, as
    when it was saved, however large the batch; a large batch is read WINDOW_DAYS at a time.
    """
    checks = [c for c in checks if c.pk and not c.is_voided]
    if not checks:
        return Outcome()
    moments = [c.observed_at for c in checks]
    findings = []
    for frame in check_frames.frames(start=min(moments), stop=max(moments), tank_ids={c.tank_id for c in checks},
                                     only={c.pk for c in checks}):
        findings += findings_in(frame)
    return apply_findings(with_actions(findings), now=now)


def with_actions(findings: list[Finding]) -> list[Finding]:
    """The corrective action typed with a flagged value goes with the evidence it gives (one query): the
    deviation it opens or adds to records it, so nobody types it twice."""
    pks = {f.evidence["check"] for f in findings if "check" in f.evidence}
    if not pks:
        return findings
    actions = {pk: (action, user) for pk, action, user in Check.objects.filter(pk__in=pks).exclude(corrective_action="")
               .values_list("pk", "corrective_action", "recorded_by__username")}
    for f in findings:
        action = actions.get(f.evidence.get("check"))
        if action:
            f.evidence["action"], f.evidence["action_by"] = action
    return findings


def action_line(item: dict) -> str:
    return f"{item.get('at', '')} {item.get('action_by', '')}: {item['action']}".strip()


@transaction.atomic
def record_action(check: Check, *, user) -> list[Deviation]:
    """A corrective action added to a check after it was saved reaches the unresolved deviations that hold
    the check's evidence (the tank's row is locked first, as apply_findings does)."""
    action = check.corrective_action.strip()
    if not action:
        return []
    list(Tank.objects.select_for_update(no_key=True).filter(pk=check.tank_id).values_list("pk"))
    changed = []
    for dev in Deviation.objects.unresolved().filter(tank_id=check.tank_id):
        items = [e for e in dev.evidence if e.get("check") == check.pk]
        if not items:
            continue
        line = action_line({**items[-1], "action": action, "action_by": user.get_username()})
        if line not in dev.corrective_action:
            dev.corrective_action = "\n".join(x for x in (dev.corrective_action, line) if x)
            dev._history_user, dev._change_reason = user, "Corrective action added to the check"
            dev.save(update_fields=["corrective_action"])
            changed.append(dev)
    return changed


def evaluate_removals(removals: list[DeadRemoval], now: datetime | None = None) -> Outcome:
    """The mortality rule on freshly saved dead-animal removals, against the checks before each (a fixed number
    of queries for the batch; record_rules.removal_findings)."""
    from .record_rules import removal_findings  # record_rules imports this module

    removals = [r for r in removals if r.pk and not r.is_voided]
    if not removals:
        return Outcome()
    frame = check_frames.history_frame({r.tank_id for r in removals},
                                       start=min(r.observed_at for r in removals) - timedelta(days=HISTORY_DAYS),
                                       stop=max(r.observed_at for r in removals))
    return apply_findings(removal_findings(frame, removals), now=now)


@dataclass
class Rescan:
    checks: int = 0
    findings: int = 0
    opened: set = field(default_factory=set)  # ids of the deviations it opened
    updated: set = field(default_factory=set)  # ids of deviations it found open and added evidence to

    def judged(self) -> str:
        return f"{_count(self.checks, 'check')} judged, {_count(self.findings, 'finding')}"

    def __str__(self):
        return f"{self.judged()}; {len(self.opened)} opened, {len(self.updated - self.opened)} updated"


def _count(n: int, word: str) -> str:
    return f"{n} {word}{'' if n == 1 else 's'}"


def rescan(*, since: datetime | None = None, now: datetime | None = None, dry_run: bool = False) -> Rescan:
    """Run the record rules over every current check observed since `since` (all when None).

    Each check is judged as evaluate_checks judges it when it is saved (the same frames and rules),
    against the care targets and population estimate in force now. A window of WINDOW_DAYS at a
    time: memory stays bounded, and each window's findings are applied in their own transaction
    (unless the caller holds one), so the tanks' locks are held for one window, not the whole run.
    Idempotent: evidence refs make a second run add nothing.
    """
    now = now or timezone.now()
    checks = Check.objects.current()
    if since is not None:
        checks = checks.filter(observed_at__gte=since)
    span = checks.aggregate(first=Min("observed_at"), last=Max("observed_at"))
    report = Rescan()
    if span["first"] is None:
        return report
    for frame in check_frames.frames(start=span["first"], stop=span["last"]):
        findings = with_actions(findings_in(frame))
        report.checks += int(frame.judge.sum())
        report.findings += len(findings)
        if not dry_run:
            outcome = apply_findings(findings, now=now)
            report.opened.update(d.pk for d in outcome.created)
            report.updated.update(d.pk for d in outcome.updated)
    return report


# ---------------------------------------------------------------------------------------------
# Scan rules (time-based)
# ---------------------------------------------------------------------------------------------
def _overdue(tank, now, label, last, interval, rule):
    if last is None:
        due_at = timezone.make_aware(datetime.combine(tank.started_on, datetime.min.time())) + interval
    else:
        due_at = last + interval
    grace = overdue_grace(interval)  # the same grace the Today page uses
    if now <= due_at + grace:
        return None
    late = now - due_at
    periods = late / interval
    severity = Severity.MAJOR if periods >= 3 else Severity.MODERATE if periods >= 1 else Severity.MINOR
    hours = late.total_seconds() / 3600
    late_text = f"{hours:.0f} h" if hours < 48 else f"{hours / 24:.1f} days"
    return Finding(
        tank.pk, rule, severity,
        f"{label} {late_text} overdue (last {lab_moment(last) if last else 'never'}, due {lab_moment(due_at)})",
        {"ref": f"due:{due_at.isoformat()}", "last": local_text(last) if last else None, "due": local_text(due_at),
         "seen": local_text(now)},
        due_at,
    )


@scan_rule
def overdue_rule(tanks, now):
    for tank in tanks:
        s = tank.species
        plan = (
            ("Daily check", tank.last_check_at, timedelta(hours=s.check_interval_hours), Rule.MISSED_CHECK),
            ("Feeding", tank.last_feeding_at, timedelta(days=s.feeding_interval_days), Rule.FEEDING_OVERDUE),
            ("Water change", tank.last_water_change_at, timedelta(days=s.water_change_interval_days),
             Rule.WATER_CHANGE_OVERDUE),
            ("Census", tank.last_census_at, timedelta(days=s.census_interval_days), Rule.CENSUS_OVERDUE),
        )
        for label, last, interval, rule in plan:
            finding = _overdue(tank, now, label, last, interval, rule)
            if finding:
                yield finding


def scan(now: datetime | None = None, *, dry_run: bool = False) -> tuple[list[Finding], Outcome]:
    """Run the time-based rules over every tank in use. Idempotent: same records, same result."""
    now = now or timezone.now()
    tanks = list(Tank.objects.in_use().select_related("species").with_last_events())
    findings = [f for rule in SCAN_RULES for f in rule(tanks, now)]
    if dry_run:
        return findings, Outcome()
    return findings, apply_findings(findings, now=now)


# ---------------------------------------------------------------------------------------------
# Findings to deviations
# ---------------------------------------------------------------------------------------------
CONFLICT_RETRIES = 3  # a finding without a tank lost the race to insert its deviation: read again and retry
ARCHIVE_LOOKUP_CHUNK = 500  # refs per query against the evidence archive (databases cap a statement's parameters)


@transaction.atomic
def apply_findings(findings: list[Finding], now: datetime | None = None, user=None) -> Outcome:
    """Open a deviation per new problem, or add evidence to the unresolved one (fixed query count).

    Safe under concurrent writers (several technicians saving checks on one tank at once): the
    tanks' rows are locked first, in primary-key order so that two batches on overlapping tanks
    cannot deadlock, and held to the end of the caller's transaction; the unresolved deviations
    are read only after that, so each writer sees the evidence the one before it committed. The
    lock is FOR NO KEY UPDATE on PostgreSQL: the checks just inserted in the same transaction hold
    FOR KEY SHARE on their tank (foreign key), which a plain FOR UPDATE would wait on, two writers
    then deadlocking. SQLite serialises writers at BEGIN IMMEDIATE (settings) instead.
    Findings about no tank (a subject alone) have no row to lock: their deviations are locked
    when they exist, and a lost race to insert one is retried inside a savepoint.
    """
    if not findings:
        return Outcome()
    now = now or timezone.now()
    tank_ids = sorted({f.tank_id for f in findings if f.tank_id is not None})
    if tank_ids:
        list(Tank.objects.select_for_update(no_key=True).filter(pk__in=tank_ids).order_by("pk").values_list("pk"))
    if all(f.tank_id is not None for f in findings):
        return _apply_findings(findings, now, user)
    for attempt in range(CONFLICT_RETRIES):
        try:
            with transaction.atomic():
                return _apply_findings(findings, now, user)
        except IntegrityError:
            if attempt == CONFLICT_RETRIES - 1:
                raise


def _apply_findings(findings: list[Finding], now: datetime, user) -> Outcome:
    outcome = Outcome()
    tank_ids = {f.tank_id for f in findings if f.tank_id is not None}
    subjects = {f.subject for f in findings if f.tank_id is None}
    unresolved = Deviation.objects.unresolved().filter(rule__in={f.rule for f in findings})
    existing = {}
    for dev in unresolved.filter(tank_id__in=tank_ids) if tank_ids else []:
        existing[(dev.tank_id, dev.rule, dev.parameter, dev.subject)] = dev
    if subjects:
        for dev in unresolved.filter(tank__isnull=True, subject__in=subjects).select_for_update(no_key=True):
            existing[(None, dev.rule, dev.parameter, dev.subject)] = dev
    # Evidence already counted is not added again: refs a deviation shows or has archived, open or
    # closed. A finding about the same record as a closed deviation (a correction re-running the rules
    # on an old check, a rescan) must not reopen it. One query, two when a deviation has archived some.
    seen = set()
    truncated = {}  # id -> key of the deviations holding more evidence than they show
    earliest = min(f.at for f in findings)
    closed = Deviation.objects.filter(status=Deviation.Status.CLOSED, rule__in={f.rule for f in findings},
                                      last_seen_at__gte=earliest)
    closed = closed.filter(tank_id__in=tank_ids) if not subjects else closed.filter(
        Q(tank_id__in=tank_ids) | Q(tank__isnull=True, subject__in=subjects))
    for dev in [*existing.values(), *closed.only("tank_id", "rule", "parameter", "subject", "evidence",
                                                 "evidence_count")]:
        key = (dev.tank_id, dev.rule, dev.parameter, dev.subject)
        seen.update((key, e.get("ref")) for e in dev.evidence)
        if dev.evidence_count > len(dev.evidence):
            truncated[dev.pk] = key
    seen |= _archived(truncated, {f.evidence["ref"] for f in findings if f.key in truncated.values()})
    new: dict[tuple, Deviation] = {}
    changed: dict[int, Deviation] = {}
    archive: dict[tuple, list[dict]] = defaultdict(list)  # evidence pushed out of the newest EVIDENCE_KEEP
    for f in sorted(findings, key=lambda f: f.at):
        if (f.key, f.evidence["ref"]) in seen:
            continue
        seen.add((f.key, f.evidence["ref"]))
        dev = existing.get(f.key) or new.get(f.key)
        if dev is None:
            new[f.key] = Deviation(
                tank_id=f.tank_id, rule=f.rule, parameter=f.parameter, subject=f.subject, severity=f.severity,
                opened_at=f.at, last_seen_at=f.at, summary=f.summary[:300], evidence=[f.evidence], evidence_count=1,
                corrective_action=action_line(f.evidence) if "action" in f.evidence else "",
            )
            continue
        if "action" in f.evidence and action_line(f.evidence) not in dev.corrective_action:
            dev.corrective_action = "\n".join(x for x in (dev.corrective_action, action_line(f.evidence)) if x)
        evidence = dev.evidence + [f.evidence]
        dev.evidence = evidence[-EVIDENCE_KEEP:]
        archive[f.key] += evidence[:-EVIDENCE_KEEP]
        dev.evidence_count += 1
        dev.last_seen_at = max(dev.last_seen_at, f.at)
        dev.severity = max(dev.severity, f.severity)
        dev.summary = f.summary[:300]
        if dev.pk:
            changed[dev.pk] = dev
    if new:
        outcome.created = bulk_create_with_history(
            list(new.values()), Deviation, default_user=user, default_change_reason="Opened by rule", default_date=now,
        )
        new = {(d.tank_id, d.rule, d.parameter, d.subject): d for d in outcome.created}
    if changed:
        bulk_update_with_history(
            list(changed.values()), Deviation,
            ["evidence", "evidence_count", "last_seen_at", "severity", "summary", "corrective_action"],
            default_user=user, default_change_reason="New evidence", default_date=now,
        )
        outcome.updated = list(changed.values())
    if archive:
        ArchivedEvidence.objects.bulk_create(
            ArchivedEvidence(deviation_id=(existing.get(key) or new[key]).pk, ref=item["ref"], item=item)
            for key, items in archive.items() for item in items)
    return outcome


def _archived(deviations: dict[int, tuple], refs: set[str]) -> set[tuple]:
    """(deviation key, ref) for each of `refs` that one of these deviations has archived."""
    found: set[tuple] = set()
    refs = sorted(refs)
    for chunk in range(0, len(refs), ARCHIVE_LOOKUP_CHUNK):
        found.update((deviations[pk], ref) for pk, ref in ArchivedEvidence.objects.filter(
            deviation_id__in=list(deviations), ref__in=refs[chunk:chunk + ARCHIVE_LOOKUP_CHUNK],
        ).values_list("deviation_id", "ref"))
    return found


# ---------------------------------------------------------------------------------------------
# Stocking density (censuses and splits)
# ---------------------------------------------------------------------------------------------
# Severity by how far the density is above the species maximum (a lab setting, not a published
# value): up to 10 % over is minor, up to 50 % moderate, beyond that major.
DENSITY_MODERATE_RATIO = 1.10
DENSITY_MAJOR_RATIO = 1.50


def density_finding(tank: Tank, estimate: float | None, at: datetime, ref: str, what: str) -> Finding | None:
    """A finding when `estimate` animals in the tank exceed its species' maximum density (needs tank.species)."""
    limit = tank.species.max_density_per_l
    if not limit or estimate is None or not tank.volume_l:
        return None
    density = estimate / tank.volume_l
    if density <= limit:
        return None
    ratio = density / limit
    severity = (Severity.MAJOR if ratio > DENSITY_MAJOR_RATIO
                else Severity.MODERATE if ratio > DENSITY_MODERATE_RATIO else Severity.MINOR)
    return Finding(
        tank.pk, Rule.STOCKING_DENSITY, severity,
        f"{density:.0f} animals/L ({what} {estimate:.0f} animals in {tank.volume_l:g} L) is above the maximum "
        f"{limit} animals/L ({100 * ratio:.0f} %)",
        {"ref": ref, "at": local_text(at), "estimate": round(estimate, 1), "volume_l": tank.volume_l,
         "density_per_l": round(density, 2), "max_per_l": limit},
        at,
    )


def evaluate_censuses(censuses) -> Iterable[Finding]:
    """Record rule for censuses: each current census whose estimate is above the maximum density."""
    censuses = [c for c in censuses if c.pk and not c.is_voided and c.estimate is not None]
    if not censuses:
        return
    tanks = Tank.objects.select_related("species").in_bulk({c.tank_id for c in censuses})
    for c in censuses:
        finding = density_finding(tanks[c.tank_id], c.estimate, c.observed_at, f"census:{c.pk}", "census estimate")
        if finding:
            yield finding


def latest_estimates(tank_ids) -> dict[int, tuple[float, datetime, str, str]]:
    """Each tank's newest population estimate: (animals, when, evidence ref, what), four queries.

    The newest of: its latest current census, the animals that stayed at its latest split, and
    (for a tank set up by a split) the animals moved into it. Animals split into an existing tank
    after that are added to it, as the tank page does (colonies.health_series.load_points).
    """
    from .models import Split, SplitPart

    ids = list(tank_ids)
    out: dict[int, tuple[float, datetime, str, str]] = {}

    def offer(tank_id, value, at, ref, what):
        if value is not None and (tank_id not in out or at > out[tank_id][1]):
            out[tank_id] = (value, at, ref, what)

    newest_census = Census.objects.current().filter(tank=OuterRef("tank")).order_by("-observed_at", "-pk")
    for pk, tank_id, value, at in (Census.objects.current().filter(tank_id__in=ids, pk=Subquery(newest_census.values("pk")[:1]))
                                   .values_list("pk", "tank_id", "estimate", "observed_at")):
        offer(tank_id, value, at, f"census:{pk}", "census estimate")
    newest_split = Split.objects.current().filter(source=OuterRef("source")).order_by("-split_at", "-pk")
    for pk, tank_id, value, at in (Split.objects.current().filter(source_id__in=ids, pk=Subquery(newest_split.values("pk")[:1]))
                                   .values_list("pk", "source_id", "stayed", "split_at")):
        offer(tank_id, value, at, f"split:{pk}", "left after a split:")
    for pk, tank_id, value, at in (SplitPart.objects.filter(destination_id__in=ids, created_tank=True,
                                                            split__voided_at__isnull=True)
                                   .values_list("split_id", "destination_id", "animals", "split__split_at")):
        offer(tank_id, value, at, f"split:{pk}:in", "moved in at its set-up:")
    for pk, tank_id, animals, at in (SplitPart.objects.filter(destination_id__in=ids, created_tank=False,
                                                              split__voided_at__isnull=True)
                                     .order_by("split__split_at").values_list("split_id", "destination_id", "animals",
                                                                              "split__split_at")):
        if tank_id in out and at > out[tank_id][1]:
            value = out[tank_id][0] + animals
            out[tank_id] = (value, at, f"split:{pk}:in", f"after {animals:.0f} were split into it:")
    return out


@scan_rule
def stocking_density_rule(tanks, now):
    """Scan rule: each tank's newest estimate against its species' maximum density."""
    latest = latest_estimates(t.pk for t in tanks if t.species.max_density_per_l)
    for tank in tanks:
        if tank.pk in latest:
            value, at, ref, what = latest[tank.pk]
            finding = density_finding(tank, value, at, ref, what)
            if finding:
                yield finding


from . import record_rules  # noqa: E402,F401  (registers the record rules; they import this module's names)
