"""Population statistics for worm cultures: counts, census estimates, mortality, splits.

Pure computation with no Django import, so it is testable without a database and usable
from a notebook. Every function raises ValueError naming the argument, the value and the
allowed range when it is given something impossible (negative animals, zero volume, ...).
Growth curves are fitted in colonies/growth_curves.py.
"""

from __future__ import annotations

import bisect
import math
import numbers
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy import stats

__all__ = [
    "Estimate",
    "SplitBalance",
    "aliquot_estimate",
    "animal_days",
    "direct_count_estimate",
    "gravimetric_estimate",
    "mortality_rate_per_1000_animal_days",
    "poisson_interval",
    "split_balance",
]

# Relative slack when comparing sums of float volumes, so that 3 x 0.1 mL "equals" 0.3 mL.
_VOLUME_RTOL = 1e-9


# ---------------------------------------------------------------------------
# Input checks


def _check_count(name: str, value: object) -> int:
    # bool is an Integral in Python; True animals is a bug, not a count.
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise ValueError(f"{name} must be a whole number of animals (>= 0), got {value!r}")
    if value < 0:
        raise ValueError(f"{name} must be >= 0 animals, got {value}")
    return int(value)


def _check_finite(name: str, value: object) -> float:
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise ValueError(f"{name} must be a finite number, got {value!r}")
    x = float(value)
    if not math.isfinite(x):
        raise ValueError(f"{name} must be a finite number, got {value!r}")
    return x


def _check_positive(name: str, value: object, unit: str) -> float:
    x = _check_finite(name, value)
    if x <= 0:
        raise ValueError(f"{name} must be > 0 {unit}, got {value}")
    return x


def _check_confidence(confidence: object) -> float:
    c = _check_finite("confidence", confidence)
    if not 0 < c < 1:
        raise ValueError(f"confidence must be between 0 and 1 (exclusive), got {confidence}")
    return c


# ---------------------------------------------------------------------------
# Counts and census estimates


@dataclass(frozen=True)
class Estimate:
    """A population size with its interval and a sentence saying how it was obtained.

    `n` is the number of aliquots or subsamples counted (1 for a single count),
    `counted` the animals actually counted, `variance_to_mean` the between-aliquot
    index of dispersion (None when it cannot be computed: one aliquot, or all zero).
    """

    value: float
    lower: float
    upper: float
    confidence: float
    method: str
    variance_to_mean: float | None = None
    n: int = 1
    counted: int | None = None


def poisson_interval(count: int, confidence: float = 0.95) -> tuple[float, float]:
    """Exact (Garwood 1936) two-sided interval for a Poisson mean given one observed count.

    lower = chi2(alpha/2; 2k) / 2 and upper = chi2(1 - alpha/2; 2k + 2) / 2, the same as
    R's poisson.test. The lower bound is 0 for k = 0 (chi2 with 0 degrees of freedom).
    """
    k = _check_count("count", count)
    c = _check_confidence(confidence)
    alpha = 1.0 - c
    lower = 0.0 if k == 0 else float(stats.chi2.ppf(alpha / 2, 2 * k)) / 2
    upper = float(stats.chi2.ppf(1 - alpha / 2, 2 * k + 2)) / 2
    return lower, upper


def _pct(fraction: float) -> str:
    return f"{fraction * 100:.3g} %"


def aliquot_estimate(
    counts: Sequence[int], aliquot_ml: float, total_ml: float, confidence: float = 0.95
) -> Estimate:
    """Animals in a well-mixed volume from counts of equal aliquots taken from it.

    Point estimate: summed count / sampled fraction (fraction = n x aliquot_ml / total_ml).

    Interval: the exact Poisson (Garwood) interval on the summed count, scaled by the
    sampled fraction. Worms clump, so with two or more aliquots the variance-to-mean ratio
    (sample variance, n - 1) is checked; when it exceeds 1 a Student t interval on the
    aliquot mean (t with n - 1 degrees of freedom, scaled by total_ml / aliquot_ml) is also
    computed and whichever interval is wider is reported. We use the t interval rather than
    stretching the Poisson interval by sqrt(variance/mean) because with the usual 2-5
    aliquots the dispersion itself is very uncertain: the t quantile (12.7 for 2 aliquots at
    95 %) pays for that uncertainty, a normal-quantile quasi-Poisson interval would not.

    The lower bound is never below the animals actually counted: they were in the volume.
    The Poisson model ignores that aliquots are drawn without replacement, so the interval is
    conservative (too wide) when a large part of the volume is counted; when the aliquots
    cover the whole volume the count is a census and the estimate is exact.
    """
    if len(counts) == 0:
        raise ValueError("counts must hold at least one aliquot count, got an empty list")
    ks = [_check_count(f"counts[{i}]", k) for i, k in enumerate(counts)]
    a = _check_positive("aliquot_ml", aliquot_ml, "mL")
    v = _check_positive("total_ml", total_ml, "mL")
    c = _check_confidence(confidence)

    n = len(ks)
    sampled = n * a
    if sampled > v * (1 + _VOLUME_RTOL):
        raise ValueError(
            f"aliquots total {n} x {aliquot_ml} mL = {sampled:g} mL, more than "
            f"total_ml = {total_ml} mL; the aliquots must fit in the volume"
        )
    total = sum(ks)
    mean = total / n
    vmr = float(np.var(ks, ddof=1)) / mean if n >= 2 and mean > 0 else None

    if math.isclose(sampled, v, rel_tol=_VOLUME_RTOL):
        # Every millilitre was counted: nothing left to estimate.
        return Estimate(
            value=float(total), lower=float(total), upper=float(total), confidence=c,
            method=f"Census: {n} aliquots covered the whole volume; {total} animals counted.",
            variance_to_mean=vmr, n=n, counted=total,
        )

    fraction = sampled / v
    value = total / fraction
    lo, hi = poisson_interval(total, c)
    p_lower, p_upper = max(lo / fraction, float(total)), hi / fraction
    method = (
        f"Exact Poisson (Garwood) interval on {total} animals counted in {n} "
        f"aliquot{'s' if n != 1 else ''} ({_pct(fraction)} of the volume), scaled to the whole volume."
    )
    lower, upper = p_lower, p_upper

    if vmr is not None and vmr > 1:
        # Clumped counts: the spread between aliquots is larger than Poisson allows.
        scale = v / a
        half = float(stats.t.ppf(0.5 + c / 2, n - 1)) * math.sqrt(vmr * mean / n)
        t_lower, t_upper = max((mean - half) * scale, float(total)), (mean + half) * scale
        if t_upper - t_lower > p_upper - p_lower:
            lower, upper = t_lower, t_upper
            method = (
                f"Student t interval on the mean of {n} aliquots ({total} animals counted, "
                f"{_pct(fraction)} of the volume), scaled to the whole volume; used because the "
                f"counts are clumped (variance/mean {vmr:.3g}) and it is wider than the exact "
                f"Poisson interval."
            )
        else:
            method = method[:-1] + (
                f"; kept because it is wider than the t interval despite variance/mean {vmr:.3g}."
            )

    return Estimate(
        value=value, lower=lower, upper=upper, confidence=c, method=method,
        variance_to_mean=vmr, n=n, counted=total,
    )


def direct_count_estimate(count: int) -> Estimate:
    """Every animal counted: the estimate is the count, with a zero-width interval."""
    k = _check_count("count", count)
    return Estimate(
        value=float(k), lower=float(k), upper=float(k), confidence=1.0,
        method=f"Direct count of every animal ({k}); exact.", n=1, counted=k,
    )


def gravimetric_estimate(
    total_mass_g: float, sample_mass_g: float, sample_count: int, confidence: float = 0.95
) -> Estimate:
    """Animals in a weighed mass from a counted, weighed subsample: N = total x count / sample.

    Interval: the exact Poisson (Garwood) interval on the subsample count, scaled by
    total_mass_g / sample_mass_g. It covers the counting error only; weighing error and
    variation in worm size between subsample and bulk are not included. The lower bound is
    never below the animals counted in the subsample.
    """
    total = _check_positive("total_mass_g", total_mass_g, "g")
    sample = _check_positive("sample_mass_g", sample_mass_g, "g")
    k = _check_count("sample_count", sample_count)
    c = _check_confidence(confidence)
    if k < 1:
        raise ValueError(
            f"sample_count must be >= 1 animal, got {sample_count}; "
            "an empty subsample gives no animals per gram"
        )
    if sample > total * (1 + _VOLUME_RTOL):
        raise ValueError(
            f"sample_mass_g must be <= total_mass_g = {total_mass_g} g, got {sample_mass_g} g"
        )
    scale = total / sample
    lo, hi = poisson_interval(k, c)
    return Estimate(
        value=k * scale, lower=max(lo * scale, float(k)), upper=hi * scale, confidence=c,
        method=(
            f"Weighed subsample: {k} animals in {sample_mass_g:g} g of {total_mass_g:g} g; "
            "exact Poisson (Garwood) interval on the subsample count, scaled by total/sample "
            "mass (weighing error and worm-size variation not included)."
        ),
        n=1, counted=k,
    )


# ---------------------------------------------------------------------------
# Mortality and bookkeeping


def mortality_rate_per_1000_animal_days(deaths: int, animal_days: float) -> float:
    """Deaths per 1000 animal-days of exposure (a rate, so cultures of any size compare)."""
    d = _check_count("deaths", deaths)
    exposure = _check_positive("animal_days", animal_days, "animal-days")
    return 1000.0 * d / exposure


def animal_days(estimates: Sequence[tuple[float, float]], start_day: float, end_day: float) -> float:
    """Animal-days between start_day and end_day from dated population estimates (day, N).

    The population is taken to change linearly between estimates (trapezoid rule) and to be
    held constant at the first estimate before it and at the last estimate after it: with no
    census outside the observed span, carrying the nearest one forward or back is the
    least-assuming choice.
    """
    if len(estimates) == 0:
        raise ValueError("estimates must hold at least one (day, N) pair, got an empty list")
    start = _check_finite("start_day", start_day)
    end = _check_finite("end_day", end_day)
    if end < start:
        raise ValueError(f"end_day must be >= start_day = {start_day}, got {end_day}")
    points: dict[float, float] = {}
    for i, pair in enumerate(estimates):
        if len(pair) != 2:
            raise ValueError(f"estimates[{i}] must be a (day, N) pair, got {pair!r}")
        day, size = pair
        if not (_is_finite(day) and _is_finite(size)):  # the messages only when needed (the overview sums 400)
            day = _check_finite(f"estimates[{i}] day", day)
            size = _check_finite(f"estimates[{i}] N", size)
        day, size = float(day), float(size)
        if size < 0:
            raise ValueError(f"estimates[{i}] N must be >= 0 animals, got {pair[1]}")
        if day in points:
            raise ValueError(f"estimates has two population values for day {pair[0]}; keep one")
        points[day] = size
    known = sorted(points)
    # Integrate exactly: the curve is piecewise linear, so knots at every estimate inside the span
    # plus the ends make the trapezoid rule exact; before the first and after the last estimate the
    # value is held (as np.interp does). Plain floats: a tank has a handful of estimates per period.
    grid = [start] + [d for d in known if start < d < end] + ([end] if end > start else [])
    values = [_interpolate(known, points, d) for d in grid]
    return math.fsum((b - a) * (u + v) / 2 for a, b, u, v in zip(grid, grid[1:], values, values[1:]))


def _is_finite(value: object) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


def _interpolate(known: list[float], points: dict[float, float], day: float) -> float:
    """The population on `day`: linear between the estimates around it, held outside them."""
    if day <= known[0]:
        return points[known[0]]
    if day >= known[-1]:
        return points[known[-1]]
    after = bisect.bisect_right(known, day)
    x0, x1 = known[after - 1], known[after]
    y0, y1 = points[x0], points[x1]
    return y0 + (y1 - y0) * (day - x0) / (x1 - x0)


@dataclass(frozen=True)
class SplitBalance:
    """Do the books balance for a culture split? difference = parts_total - source_before
    (positive: more animals in the parts than the source had)."""

    source_before: float
    parts_total: float
    difference: float
    relative_difference: float


def split_balance(source_before: float, parts: Sequence[float]) -> SplitBalance:
    source = _check_positive("source_before", source_before, "animals")
    if len(parts) == 0:
        raise ValueError("parts must hold at least one part, got an empty list")
    sizes = [_check_finite(f"parts[{i}]", p) for i, p in enumerate(parts)]
    for i, p in enumerate(sizes):
        if p < 0:
            raise ValueError(f"parts[{i}] must be >= 0 animals, got {parts[i]}")
    total = math.fsum(sizes)
    difference = total - source
    return SplitBalance(
        source_before=source, parts_total=total, difference=difference,
        relative_difference=difference / source,
    )
