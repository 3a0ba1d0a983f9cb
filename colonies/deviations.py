"""The deviation engine: rules that turn husbandry records into deviations.

Two kinds of rule:
- record rules run when checks are saved (`evaluate_checks`): reading or derived value outside the
  care target, mortality above baseline, drift on a control chart;
- scan rules run from `python manage.py scan_deviations` (`scan`): missed checks and overdue
  feeding, water change and census.

A rule returns `Finding`s; `apply_findings` turns them into deviations. An ongoing problem keeps a
single unresolved deviation per (tank, rule, parameter, subject), which gains evidence; each piece
of evidence has a `ref` so running a rule twice on the same records adds nothing. Nothing closes a
deviation automatically: a value back in range is new evidence, not a corrective action.

Later rules (stocking density, protocol limits) register with `record_rule` / `scan_rule`, or call
`apply_findings` directly.
"""
import bisect
import math
from collections import defaultdict
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from datetime import datetime, timedelta

from django.db import IntegrityError, transaction
from django.db.models import OuterRef, Q, Subquery
from django.utils import timezone
from simple_history.utils import bulk_create_with_history, bulk_update_with_history

from vermilog.lab_time import lab_moment

from . import control_charts, derived
from .flags import Target, out_of_target
from .models import EVIDENCE_KEEP, Census, Check, Deviation, Tank, overdue_grace

Severity = Deviation.Severity
Rule = Deviation.Rule


# Mortality: a check's dead count opens a deviation when it is at least MORTALITY_MIN_DEAD and
# above the tank's recent baseline by 3 Poisson standard deviations (mean + 3 sqrt(mean)), or above
# MORTALITY_FRACTION of the latest population estimate.
MORTALITY_BASELINE_CHECKS = 14
MORTALITY_MIN_BASELINE = 5  # fewer earlier checks than this: only the fraction-of-estimate test applies
MORTALITY_MIN_DEAD = 5  # common practice: a handful of dead worms is normal turnover
MORTALITY_FRACTION = 0.02  # common practice: 2 % of the culture in one day

# Drift: EWMA chart, lambda = 0.3, L = 3 (NIST/SEMATECH e-Handbook of Statistical Methods,
# §6.3.2.4), baseline mean and sigma (average moving range / 1.128) from the readings before the
# last DRIFT_WINDOW ones. Fires only while the newest reading is still inside the target and the
# EWMA has moved toward a target limit and into the outer DRIFT_ZONE of the target band next to
# it: it warns before a breach. (Real husbandry series are autocorrelated, so a bare EWMA signal
# with a moving-range sigma alarms too often; the zone condition keeps warnings to drifts that
# matter for the culture.)
DRIFT_LAMBDA = 0.3
DRIFT_L = 3.0
DRIFT_WINDOW = 7
DRIFT_MIN_BASELINE = 10
DRIFT_ZONE = 0.25  # common practice: warn in the outer quarter of the target band
DRIFT_METHOD = "EWMA chart, λ = 0.3, L = 3 (NIST/SEMATECH e-Handbook §6.3.2.4)"
HISTORY_DAYS = 35  # how far back record rules look for baselines
WINDOW_DAYS = 60  # a rescan loads its context in slices of this much observed time


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


RecordRule = Callable[[list[Check], "Context"], Iterable[Finding]]
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
# Record rules
# ---------------------------------------------------------------------------------------------
@dataclass
class Context:
    """What record rules may read, loaded in a fixed number of queries for a batch of checks."""

    tanks: dict[int, Tank]
    series: dict[int, list[Check]]  # per tank: earlier stored checks and the batch, oldest first
    latest_estimate: dict[int, float | None]
    _values: dict[int, dict] = field(default_factory=dict)
    _position: dict[int, int] = field(default_factory=dict)

    _since: dict[int, int] = field(default_factory=dict)

    @classmethod
    def load(cls, checks: list[Check]) -> "Context":
        """Tanks and their stored checks from HISTORY_DAYS before the batch's oldest check to its newest (four
        queries). Later checks cannot be earlier than any in the batch, so they are not read."""
        tank_ids = {c.tank_id for c in checks}
        tanks = {
            t.pk: t for t in Tank.objects.filter(pk__in=tank_ids).select_related("species")
            .prefetch_related("species__targets", "target_overrides")
            .annotate(latest_estimate=Subquery(
                Census.objects.current().filter(tank=OuterRef("pk")).order_by("-observed_at").values("estimate")[:1]
            ))
        }
        oldest = min(c.observed_at for c in checks) - timedelta(days=HISTORY_DAYS)
        newest = max(c.observed_at for c in checks)
        batch = {c.pk for c in checks}
        series: dict[int, list[Check]] = defaultdict(list)
        stored = Check.objects.current().filter(tank_id__in=tank_ids, observed_at__gte=oldest, observed_at__lte=newest)
        for c in [c for c in stored if c.pk not in batch] + list(checks):  # the batch's own objects, not copies
            c.tank = tanks[c.tank_id]
            series[c.tank_id].append(c)
        ctx = cls(tanks, series, {pk: t.latest_estimate for pk, t in tanks.items()})
        for items in series.values():
            items.sort(key=lambda c: (c.observed_at, c.pk))
            times = [c.observed_at for c in items]
            for i, c in enumerate(items):
                ctx._position[id(c)] = i
                ctx._since[id(c)] = bisect.bisect_left(times, c.observed_at - timedelta(days=HISTORY_DAYS), 0, i)
        return ctx

    def earlier(self, check: Check, limit: int | None = None) -> list[Check]:
        """The tank's checks before `check` (oldest first), at most HISTORY_DAYS back from it and at most
        `limit` of them: what the rules saw when the check was saved, however large the batch."""
        end = self._position[id(check)]
        start = self._since[id(check)] if limit is None else max(self._since[id(check)], end - limit)
        return self.series[check.tank_id][start:end]

    def values(self, check: Check) -> dict:
        cached = self._values.get(id(check))
        if cached is None:
            cached = self._values[id(check)] = check.values()
        return cached


def _local(dt: datetime) -> str:
    """A time in the evidence (stored data): ISO-like, local to the lab; pages show it the lab's way."""
    return timezone.localtime(dt).strftime("%Y-%m-%d %H:%M")


@record_rule
def out_of_target_rule(checks, ctx):
    for check in checks:
        tank = ctx.tanks[check.tank_id]
        targets = tank.care_targets()
        for key, value in ctx.values(check).items():
            target = targets.get(key)
            side = out_of_target(value, target)
            if not side:
                continue
            entry = derived.label_for(key)
            yield Finding(
                tank.pk, Rule.OUT_OF_TARGET, severity_outside(value, target),
                f"{entry.label} {entry.format(value)} {entry.unit} {'below' if side == 'low' else 'above'} "
                f"target {target.text(entry.unit)}",
                {"ref": f"check:{check.pk}:{key}", "check": check.pk, "at": _local(check.observed_at),
                 "value": value, "low": target.low, "high": target.high, "side": side},
                check.observed_at, parameter=key,
            )


@record_rule
def mortality_rule(checks, ctx):
    for check in checks:
        dead = check.dead_removed or 0
        if dead < MORTALITY_MIN_DEAD:
            continue
        earlier = ctx.earlier(check, MORTALITY_BASELINE_CHECKS)
        baseline = sum(c.dead_removed for c in earlier) / len(earlier) if earlier else 0.0
        poisson_limit = baseline + 3 * math.sqrt(max(baseline, 1.0))
        estimate = ctx.latest_estimate.get(check.tank_id)
        fraction = dead / estimate if estimate else None
        above_baseline = len(earlier) >= MORTALITY_MIN_BASELINE and dead > poisson_limit
        above_fraction = fraction is not None and fraction > MORTALITY_FRACTION
        if not (above_baseline or above_fraction):
            continue
        severity = Severity.MAJOR if (fraction is not None and fraction > 2.5 * MORTALITY_FRACTION) or dead > 2 * poisson_limit else Severity.MODERATE
        why = [f"baseline {baseline:.1f}/check over {len(earlier)} checks, limit {poisson_limit:.1f}"]
        if fraction is not None:
            why.append(f"{100 * fraction:.1f} % of the latest estimate ({estimate:.0f})")
        yield Finding(
            check.tank_id, Rule.MORTALITY, severity, f"{dead} dead removed ({'; '.join(why)})",
            {"ref": f"check:{check.pk}:dead", "check": check.pk, "at": _local(check.observed_at), "dead": dead,
             "baseline": round(baseline, 2), "limit": round(poisson_limit, 2),
             "fraction_of_estimate": None if fraction is None else round(fraction, 4)},
            check.observed_at,
        )


@record_rule
def drift_rule(checks, ctx):
    for check in checks:
        tank = ctx.tanks[check.tank_id]
        targets = tank.care_targets()
        series = ctx.earlier(check, DRIFT_WINDOW + 40) + [check]
        for key, value in ctx.values(check).items():
            target = targets.get(key)
            if value is None or target is None or out_of_target(value, target):
                continue
            values = [v for v in (ctx.values(c).get(key) for c in series) if v is not None]
            if len(values) < DRIFT_MIN_BASELINE + DRIFT_WINDOW:
                continue
            baseline, recent = values[:-DRIFT_WINDOW], values[-DRIFT_WINDOW:]
            try:
                centre, sigma = control_charts.estimate_baseline(baseline)
                signals = control_charts.ewma_signals(recent, centre, sigma, DRIFT_LAMBDA, DRIFT_L)
            except ValueError:
                continue
            if not signals or signals[-1].index != len(recent) - 1:
                continue
            z = control_charts.ewma(recent, DRIFT_LAMBDA, centre)[-1]
            toward = ("high" if z > centre else "low")
            limit = target.high if toward == "high" else target.low
            if limit is None or not _near_limit(z, target, toward):
                continue
            entry = derived.label_for(key)
            yield Finding(
                tank.pk, Rule.DRIFT, Severity.MINOR,
                f"{entry.label} drifting {'up' if toward == 'high' else 'down'} toward {limit:g} {entry.unit} "
                f"(EWMA {z:.{entry.decimals + 1}f}, baseline {centre:.{entry.decimals + 1}f}); {DRIFT_METHOD}",
                {"ref": f"check:{check.pk}:{key}:drift", "check": check.pk, "at": _local(check.observed_at),
                 "value": value, "ewma": round(z, 4), "centre": round(centre, 4), "sigma": round(sigma, 4),
                 "limit": limit, "method": DRIFT_METHOD},
                check.observed_at, parameter=key,
            )


def _near_limit(z: float, target: Target, toward: str) -> bool:
    """Is the EWMA in the outer DRIFT_ZONE of the band next to the limit it moves toward?"""
    limit = target.high if toward == "high" else target.low
    if target.low is not None and target.high is not None:
        margin = DRIFT_ZONE * (target.high - target.low)
    else:
        margin = DRIFT_ZONE * abs(limit) if limit else 0.0
    return (limit - z <= margin) if toward == "high" else (z - limit <= margin)


def evaluate_checks(checks: list[Check], now: datetime | None = None) -> Outcome:
    """Run every record rule on freshly saved checks (fixed number of queries for the batch)."""
    checks = [c for c in checks if c.pk and not c.is_voided]
    if not checks:
        return Outcome()
    findings = []
    for window in _windows(checks):
        ctx = Context.load(window)
        findings += [f for rule in RECORD_RULES for f in rule(window, ctx)]
    return apply_findings(findings, now=now)


def _windows(checks: list[Check]) -> list[list[Check]]:
    """The batch cut into WINDOW_DAYS slices of observed time (a round is one slice), each in its given order.

    Bounds what a rescan of years of checks holds in memory; each check still sees HISTORY_DAYS before it.
    Checks observed at the same moment fall in the same slice, so apply_findings sees same-moment findings
    in the order a single batch would give them.
    """
    start = min(c.observed_at for c in checks)
    windows: dict[int, list[Check]] = defaultdict(list)
    for c in checks:
        windows[(c.observed_at - start) // timedelta(days=WINDOW_DAYS)].append(c)
    return [windows[k] for k in sorted(windows)]


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
        {"ref": f"due:{due_at.isoformat()}", "last": _local(last) if last else None, "due": _local(due_at),
         "seen": _local(now)},
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
    # Evidence already answered: a finding about the same record as a closed deviation (a correction
    # re-running the rules on an old check, say) must not reopen it. One query.
    answered = set()
    earliest = min(f.at for f in findings)
    closed = Deviation.objects.filter(status=Deviation.Status.CLOSED, rule__in={f.rule for f in findings},
                                      last_seen_at__gte=earliest)
    closed = closed.filter(tank_id__in=tank_ids) if not subjects else closed.filter(
        Q(tank_id__in=tank_ids) | Q(tank__isnull=True, subject__in=subjects))
    for dev in closed.only("tank_id", "rule", "parameter", "subject", "evidence"):
        answered.update(((dev.tank_id, dev.rule, dev.parameter, dev.subject), e.get("ref")) for e in dev.evidence)
    new: dict[tuple, Deviation] = {}
    changed: dict[int, Deviation] = {}
    for f in sorted(findings, key=lambda f: f.at):
        if (f.key, f.evidence["ref"]) in answered:
            continue
        dev = existing.get(f.key) or new.get(f.key)
        if dev is None:
            new[f.key] = Deviation(
                tank_id=f.tank_id, rule=f.rule, parameter=f.parameter, subject=f.subject, severity=f.severity,
                opened_at=f.at, last_seen_at=f.at, summary=f.summary[:300], evidence=[f.evidence], evidence_count=1,
            )
            continue
        if any(e.get("ref") == f.evidence["ref"] for e in dev.evidence):
            continue
        dev.evidence = (dev.evidence + [f.evidence])[-EVIDENCE_KEEP:]
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
    if changed:
        bulk_update_with_history(
            list(changed.values()), Deviation,
            ["evidence", "evidence_count", "last_seen_at", "severity", "summary"],
            default_user=user, default_change_reason="New evidence", default_date=now,
        )
        outcome.updated = list(changed.values())
    return outcome


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
        {"ref": ref, "at": _local(at), "estimate": round(estimate, 1), "volume_l": tank.volume_l,
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
