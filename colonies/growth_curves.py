"""Growth curves fitted to census estimates: exponential (on ln count) and logistic (on count).

Pure computation with no Django import. Every function raises ValueError naming the argument,
the value and the allowed range when it is given something impossible.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy import optimize, stats

from .population import _check_confidence, _check_finite, _check_positive

__all__ = ["FitError", "GrowthFit", "MODELS", "fit_growth"]

MODELS = ("exponential", "logistic")


class FitError(ValueError):
    """A growth curve could not be fitted to otherwise valid data (no convergence, or
    parameters the data cannot determine). A ValueError so one except clause catches both."""


def _exponential(t: np.ndarray | float, n0: float, r: float) -> np.ndarray | float:
    return n0 * np.exp(r * t)


def _logistic(t: np.ndarray | float, k: float, n0: float, r: float) -> np.ndarray | float:
    # N(t) = K / (1 + ((K - N0) / N0) exp(-r t)); an overflowing exp means N -> 0, which is right.
    with np.errstate(over="ignore"):
        return k / (1 + (k / n0 - 1) * np.exp(-r * t))


def _doubling(rate: float) -> float | None:
    return math.log(2) / rate if rate > 0 else None


def _doubling_ci(rate_ci: tuple[float, float]) -> tuple[float, float] | None:
    lo, hi = rate_ci
    if hi <= 0:
        return None
    # A rate interval reaching down to zero or below means the doubling time is unbounded.
    return (math.log(2) / hi, math.log(2) / lo if lo > 0 else math.inf)


@dataclass(frozen=True)
class GrowthFit:
    """A fitted growth curve; day 0 is day 0 of the `days` given to fit_growth.

    For the logistic model `rate_per_day` and the doubling time are the low-density
    (intrinsic) values. `r_squared` and `residual_se` are on the scale that was fitted:
    ln(count) for the exponential model, count for the logistic model.
    """

    model: str
    rate_per_day: float
    rate_ci: tuple[float, float]
    initial: float
    initial_ci: tuple[float, float]
    doubling_time_days: float | None
    doubling_time_ci: tuple[float, float] | None
    carrying_capacity: float | None
    carrying_capacity_ci: tuple[float, float] | None
    n_points: int
    r_squared: float
    residual_se: float
    confidence: float

    def predict(self, day: float) -> float:
        t = _check_finite("day", day)
        if self.model == "exponential":
            return float(_exponential(t, self.initial, self.rate_per_day))
        assert self.carrying_capacity is not None
        return float(_logistic(t, self.carrying_capacity, self.initial, self.rate_per_day))

    def day_reaching(self, size: float) -> float | None:
        """The day the fitted curve rises through `size` (before day 0 if it already had).

        None when the curve never grows to `size`: a rate of zero or below, a logistic
        curve starting at or above its carrying capacity, or `size` at or above it.
        """
        s = _check_positive("size", size, "animals")
        r, n0 = self.rate_per_day, self.initial
        if r <= 0:
            return None
        if self.model == "exponential":
            return math.log(s / n0) / r
        k = self.carrying_capacity
        assert k is not None
        if n0 >= k or s >= k:
            return None
        return -math.log((k / s - 1) / (k / n0 - 1)) / r


def _check_series(
    days: Sequence[float], counts: Sequence[float], model: str
) -> tuple[np.ndarray, np.ndarray]:
    if model not in MODELS:
        raise ValueError(f"model must be one of {', '.join(MODELS)}, got {model!r}")
    if len(days) != len(counts):
        raise ValueError(
            f"days and counts must have the same length, got {len(days)} days and {len(counts)} counts"
        )
    minimum = 3 if model == "exponential" else 4
    if len(days) < minimum:
        raise ValueError(
            f"a {model} fit needs at least {minimum} points, got {len(days)}"
        )
    t = np.array([_check_finite(f"days[{i}]", d) for i, d in enumerate(days)])
    y = np.array([_check_finite(f"counts[{i}]", c) for i, c in enumerate(counts)])
    for i, c in enumerate(y):
        if c < 0:
            raise ValueError(f"counts[{i}] must be >= 0 animals, got {counts[i]}")
        if model == "exponential" and c == 0:
            # ln(0) is undefined; a culture that hit zero is not growing exponentially.
            raise ValueError(
                f"counts[{i}] must be > 0 for an exponential fit (it is fitted on ln counts), got {counts[i]}"
            )
    distinct = 2 if model == "exponential" else 3
    if len(np.unique(t)) < distinct:
        raise ValueError(
            f"days must hold at least {distinct} different days for a {model} fit, "
            f"got {sorted(set(t.tolist()))}"
        )
    if model == "logistic" and not np.any(y > 0):
        raise ValueError("counts must include at least one count > 0 for a logistic fit, got all zeros")
    return t, y


def fit_growth(
    days: Sequence[float], counts: Sequence[float], model: str = "exponential", confidence: float = 0.95
) -> GrowthFit:
    """Fit an exponential or logistic growth curve to census counts.

    Exponential: least squares of ln(count) on day (multiplicative, roughly constant relative
    counting error); rate and ln N0 intervals from their standard errors and t(n - 2).
    Logistic: nonlinear least squares on counts, N(t) = K / (1 + ((K - N0)/N0) exp(-r t)),
    intervals from the residual-scaled covariance matrix and t(n - 3). Both are Wald
    intervals: approximate, and optimistic when the data barely determine a parameter.
    Raises FitError (a ValueError) when the logistic fit fails or K cannot be determined,
    typically because the counts have not started to level off.
    """
    c = _check_confidence(confidence)
    t, y = _check_series(days, counts, model)
    n = len(t)

    if model == "exponential":
        fit = stats.linregress(t, np.log(y))
        q = float(stats.t.ppf(0.5 + c / 2, n - 2))
        rate, ln_n0 = float(fit.slope), float(fit.intercept)
        rate_ci = (rate - q * float(fit.stderr), rate + q * float(fit.stderr))
        residuals = np.log(y) - (ln_n0 + rate * t)
        return GrowthFit(
            model=model, rate_per_day=rate, rate_ci=rate_ci, initial=math.exp(ln_n0),
            initial_ci=(
                math.exp(ln_n0 - q * float(fit.intercept_stderr)),
                math.exp(ln_n0 + q * float(fit.intercept_stderr)),
            ),
            doubling_time_days=_doubling(rate), doubling_time_ci=_doubling_ci(rate_ci),
            carrying_capacity=None, carrying_capacity_ci=None, n_points=n,
            r_squared=float(fit.rvalue**2),
            residual_se=math.sqrt(float(residuals @ residuals) / (n - 2)), confidence=c,
        )

    k, n0, rate = _fit_logistic(t, y)
    residuals = y - _logistic(t, k, n0, rate)
    sse = float(residuals @ residuals)
    se_k, se_n0, se_r = _logistic_standard_errors(t, (k, n0, rate), sse / (n - 3))
    q = float(stats.t.ppf(0.5 + c / 2, n - 3))
    rate_ci = (rate - q * se_r, rate + q * se_r)
    sst = float(((y - y.mean()) ** 2).sum())
    return GrowthFit(
        model=model, rate_per_day=rate, rate_ci=rate_ci, initial=n0,
        initial_ci=(n0 - q * se_n0, n0 + q * se_n0),
        doubling_time_days=_doubling(rate), doubling_time_ci=_doubling_ci(rate_ci),
        carrying_capacity=k, carrying_capacity_ci=(k - q * se_k, k + q * se_k), n_points=n,
        r_squared=1 - sse / sst if sst > 0 else 1.0,
        residual_se=math.sqrt(sse / (n - 3)), confidence=c,
    )


def _logistic_jacobian(t: np.ndarray, k: float, n0: float, r: float) -> np.ndarray:
    """dN/dK, dN/dN0, dN/dr at each day (rows). NumPy floats throughout, so a parameter the
    data cannot bound (K in the 1e200s) gives inf, never an OverflowError."""
    k, n0, r = np.float64(k), np.float64(n0), np.float64(r)
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        e = np.exp(-r * t)
        q = k / n0 - 1
        d = 1 + q * e
        return np.column_stack((
            1 / d - k * e / (n0 * d**2),  # dN/dK
            k**2 * e / (n0**2 * d**2),    # dN/dN0
            k * q * t * e / d**2,         # dN/dr
        ))


def _logistic_standard_errors(
    t: np.ndarray, params: tuple[float, float, float], s2: float
) -> tuple[float, float, float]:
    # Covariance s^2 (J'J)^-1 from the analytic Jacobian. curve_fit's own covariance uses a
    # truncated pseudo-inverse, which reports a zero-width interval for a carrying capacity the
    # data cannot determine (counts still rising); a plain inverse reports it as huge instead.
    jac = _logistic_jacobian(t, *params)
    # Scale columns by the parameters so J'J is not ill-conditioned by units alone.
    scale = np.array([abs(p) if p != 0 else 1.0 for p in params])
    js = jac * scale
    try:
        with np.errstate(over="ignore", invalid="ignore"):
            inv = np.linalg.inv(js.T @ js)
    except np.linalg.LinAlgError:
        inv = np.full((3, 3), np.inf)
    with np.errstate(over="ignore", invalid="ignore"):
        se = np.sqrt(np.abs(np.diag(inv)) * s2) * scale
    if not np.all(np.isfinite(se)):
        raise FitError(
            "the logistic fit cannot determine its parameters from these counts "
            "(have they started to level off?); try model='exponential'"
        )
    return float(se[0]), float(se[1]), float(se[2])


_K_STARTS = (1.05, 1.5, 3)  # starting carrying capacities, as multiples of the largest count
_XTOL = 1e-10  # relative step at which Levenberg-Marquardt stops (MINPACK's default is 1.5e-8)
_FAILED = 1e150  # residual returned where the curve overflows: the step is refused, not taken


def _fit_logistic(t: np.ndarray, y: np.ndarray) -> tuple[float, float, float]:
    """Least-squares (K, N0, r): Levenberg-Marquardt (MINPACK lmder through scipy.optimize.leastsq)
    with the analytic Jacobian, from three starting points; the best fit of the three is kept.

    K and N0 are fitted as their logarithms, which keeps them positive without bounds. Why this and
    not curve_fit with bounds, as before: on the censuses of a culture that is not levelling off
    (most cultures most of the time) the least-squares problem has no finite minimum (K runs off to
    infinity, or the curve sharpens towards a step at one end), and the bounded trust-region solver,
    with a numerical Jacobian and an SVD per step in Python, crawled along that valley for 40-90
    steps per start: ~67 ms a fit, 27 s for the 400 tanks of the benchmark. MINPACK takes the same
    kind of steps in compiled code: ~2.6 ms a fit. Where a minimum exists both find the same one
    (tests/colonies/test_growth_curves.py checks it against the trust-region fit); along a valley
    each stops where its tolerances say (DEVELOPERS.md, "Growth fits").
    """
    top = float(y.max())
    positive = y > 0

    # The two callbacks run ~40 times per start: plain array arithmetic, no context managers (the
    # floating-point error state is set once around the solver).
    def residuals(p: np.ndarray) -> np.ndarray:
        k, q = np.exp(p[0]), np.exp(p[0] - p[1]) - 1
        out = k / (1 + q * np.exp(-p[2] * t)) - y
        return np.where(np.isfinite(out), out, _FAILED)

    def jacobian(p: np.ndarray) -> np.ndarray:
        # Rows d/d ln K = K dN/dK, d/d ln N0 = N0 dN/dN0, d/dr (one row per parameter: col_deriv).
        k, q, e = np.exp(p[0]), np.exp(p[0] - p[1]) - 1, np.exp(-p[2] * t)
        d = 1 + q * e
        n, g = k / d, k * (q + 1) * e / d**2
        jac = np.array((n - g, g, n * q * t * e / d))
        return np.where(np.isfinite(jac), jac, 0.0)

    best: tuple[float, np.ndarray] | None = None
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        for factor in _K_STARTS:
            params = optimize.leastsq(residuals, _logit_start(t, y, positive, factor * top), Dfun=jacobian,
                                      col_deriv=True, full_output=True, xtol=_XTOL)[0]
            sse = float(residuals(params) @ residuals(params))
            if np.all(np.isfinite(params)) and sse < _FAILED and (best is None or sse < best[0]):
                best = (sse, params)
    if best is None:
        raise FitError("the logistic fit did not converge for these counts; try model='exponential'")
    ln_k, ln_n0, r = (float(p) for p in best[1])
    if max(ln_k, ln_n0) > 700:  # e^700 ~ 1e304: no number of animals
        raise FitError("the logistic fit cannot determine its parameters from these counts "
                       "(have they started to level off?); try model='exponential'")
    return math.exp(ln_k), math.exp(ln_n0), r


def _logit_start(t: np.ndarray, y: np.ndarray, positive: np.ndarray, k0: float) -> tuple[float, float, float]:
    """(ln K, ln N0, r) to start from, for a guess K0 above every count: the straight line through
    the logit transform ln(N / (K0 - N)) = ln(N0 / (K0 - N0)) + r t (ordinary least squares)."""
    r0, n00 = 0.1, float(y[positive][np.argmin(t[positive])])
    x = t[positive]
    if len(np.unique(x)) >= 2:
        z = np.log(y[positive] / (k0 - y[positive]))
        slope = float(((x - x.mean()) * (z - z.mean())).sum() / ((x - x.mean()) ** 2).sum())
        intercept = float(z.mean() - slope * x.mean())
        if math.isfinite(slope) and math.isfinite(intercept):
            r0, n00 = slope, k0 / (1 + math.exp(-intercept))
    return math.log(k0), math.log(n00), r0
