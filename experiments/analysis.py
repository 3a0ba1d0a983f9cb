"""Statistics for aggregation trials and dose-response experiments (pure Python, no Django).

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
    `fit_dose_response` fits the two-parameter log-logistic model logit(p) = a + b log10(dose)
    to binomial counts by maximum likelihood (statsmodels GLM, Binomial family, logit link), as
    in Finney's *Probit Analysis* with the logit in place of the probit. EC50 = 10^(-a/b).

    * The 95 % interval for EC50 is Fieller's interval for the ratio -a/b (log10 EC50), back-
      transformed. When g = z^2 Var(b) / b^2 >= 1 the slope is not clearly different from zero
      and Fieller's set is unbounded; the fit then falls back to the delta method on log10 EC50
      and says so in ``method`` (and ``interval_method == "delta"``): treat that interval as
      unreliable. z is the normal quantile: the binomial variance is taken as known and no
      heterogeneity factor is applied; check ``gof_p`` (Pearson chi-square) before trusting
      the interval when dishes vary more than binomially (worms clump).
    * Doses must be positive: a log-dose model cannot place a zero dose. Fit the treated groups
      here and report the control (zero-dose) group separately; no Abbott correction is made.
    * Groups that show no response at any dose, a full response at every dose, or a jump from
      none to all between neighbouring doses (separation) carry no information on the slope:
      the maximum-likelihood estimate does not exist and the fit is refused with ValueError.

Dependencies
    numpy, scipy, pandas and statsmodels only: statsmodels is already a runtime dependency of
    Vermilog (and supplies the GLM), and the survival estimators are short enough to write out
    so that every step is visible. lifelines is a development dependency used in the tests as
    an independent reference implementation; it is not imported here.
"""
from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal, TypedDict, overload

import numpy as np
import numpy.typing as npt
import pandas as pd
from scipy import special, stats
from statsmodels.genmod import families
from statsmodels.genmod.generalized_linear_model import GLM

KM_COLUMNS = ("time", "at_risk", "events", "censored", "survival", "lower", "upper")

# A product of factors such as 3/4 * 2/3 can land a hair above 0.5 in floating point; a curve
# that is exactly on a level should count as having reached it.
_LEVEL_TOLERANCE = 1e-12

# 10**x overflows a float above about x = 308.25.
_MAX_LOG10 = 308.0


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


# --------------------------------------------------------------------------------------------
# Dose-response: two-parameter log-logistic on binomial counts
# --------------------------------------------------------------------------------------------


def _pow10(x: float) -> float:
    if x > _MAX_LOG10:
        return math.inf
    return float(10.0**x)


@dataclass(frozen=True)
class DoseResponseFit:
    """A fitted log-logistic curve logit(p) = intercept + slope * log10(dose).

    ``slope`` is per log10 unit of dose. ``ec50_lower``/``ec50_upper`` form the 95 % interval
    (Fieller, or the delta method when Fieller's is unbounded: see ``interval_method`` and
    ``method``). ``gof_p`` is the Pearson chi-square goodness-of-fit p value on ``df_resid``
    degrees of freedom; a small value means more scatter between groups than binomial.
    """

    ec50: float
    ec50_lower: float
    ec50_upper: float
    slope: float
    slope_se: float
    intercept: float
    intercept_se: float
    n_groups: int
    deviance: float
    pearson_chi2: float
    df_resid: int
    gof_p: float
    interval_method: Literal["fieller", "delta"]
    method: str

    @overload
    def predict(self, dose: float) -> float: ...

    @overload
    def predict(
        self, dose: Sequence[float] | npt.NDArray[np.floating]
    ) -> npt.NDArray[np.float64]: ...

    def predict(
        self, dose: float | Sequence[float] | npt.NDArray[np.floating]
    ) -> float | npt.NDArray[np.float64]:
        """Fitted probability of response at ``dose`` (same unit as the fitted doses).

        Dose 0 gives the model's limit (0 for a rising curve, 1 for a falling one).
        """
        values = np.asarray(dose, dtype=float)
        if np.any(~np.isfinite(values)) or np.any(values < 0):
            raise ValueError("dose must be a finite number >= 0")
        with np.errstate(divide="ignore"):
            linear = self.intercept + self.slope * np.log10(values)
        probability = special.expit(linear)
        if values.ndim == 0:
            return float(probability)
        return np.asarray(probability, dtype=float)


def _count_array(values: npt.ArrayLike, name: str) -> npt.NDArray[np.int64]:
    array = np.asarray(values, dtype=float).ravel()
    if not np.all(np.isfinite(array)):
        raise ValueError(f"{name} must be finite whole numbers")
    if np.any(array < 0):
        raise ValueError(f"{name} must not be negative: got {float(array.min()):g}")
    if np.any(array != np.round(array)):
        raise ValueError(f"{name} must be whole numbers of animals or dishes")
    return array.astype(np.int64)


def _dose_arrays(
    doses: npt.ArrayLike, n_responding: npt.ArrayLike, n_total: npt.ArrayLike
) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.int64], npt.NDArray[np.int64]]:
    dose = np.asarray(doses, dtype=float).ravel()
    responding = _count_array(n_responding, "n_responding")
    total = _count_array(n_total, "n_total")
    if not dose.size == responding.size == total.size:
        raise ValueError(
            "doses, n_responding and n_total must have the same length: got "
            f"{dose.size}, {responding.size} and {total.size}"
        )
    if not np.all(np.isfinite(dose)):
        raise ValueError("doses must be finite numbers")
    if np.any(dose < 0):
        raise ValueError(f"doses must not be negative: got {float(dose.min()):g}")
    if np.any(dose == 0):
        raise ValueError(
            "doses must be positive: the log-logistic model uses log10(dose), which has no "
            "value at 0. Leave the control (zero-dose) group out of the fit and report it "
            "separately."
        )
    if np.any(total == 0):
        raise ValueError("every dose group needs n_total >= 1")
    over = responding > total
    if np.any(over):
        i = int(np.argmax(over))
        raise ValueError(
            f"n_responding ({responding[i]}) exceeds n_total ({total[i]}) at dose {dose[i]:g}"
        )
    n_doses = np.unique(dose).size
    if n_doses < 3:
        raise ValueError(
            f"at least 3 different doses are needed to fit a slope and judge the fit: "
            f"got {n_doses}"
        )
    return dose, responding, total


def _check_slope_information(
    dose: npt.NDArray[np.float64],
    responding: npt.NDArray[np.int64],
    total: npt.NDArray[np.int64],
) -> None:
    """Refuse data whose maximum-likelihood slope is infinite or undefined."""
    if not np.any(responding > 0):
        raise ValueError(
            "no response at any dose: the data carry no information on the slope or EC50"
        )
    if not np.any(responding < total):
        raise ValueError(
            "full response at every dose: the data carry no information on the slope or EC50"
        )
    # With one covariate the MLE fails to exist exactly when the doses with responders and the
    # doses with non-responders do not overlap (complete or quasi-complete separation).
    with_responders = dose[responding > 0]
    with_non_responders = dose[responding < total]
    if (
        with_non_responders.max() <= with_responders.min()
        or with_responders.max() <= with_non_responders.min()
    ):
        raise ValueError(
            "the response goes from none to all between neighbouring doses (separation): "
            "the slope is infinite and the EC50 only bracketed. Test doses in between."
        )


def _fieller_interval(
    a: float, b: float, var_a: float, var_b: float, cov_ab: float, z: float
) -> tuple[float, float] | None:
    """Fieller's interval for m = -a/b, or None when it is unbounded (g >= 1).

    The set {m : (a + b m)^2 <= z^2 Var(a + b m)} is the interval between the roots of
    A m^2 + 2 B m + C = 0 with A = b^2 (1 - g), B = a b - z^2 cov, C = a^2 - z^2 Var(a).
    """
    g = z**2 * var_b / b**2
    if g >= 1:
        return None
    quad_a = b**2 - z**2 * var_b
    quad_b = a * b - z**2 * cov_ab
    quad_c = a**2 - z**2 * var_a
    half_width = math.sqrt(max(quad_b**2 - quad_a * quad_c, 0.0)) / quad_a
    centre = -quad_b / quad_a
    return centre - half_width, centre + half_width


def fit_dose_response(
    doses: npt.ArrayLike, n_responding: npt.ArrayLike, n_total: npt.ArrayLike
) -> DoseResponseFit:
    """Fit logit(p) = a + b log10(dose) to binomial counts; EC50 = 10^(-a/b) with 95 % limits.

    One row per dose group (replicate dishes at the same dose may be given as separate rows).
    """
    dose, responding, total = _dose_arrays(doses, n_responding, n_total)
    _check_slope_information(dose, responding, total)

    log_dose = np.log10(dose)
    exog = np.column_stack((np.ones_like(log_dose), log_dose))
    endog = np.column_stack((responding, total - responding)).astype(float)
    result = GLM(endog, exog, family=families.Binomial()).fit()
    if not getattr(result, "converged", True):
        raise ValueError("the maximum-likelihood fit did not converge; check the data")

    a, b = (float(v) for v in result.params)
    cov = np.asarray(result.cov_params(), dtype=float)
    var_a, var_b, cov_ab = float(cov[0, 0]), float(cov[1, 1]), float(cov[0, 1])
    z = float(stats.norm.ppf(0.975))
    log_ec50 = -a / b

    model = (
        "two-parameter log-logistic, logit(p) = a + b*log10(dose), "
        "binomial maximum likelihood (statsmodels GLM)"
    )
    fieller = _fieller_interval(a, b, var_a, var_b, cov_ab, z)
    interval_method: Literal["fieller", "delta"]
    if fieller is not None:
        log_lower, log_upper = fieller
        interval_method = "fieller"
        interval_text = "95 % interval for EC50 by Fieller's theorem on log10 EC50"
    else:
        g = z**2 * var_b / b**2
        se_log = math.sqrt(var_a + 2 * log_ec50 * cov_ab + log_ec50**2 * var_b) / abs(b)
        log_lower, log_upper = log_ec50 - z * se_log, log_ec50 + z * se_log
        interval_method = "delta"
        interval_text = (
            f"Fieller's interval is unbounded (g = {g:.3g} >= 1: the slope is not clearly "
            "different from zero), so the 95 % interval shown is by the delta method on "
            "log10 EC50 and is unreliable"
        )

    pearson = float(result.pearson_chi2)
    df_resid = int(round(float(result.df_resid)))
    return DoseResponseFit(
        ec50=_pow10(log_ec50),
        ec50_lower=_pow10(log_lower),
        ec50_upper=_pow10(log_upper),
        slope=b,
        slope_se=math.sqrt(var_b),
        intercept=a,
        intercept_se=math.sqrt(var_a),
        n_groups=int(np.unique(dose).size),
        deviance=float(result.deviance),
        pearson_chi2=pearson,
        df_resid=df_resid,
        gof_p=float(stats.chi2.sf(pearson, df_resid)),
        interval_method=interval_method,
        method=f"{model}; {interval_text}",
    )
