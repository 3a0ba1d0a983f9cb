"""The record rules: what the checks say about a tank, each check judged against the ones before it.

Each rule takes a CheckFrame (colonies/check_frames.py: the checks of some tanks as numpy columns,
the rows to judge marked) and yields a Finding per problem. The same code judges the round just saved
(a frame of a few dozen rows) and a rescan of years of records (a frame per two months of them), so
the two cannot disagree. The decisions are array operations over every judged row at once; only the
rows that fire become Findings, with their texts built one by one.

Where a method will change (issue 14: drift limits that allow for an estimated baseline, the exact
Poisson limit for deaths), it is one function here or in colonies/control_charts.py:
`mortality_limit` and `control_charts.ewma_limits`.
"""
import numpy as np

from . import control_charts, derived
from .check_frames import EPOCH, MICROSECOND, CheckFrame
from .deviations import Finding, Rule, Severity, local_text, record_rule, severity_outside
from .flags import sides

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
DRIFT_SERIES = DRIFT_WINDOW + 40  # earlier checks a drift series may reach back (and HISTORY_DAYS)
DRIFT_ZONE = 0.25  # common practice: warn in the outer quarter of the target band
DRIFT_METHOD = "EWMA chart, λ = 0.3, L = 3 (NIST/SEMATECH e-Handbook §6.3.2.4)"


@record_rule
def out_of_target_rule(frame: CheckFrame):
    for key, values in frame.values.items():
        side = sides(values, *frame.limits(key))
        for i in np.flatnonzero(frame.judge & (side != 0)).tolist():
            target, value = frame.target(i, key), float(values[i])
            word, entry = "low" if side[i] < 0 else "high", derived.label_for(key)
            at = frame.observed_at(i)
            yield Finding(
                int(frame.tank[i]), Rule.OUT_OF_TARGET, severity_outside(value, target),
                f"{entry.label} {entry.format(value)} {entry.unit} {'below' if word == 'low' else 'above'} "
                f"target {target.text(entry.unit)}",
                {"ref": f"check:{frame.pk[i]}:{key}", "check": int(frame.pk[i]), "at": local_text(at),
                 "value": value, "low": target.low, "high": target.high, "side": word},
                at, parameter=key,
            )


def mortality_limit(baseline: np.ndarray) -> np.ndarray:
    """The dead count per check above which a tank's deaths are unusual: Poisson mean + 3 sqrt(mean),
    the root taken of at least 1 so that a near-zero baseline does not make every death an alarm."""
    return baseline + 3 * np.sqrt(np.maximum(baseline, 1.0))


@record_rule
def mortality_rule(frame: CheckFrame):
    candidates = frame.judge & (frame.dead >= MORTALITY_MIN_DEAD)
    if not candidates.any():
        return
    first = frame.earliest(MORTALITY_BASELINE_CHECKS)
    counts = frame.row - first
    running = np.r_[0, np.cumsum(frame.dead)]
    dead_before = (running[frame.row] - running[first]).astype(float)
    estimate = frame.estimates()
    for i in np.flatnonzero(candidates).tolist():
        n = int(counts[i])
        # Dead removed outside the round since the first baseline check count in the baseline too.
        removed = frame.removed_between(int(frame.tank[i]), int(frame.at[first[i]]), int(frame.at[i])) if n else 0
        finding = mortality_finding(frame, int(frame.tank[i]), int(frame.dead[i]), frame.observed_at(i), n,
                                    (dead_before[i] + removed) / n if n else 0.0, float(estimate[i]),
                                    {"ref": f"check:{frame.pk[i]}:dead", "check": int(frame.pk[i])})
        if finding:
            yield finding


def removal_findings(frame: CheckFrame, removals) -> list[Finding]:
    """The mortality rule for dead animals removed outside the round (DeadRemoval): each removal is judged like
    a check's count, against the baseline of the tank's checks before it (`frame`: history_frame)."""
    out = []
    estimates = {t: facts.latest_estimate for t, facts in frame.tanks.items()}
    for removal in removals:
        if removal.count < MORTALITY_MIN_DEAD:
            continue
        at = int((removal.observed_at - EPOCH) // MICROSECOND)
        first, end = frame.last_rows_before(removal.tank_id, at, MORTALITY_BASELINE_CHECKS)
        n = end - first
        removed = frame.removed_between(removal.tank_id, int(frame.at[first]), at) if n else 0
        baseline = (int(frame.dead[first:end].sum()) + removed) / n if n else 0.0
        finding = mortality_finding(frame, removal.tank_id, removal.count, removal.observed_at, n, baseline,
                                    estimates.get(removal.tank_id) or np.nan,
                                    {"ref": f"removal:{removal.pk}", "removal": removal.pk})
        if finding:
            out.append(finding)
    return out


def mortality_finding(frame, tank_id: int, dead: int, at, n: int, baseline: float, estimate: float,
                      ref: dict) -> Finding | None:
    """A finding when `dead` animals at `at` are above the tank's baseline (deaths per check over its `n`
    earlier checks) or above MORTALITY_FRACTION of its latest estimate (NaN: none)."""
    limit = float(mortality_limit(np.array([baseline]))[0])
    known = not np.isnan(estimate) and estimate != 0
    fraction = dead / estimate if known else None
    above_baseline = n >= MORTALITY_MIN_BASELINE and dead > limit
    above_fraction = fraction is not None and fraction > MORTALITY_FRACTION
    if dead < MORTALITY_MIN_DEAD or not (above_baseline or above_fraction):
        return None
    severity = (Severity.MAJOR if (fraction is not None and fraction > 2.5 * MORTALITY_FRACTION) or dead > 2 * limit
                else Severity.MODERATE)
    why = [f"baseline {baseline:.1f}/check over {n} checks, limit {limit:.1f}"]
    if fraction is not None:
        why.append(f"{100 * fraction:.1f} % of the latest estimate ({estimate:.0f})")
    return Finding(
        tank_id, Rule.MORTALITY, severity, f"{dead} dead removed ({'; '.join(why)})",
        {**ref, "at": local_text(at), "dead": dead, "baseline": round(baseline, 2), "limit": round(limit, 2),
         "fraction_of_estimate": None if fraction is None else round(fraction, 4)},
        at,
    )


@record_rule
def drift_rule(frame: CheckFrame):
    first = frame.earliest(DRIFT_SERIES)
    for key, values in frame.values.items():
        low, high = frame.limits(key)
        present = ~np.isnan(values)
        judged = frame.judge & present & ~(np.isnan(low) & np.isnan(high)) & (sides(values, low, high) == 0)
        if not judged.any():
            continue
        # The series of a judged check: the values present among the DRIFT_SERIES checks before it and its own.
        kept = np.flatnonzero(present)
        rows = np.flatnonzero(judged)
        last = np.searchsorted(kept, rows)
        start = np.searchsorted(kept, first[rows])
        long_enough = last - start + 1 >= DRIFT_MIN_BASELINE + DRIFT_WINDOW
        rows, last, start = rows[long_enough], last[long_enough], start[long_enough]
        series = values[kept]
        centre, sigma = control_charts.baselines(series, start, last - DRIFT_WINDOW + 1)
        usable = sigma > 0  # a constant baseline gives no chart
        rows, last, centre, sigma = rows[usable], last[usable], centre[usable], sigma[usable]
        recent = series[last[np.newaxis, :] + np.arange(1 - DRIFT_WINDOW, 1)[:, np.newaxis]]
        z = control_charts.ewma_columns(recent, DRIFT_LAMBDA, centre)[-1]
        lcl, ucl = control_charts.ewma_limits(centre, sigma, DRIFT_LAMBDA, DRIFT_L, t=DRIFT_WINDOW)
        signal = ~((lcl <= z) & (z <= ucl))  # the newest point's EWMA outside its exact limits
        toward_high = z > centre
        fire = signal & near_limit(z, toward_high, low[rows], high[rows])
        for n in np.flatnonzero(fire).tolist():
            yield _drift_finding(frame, int(rows[n]), key, bool(toward_high[n]), float(z[n]), float(centre[n]),
                                 float(sigma[n]))


def near_limit(z: np.ndarray, toward_high: np.ndarray, low: np.ndarray, high: np.ndarray) -> np.ndarray:
    """Is the EWMA in the outer DRIFT_ZONE of the band next to the limit it moves toward (NaN: open end)?

    The zone is a share of the band, or of the limit itself for a one-sided target.
    """
    limit = np.where(toward_high, high, low)
    margin = np.where(np.isnan(low) | np.isnan(high), DRIFT_ZONE * np.abs(limit), DRIFT_ZONE * (high - low))
    return np.where(toward_high, limit - z <= margin, z - limit <= margin)  # NaN limit: False


def _drift_finding(frame: CheckFrame, i: int, key: str, toward_high: bool, z: float, centre: float,
                   sigma: float) -> Finding:
    target = frame.target(i, key)
    limit = target.high if toward_high else target.low
    entry, at = derived.label_for(key), frame.observed_at(i)
    return Finding(
        int(frame.tank[i]), Rule.DRIFT, Severity.MINOR,
        f"{entry.label} drifting {'up' if toward_high else 'down'} toward {limit:g} {entry.unit} "
        f"(EWMA {z:.{entry.decimals + 1}f}, baseline {centre:.{entry.decimals + 1}f}); {DRIFT_METHOD}",
        {"ref": f"check:{frame.pk[i]}:{key}:drift", "check": int(frame.pk[i]), "at": local_text(at),
         "value": float(frame.values[key][i]), "ewma": round(z, 4), "centre": round(centre, 4),
         "sigma": round(sigma, 4), "limit": limit, "method": DRIFT_METHOD},
        at, parameter=key,
    )
