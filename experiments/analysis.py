"""Statistics for aggregation trials: dispersal times as survival data (pure Python, no Django).

Dispersal times (survival analysis)
    An aggregation trial records the time from the stimulus until the clump disperses. A trial
    whose clump has not dispersed by the end of the observation window is right-censored at the
    window's end ("still clumped at 600 s = censored at 600 s"). Durations may be in any unit;
    the results come back in the same unit.

    * `kaplan_meier`: the product-limit estimator (Kaplan & Meier 1958). Ties follow the usual
      convention: events at a time happen before censorings at the same time, so a trial
      censored at t still counts as at risk for the events at t. Variance by Greenwood's formula;
      the pointwise confidence band uses the log(-log) transform (Kalbfleisch & Prentice; the
      same band as lifelines' default and R survival's ``conf.type = "log-log"``), which keeps
      the limits inside [0, 1].
    * `median_survival` and the quartiles in `condition_summary`: the smallest time at which
      the curve is at or below the level (Kleinbaum & Klein's and lifelines' convention; R
      takes a midpoint when the curve sits exactly on 0.5 over an interval). ``None`` when the
      curve never gets that low: the median is then "not reached", not the last time seen.
    * `logrank_test`: observed minus expected dispersals in group A with the hypergeometric
      variance, summed over the distinct dispersal times (Mantel-Haenszel form); chi-square
      with 1 degree of freedom.

Dose-response (quantal responses)
    Lives in `experiments/dose_response.py` (links compared, no-trend and separation reported,
    Finney's heterogeneity factor, Fieller or profile-likelihood interval for EC50).

Dependencies
    numpy, scipy and pandas only: the survival estimators are short enough to write out so that
    every step is visible (statsmodels' survival routines serve as a reference in the tests). lifelines is a development dependency used in the tests as
    an independent reference implementation; it is not imported here.
"""
from __future__ import annotations

from typing import TypedDict

import numpy as np
import numpy.typing as npt
import pandas as pd
from scipy import stats

KM_COLUMNS = ("time", "at_risk", "events", "censored", "survival", "lower", "upper")

# A product of factors such as 3/4 * 2/3 can land a hair above 0.5 in floating point; a curve
# that is exactly on a level should count as having reached it.
_LEVEL_TOLERANCE = 1e-12


# --------------------------------------------------------------------------------------------
# Survival: Kaplan-Meier, median, log-rank
# --------------------------------------------------------------------------------------------


def _survival_arrays(
    durations: npt.ArrayLike, observed: npt.ArrayLike, label: str = ""
) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.bool_]]:
    """Validate one group's durations and dispersal flags; return float times and bool events."""
    where = f" in {label}" if label else ""
    times = np.asarray(durations, dtype=float).ravel()
    flags = np.asarray(observed).ravel()
    if times.size != flags.size:
        raise ValueError(
            f"durations and observed must have the same length{where}: "
            f"got {times.size} durations and {flags.size} observed flags"
        )
    if times.size == 0:
        raise ValueError(f"no trials{where}: at least one duration is needed")
    if not np.all(np.isfinite(times)):
        raise ValueError(f"durations{where} must be finite numbers (got NaN or infinity)")
    if np.any(times < 0):
        raise ValueError(
            f"durations{where} must be zero or positive: got {float(times.min()):g}"
        )
    if flags.dtype != np.bool_:
        try:
            numeric = flags.astype(float)
        except (TypeError, ValueError):
            raise ValueError(
                f"observed{where} must be booleans or 0/1 (True = dispersal seen)"
            ) from None
        if not np.all((numeric == 0) | (numeric == 1)):
            raise ValueError(
                f"observed{where} must be booleans or 0/1 (True = dispersal seen, "
                "False = censored)"
            )
        flags = numeric == 1
    return times, flags


def _loglog_band(
    survival: npt.NDArray[np.float64], greenwood: npt.NDArray[np.float64], z: float
) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.float64]]:
    """Pointwise band S^exp(+-z se), se = sqrt(Greenwood sum) / |log S| (log(-log) transform).

    Where S = 1 (nothing has happened yet) or S = 0 the band collapses onto S, as in lifelines.
    """
    lower = survival.copy()
    upper = survival.copy()
    inside = (survival > 0) & (survival < 1)
    s = survival[inside]
    se = np.sqrt(greenwood[inside]) / np.abs(np.log(s))
    lower[inside] = s ** np.exp(z * se)
    upper[inside] = s ** np.exp(-z * se)
    return lower, upper


def kaplan_meier(
    durations: npt.ArrayLike, observed: npt.ArrayLike, confidence: float = 0.95
) -> pd.DataFrame:
    """Kaplan-Meier table: one row at time 0, then one per distinct duration (events or not).

    ``at_risk`` counts trials still clumped and under observation just before ``time``;
    ``events`` and ``censored`` are the dispersals seen and the censorings at ``time``.
    ``survival`` is the fraction still clumped just after ``time``; ``lower`` and ``upper`` the
    pointwise band (Greenwood variance, log(-log) transform). Censorings shrink later risk sets
    but never make a step. Dispersals recorded at time 0 are counted in the first row, which
    therefore has survival 1 unless a clump dispersed instantly.
    """
    if not 0 < confidence < 1:
        raise ValueError(f"confidence must be between 0 and 1 (exclusive): got {confidence}")
    times, events = _survival_arrays(durations, observed)
    z = float(stats.norm.ppf(0.5 + confidence / 2))

    grid = np.unique(np.concatenate(([0.0], times)))
    ordered = np.sort(times)
    # Events before censorings at tied times: a trial censored at t is still at risk at t.
    at_risk = times.size - np.searchsorted(ordered, grid, side="left")
    index = np.searchsorted(grid, times)
    n_events = np.bincount(index[events], minlength=grid.size)
    n_censored = np.bincount(index[~events], minlength=grid.size)

    at_risk_f = at_risk.astype(float)
    survival = np.cumprod(1.0 - n_events / at_risk_f)
    # Greenwood: Var S(t) = S(t)^2 * sum d / (n (n - d)); infinite once everyone at risk
    # disperses, which happens only where S has reached 0 and the band collapses anyway.
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = np.where(
            n_events > 0, n_events / (at_risk_f * (at_risk_f - n_events)), 0.0
        )
    greenwood = np.cumsum(terms)
    lower, upper = _loglog_band(survival, greenwood, z)

    return pd.DataFrame(
        {
            "time": grid,
            "at_risk": at_risk.astype(int),
            "events": n_events.astype(int),
            "censored": n_censored.astype(int),
            "survival": survival,
            "lower": lower,
            "upper": upper,
        },
        columns=list(KM_COLUMNS),
    )


def _time_at_level(km_frame: pd.DataFrame, level: float) -> float | None:
    """Smallest time at which the curve is at or below ``level``; None if it never gets there."""
    reached = km_frame.loc[km_frame["survival"] <= level + _LEVEL_TOLERANCE, "time"]
    if reached.empty:
        return None
    return float(reached.min())


def median_survival(km_frame: pd.DataFrame) -> float | None:
    """Median dispersal time: the smallest time with survival <= 0.5; None if not reached."""
    return _time_at_level(km_frame, 0.5)


def logrank_test(
    durations_a: npt.ArrayLike,
    observed_a: npt.ArrayLike,
    durations_b: npt.ArrayLike,
    observed_b: npt.ArrayLike,
) -> tuple[float, float]:
    """Two-group log-rank test: (chi-square statistic with 1 df, p value).

    At each distinct dispersal time, with n trials at risk of which n_a in group A and d
    dispersals in all, E_a = d n_a / n and V = d (n_a / n) (n_b / n) (n - d) / (n - 1);
    chi-square = (O_a - E_a)^2 / sum V. Raises ValueError when there is no information: no
    dispersal in either group, or none while both groups were still under observation.
    """
    times_a, events_a = _survival_arrays(durations_a, observed_a, "group A")
    times_b, events_b = _survival_arrays(durations_b, observed_b, "group B")
    event_times = np.unique(np.concatenate((times_a[events_a], times_b[events_b])))
    if event_times.size == 0:
        raise ValueError(
            "no dispersal was observed in either group (all trials censored): "
            "the log-rank test has nothing to compare"
        )

    def counts(
        times: npt.NDArray[np.float64], events: npt.NDArray[np.bool_]
    ) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.float64]]:
        ordered = np.sort(times)
        at_risk = times.size - np.searchsorted(ordered, event_times, side="left")
        dispersed = np.sort(times[events])
        d = np.searchsorted(dispersed, event_times, side="right") - np.searchsorted(
            dispersed, event_times, side="left"
        )
        return at_risk.astype(float), d.astype(float)

    n_a, d_a = counts(times_a, events_a)
    n_b, d_b = counts(times_b, events_b)
    n = n_a + n_b
    d = d_a + d_b
    expected_a = d * n_a / n
    # n - 1 = 0 only when n = 1, and then n - d = 0 too: that time adds no variance.
    variance = d * (n_a / n) * (n_b / n) * (n - d) / np.maximum(n - 1.0, 1.0)
    total_variance = float(variance.sum())
    if total_variance <= 0:
        raise ValueError(
            "the log-rank variance is zero: no dispersal happened while both groups were "
            "still under observation, so the groups cannot be compared"
        )
    statistic = float((d_a.sum() - expected_a.sum()) ** 2 / total_variance)
    p_value = float(stats.chi2.sf(statistic, df=1))
    return statistic, p_value


class ConditionSummary(TypedDict):
    n: int
    n_dispersed: int
    fraction_dispersed: float | None
    median: float | None
    q25: float | None  # time by which 25 % of clumps had dispersed (survival <= 0.75)
    q75: float | None  # time by which 75 % of clumps had dispersed (survival <= 0.25)


def condition_summary(durations: npt.ArrayLike, observed: npt.ArrayLike) -> ConditionSummary:
    """Counts, fraction dispersed and the KM median and quartiles of dispersal time.

    The quartiles are read off the Kaplan-Meier curve, so censored trials count correctly;
    each is None when the curve does not fall that far. With no trials every statistic is
    None and the counts are 0 (a condition not yet run).
    """
    if np.asarray(durations).size == 0 and np.asarray(observed).size == 0:
        return ConditionSummary(
            n=0, n_dispersed=0, fraction_dispersed=None, median=None, q25=None, q75=None
        )
    times, events = _survival_arrays(durations, observed)
    km = kaplan_meier(times, events)
    n_dispersed = int(events.sum())
    return ConditionSummary(
        n=int(times.size),
        n_dispersed=n_dispersed,
        fraction_dispersed=n_dispersed / times.size,
        median=median_survival(km),
        q25=_time_at_level(km, 0.75),
        q75=_time_at_level(km, 0.25),
    )
