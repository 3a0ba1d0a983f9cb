"""Statistical process control for the "drift" deviation rule: EWMA chart and Western Electric rules.

Pure functions with no Django imports. Source: NIST/SEMATECH e-Handbook of Statistical Methods,
section 6.3 (6.3.2 Shewhart individuals charts and the Western Electric rules, 6.3.2.4 EWMA).

We use the Western Electric set (8 in a row on one side), not Nelson's (1984) 9 in a row. Tell
technicians: the handbook notes that applying all four rules together raises the false-alarm rate of
an in-control process from about 1 point in 371 to about 1 in 92, so a single signal is a prompt to
look, not proof of a fault.

The EWMA and the baseline estimate also work on many series at once (numpy arrays, one column per
series), which is how the drift rule runs over years of checks; the one-series functions call the same
code. Sums run in the order of the data, as Python's `sum` does, so one series or many give the same
bits.
"""
import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

# d2 for subgroups of n = 2: converts the average moving range to sigma (NIST §6.3.2, individuals chart).
D2_MOVING_RANGE = 1.128

BEYOND_3_SIGMA = "beyond-3-sigma"
TWO_OF_3_BEYOND_2_SIGMA = "2-of-3-beyond-2-sigma"
FOUR_OF_5_BEYOND_1_SIGMA = "4-of-5-beyond-1-sigma"
EIGHT_ON_ONE_SIDE = "8-on-one-side"
EWMA_BEYOND_LIMIT = "ewma-beyond-limit"


@dataclass(frozen=True)
class ChartSignal:
    index: int  # position in the input sequence of the point that completes the pattern
    rule: str  # one of the slugs above
    description: str


def _check_values(values: Sequence[float]) -> list[float]:
    if len(values) == 0:
        raise ValueError("values is empty: at least one value is needed")
    for i, v in enumerate(values):
        if not math.isfinite(v):
            raise ValueError(f"values[{i}]={v!r} is not a finite number")
    return [float(v) for v in values]


def _check_sigma(name: str, sigma: float) -> None:
    if not (sigma > 0 and math.isfinite(sigma)):
        raise ValueError(f"{name}={float(sigma)!r} is not valid: it must be a finite number greater than 0")


def _check_finite(name: str, value: float) -> None:
    if not math.isfinite(value):
        raise ValueError(f"{name}={float(value)!r} is not a finite number")


def _check_lam(lam: float) -> None:
    if not 0 < lam <= 1:
        raise ValueError(f"lam={lam!r} is outside the valid range 0 < lam <= 1")


def _check_width(L: float) -> None:
    if not (L > 0 and math.isfinite(L)):
        raise ValueError(f"L={L!r} is not valid: it must be a finite number greater than 0")


# --- EWMA ----------------------------------------------------------------------------------------

def ewma(values: Sequence[float], lam: float = 0.3, target: float | None = None) -> list[float]:
    """EWMA_t = lam * Y_t + (1 - lam) * EWMA_(t-1), one value per input (NIST §6.3.2.4).

    EWMA_0 is the target (the in-control mean from historical data); without one, the mean of
    `values` is used. lam = 1 gives the raw values back (a Shewhart individuals chart).
    """
    data = _check_values(values)
    _check_lam(lam)
    if target is not None:
        _check_finite("target", target)
    start = sum(data) / len(data) if target is None else target
    return ewma_columns(np.array(data)[:, np.newaxis], lam, np.array([start]))[:, 0].tolist()


def ewma_columns(values: np.ndarray, lam: float, start: np.ndarray) -> np.ndarray:
    """The EWMA of every column of `values` (rows are successive points), each from its own EWMA_0."""
    current = np.asarray(start, dtype=float)
    result = np.empty(values.shape)
    for t, row in enumerate(values):
        current = lam * row + (1 - lam) * current
        result[t] = current
    return result


def ewma_limits(
    target: float | np.ndarray, sigma: float | np.ndarray, lam: float, L: float = 3.0,  # noqa: N803 (NIST's name)
    t: int | None = None,
) -> tuple[float, float] | tuple[np.ndarray, np.ndarray]:
    """(LCL, UCL) of the EWMA chart: target ± L sigma sqrt(lam / (2 - lam) [1 - (1 - lam)^(2t)]).

    NIST §6.3.2.4. With t=None the asymptotic limits (the bracket -> 1); with t = 1, 2, ... the exact
    limits for the t-th point, which are narrower early on so a start-up shift is caught sooner.
    `target` and `sigma` may be arrays (one chart each, e.g. the drift rule's tanks and checks).
    """
    _check_each("target", target, np.isfinite(target), _check_finite)
    _check_each("sigma", sigma, np.isfinite(sigma) & (np.asarray(sigma) > 0), _check_sigma)
    _check_lam(lam)
    _check_width(L)
    factor = lam / (2 - lam)
    if t is not None:
        if isinstance(t, bool) or not isinstance(t, int) or t < 1:
            raise ValueError(f"t={t!r} is not valid: it must be a whole number of 1 or more (or None)")
        factor *= 1 - (1 - lam) ** (2 * t)
    half_width = L * sigma * math.sqrt(factor)
    return target - half_width, target + half_width


def _check_each(name: str, value, ok, check) -> None:
    """Run a one-value check on the first bad item of a scalar or an array (its index in the message)."""
    if not np.all(ok):
        index = tuple(np.argwhere(~np.asarray(ok))[0])
        check(f"{name}[{', '.join(map(str, index))}]" if index else name, np.asarray(value)[index])


def ewma_signals(
    values: Sequence[float], target: float, sigma: float, lam: float = 0.3, L: float = 3.0  # noqa: N803
) -> list[ChartSignal]:
    """Points whose EWMA lies outside the exact (time-varying) EWMA limits. EWMA_0 = target."""
    _check_finite("target", target)
    _check_sigma("sigma", sigma)
    _check_width(L)
    signals = []
    for i, z in enumerate(ewma(values, lam, target)):
        lcl, ucl = ewma_limits(target, sigma, lam, L, t=i + 1)
        if not lcl <= z <= ucl:
            side = "above the upper" if z > ucl else "below the lower"
            signals.append(ChartSignal(
                i, EWMA_BEYOND_LIMIT,
                f"EWMA {z:.4g} is {side} control limit ({lcl:.4g} to {ucl:.4g})",
            ))
    return signals


# --- Western Electric rules ----------------------------------------------------------------------

def western_electric_signals(values: Sequence[float], center: float, sigma: float) -> list[ChartSignal]:
    """The four Western Electric run rules (NIST §6.3.2), on an individuals chart.

    1. one point beyond 3 sigma; 2. two of three successive points beyond 2 sigma on the same side;
    3. four of five successive points beyond 1 sigma on the same side; 4. eight successive points on
    the same side of the center line.
    "Beyond" is strict; a point exactly on the center line breaks a run. A signal is reported at the
    point that completes the pattern, and that point must itself be part of it (a pattern is not
    re-reported at an unremarkable later point). Windows that are shorter at the start of the data
    count too, so the first two points can already trip rule 2. Rule 4 is reported at every point
    from the 8th while the run lasts. Signals come in index order.
    """
    data = _check_values(values)
    _check_finite("center", center)
    _check_sigma("sigma", sigma)
    # z-scores: distance from the center in units of sigma, with sign.
    z = [(v - center) / sigma for v in data]

    def side(score: float) -> int:
        return (score > 0) - (score < 0)

    def zone_count(i: int, window: int, k: float, s: int) -> int:
        return sum(1 for score in z[max(0, i - window + 1): i + 1] if side(score) == s and abs(score) > k)

    signals = []
    run = 0
    for i, score in enumerate(z):
        s = side(score)
        word = "above" if s > 0 else "below"
        if s == 0:
            run = 0
        elif i > 0 and side(z[i - 1]) == s:
            run += 1
        else:
            run = 1

        if abs(score) > 3:
            signals.append(ChartSignal(i, BEYOND_3_SIGMA, f"point is more than 3 sigma {word} the center line"))
        if abs(score) > 2 and zone_count(i, 3, 2, s) >= 2:
            signals.append(ChartSignal(
                i, TWO_OF_3_BEYOND_2_SIGMA, f"2 of the last 3 points are more than 2 sigma {word} the center line"
            ))
        if abs(score) > 1 and zone_count(i, 5, 1, s) >= 4:
            signals.append(ChartSignal(
                i, FOUR_OF_5_BEYOND_1_SIGMA, f"4 of the last 5 points are more than 1 sigma {word} the center line"
            ))
        if run >= 8:
            signals.append(ChartSignal(i, EIGHT_ON_ONE_SIDE, f"{run} points in a row {word} the center line"))
    return signals


def estimate_baseline(values: Sequence[float]) -> tuple[float, float]:
    """(center, sigma) from in-control history: the mean, and the average moving range / 1.128.

    The moving-range estimate is the NIST §6.3.2 individuals-chart method (d2 = 1.128 for ranges of
    two successive points); unlike the standard deviation it is barely inflated by a slow drift in
    the history itself.
    """
    data = _check_values(values)
    if len(data) < 2:
        raise ValueError(f"values has {len(data)} value: at least 2 are needed to estimate sigma")
    center, sigma = baselines(np.array(data), np.array([0]), np.array([len(data)]))
    if sigma[0] <= 0:
        raise ValueError("values are all equal: sigma cannot be estimated from them (it would be 0)")
    return float(center[0]), float(sigma[0])


def baselines(values: np.ndarray, starts: np.ndarray, stops: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """estimate_baseline of every slice values[starts[k]:stops[k]] (each at least 2 values), at once.

    Sigma is 0 where a slice is constant; the caller decides what that means. The slices are
    right-aligned in a block padded with zeros in front, and the block is summed row after row:
    adding zeros first changes no bit, so each sum equals `sum()` over its slice.
    """
    lengths = stops - starts
    if len(lengths) and lengths.min() < 2:
        raise ValueError(f"a slice has {lengths.min()} value: at least 2 are needed to estimate sigma")
    total = np.zeros(len(starts))
    ranges = np.zeros(len(starts))
    previous = None
    for offset in range(int(lengths.max(initial=0)), 0, -1):
        index = stops - offset
        inside = index >= starts
        point = np.where(inside, values[np.where(inside, index, 0)], 0.0)
        total += point
        if previous is not None:
            ranges += np.where(index - 1 >= starts, np.abs(point - previous), 0.0)
        previous = point
    return total / lengths, ranges / (lengths - 1) / D2_MOVING_RANGE
