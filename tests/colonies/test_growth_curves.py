"""Tests for colonies.growth_curves: exponential and logistic growth fits, pure (no database)."""

import dataclasses
import math
import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import optimize, stats

from colonies.growth_curves import FitError, GrowthFit, _logistic, fit_growth


def _exponential_data(seed: int = 20240501):
    # r = 0.06 per day -> doubling in ln 2 / 0.06 = 11.55 days, inside the 10-14 days of the EU
    # Regulation 2016/266 culture appendix (REFERENCES.md). Multiplicative (lognormal) noise, sd 0.1.
    rng = np.random.default_rng(seed)
    days = np.arange(0, 30, 2.0)
    counts = 500 * np.exp(0.06 * days) * np.exp(rng.normal(0, 0.1, days.size))
    return days, counts


def _logistic_data(seed: int = 7):
    rng = np.random.default_rng(seed)
    days = np.arange(0, 32, 2.0)
    counts = 2000 / (1 + (2000 / 100 - 1) * np.exp(-0.3 * days)) + rng.normal(0, 30, days.size)
    return days, counts


def test_exponential_fit_recovers_known_parameters_within_its_intervals():
    days, counts = _exponential_data()
    fit = fit_growth(days.tolist(), counts.tolist())
    assert fit.model == "exponential" and fit.n_points == 15
    assert fit.rate_ci[0] < 0.06 < fit.rate_ci[1]
    assert fit.initial_ci[0] < 500 < fit.initial_ci[1]
    assert fit.doubling_time_ci is not None
    assert fit.doubling_time_ci[0] < math.log(2) / 0.06 < fit.doubling_time_ci[1]
    assert fit.doubling_time_days == pytest.approx(math.log(2) / fit.rate_per_day)
    assert fit.carrying_capacity is None and fit.carrying_capacity_ci is None
    assert fit.r_squared > 0.95


def test_exponential_fit_matches_numpy_polyfit():
    # Reference library: numpy.polyfit on ln(counts), covariance scaled by SSE / (n - 2).
    days, counts = _exponential_data()
    fit = fit_growth(days.tolist(), counts.tolist())
    (slope, intercept), cov = np.polyfit(days, np.log(counts), 1, cov=True)
    q = stats.t.ppf(0.975, days.size - 2)
    assert fit.rate_per_day == pytest.approx(slope, rel=1e-10)
    assert fit.initial == pytest.approx(math.exp(intercept), rel=1e-10)
    half = q * math.sqrt(cov[0, 0])
    assert fit.rate_ci == pytest.approx((slope - half, slope + half), rel=1e-8)
    residuals = np.log(counts) - np.polyval((slope, intercept), days)
    assert fit.residual_se == pytest.approx(math.sqrt((residuals**2).sum() / (days.size - 2)))


def test_exponential_fit_on_exact_data_is_exact_and_predicts_both_ways():
    # 100 animals doubling every 10 days: N = 100 * 2^(t/10).
    days = [0.0, 10.0, 20.0, 30.0]
    fit = fit_growth(days, [100.0, 200.0, 400.0, 800.0])
    assert fit.rate_per_day == pytest.approx(math.log(2) / 10)
    assert fit.doubling_time_days == pytest.approx(10.0)
    assert fit.predict(15) == pytest.approx(100 * 2**1.5)
    assert fit.day_reaching(1600) == pytest.approx(40.0)
    assert fit.day_reaching(50) == pytest.approx(-10.0)  # the curve passed 50 before day 0
    assert fit.r_squared == pytest.approx(1.0)


def test_declining_culture_has_no_doubling_time_and_never_grows_to_a_size():
    # Halving every 5 days.
    fit = fit_growth([0, 5, 10, 15], [800, 400, 200, 100])
    assert fit.rate_per_day == pytest.approx(-math.log(2) / 5)
    assert fit.doubling_time_days is None and fit.doubling_time_ci is None
    assert fit.day_reaching(1000) is None
    assert fit.day_reaching(50) is None


def test_doubling_time_interval_is_open_ended_when_the_rate_interval_includes_zero():
    fit = fit_growth([0, 1, 2, 3], [100, 90, 130, 105])
    assert fit.rate_ci[0] < 0 < fit.rate_ci[1]
    assert fit.doubling_time_ci is not None and fit.doubling_time_ci[1] == math.inf


def test_logistic_fit_recovers_known_parameters_within_its_intervals():
    days, counts = _logistic_data()
    fit = fit_growth(days.tolist(), counts.tolist(), model="logistic")
    assert fit.model == "logistic" and fit.n_points == 16
    assert fit.carrying_capacity_ci is not None
    assert fit.carrying_capacity_ci[0] < 2000 < fit.carrying_capacity_ci[1]
    assert fit.rate_ci[0] < 0.3 < fit.rate_ci[1]
    assert fit.initial_ci[0] < 100 < fit.initial_ci[1]
    assert fit.r_squared > 0.99


def test_logistic_fit_matches_an_independent_least_squares_fit():
    # Reference: scipy.optimize.least_squares (Levenberg-Marquardt, a different start, the logistic
    # written as K / (1 + exp(-r (t - t_mid)))), with the covariance s^2 (J'J)^-1 from its Jacobian.
    days, counts = _logistic_data()
    fit = fit_growth(days.tolist(), counts.tolist(), model="logistic")

    def residuals(p):
        k, t_mid, r = p
        return k / (1 + np.exp(-r * (days - t_mid))) - counts

    ref = optimize.least_squares(residuals, x0=[1500.0, 15.0, 0.2], method="lm", xtol=1e-14, ftol=1e-14)
    k, t_mid, r = ref.x
    n0 = k / (1 + math.exp(r * t_mid))
    assert fit.carrying_capacity == pytest.approx(k, rel=1e-5)
    assert fit.rate_per_day == pytest.approx(r, rel=1e-5)
    assert fit.initial == pytest.approx(n0, rel=1e-4)

    s2 = (ref.fun @ ref.fun) / (days.size - 3)
    cov = s2 * np.linalg.inv(ref.jac.T @ ref.jac)
    q = stats.t.ppf(0.975, days.size - 3)
    # K and r are the same parameters in both forms, so their intervals must agree.
    assert fit.carrying_capacity_ci == pytest.approx((k - q * math.sqrt(cov[0, 0]), k + q * math.sqrt(cov[0, 0])), rel=1e-4)
    assert fit.rate_ci == pytest.approx((r - q * math.sqrt(cov[2, 2]), r + q * math.sqrt(cov[2, 2])), rel=1e-4)
    assert fit.residual_se == pytest.approx(math.sqrt(s2), rel=1e-5)


def test_logistic_predict_and_day_reaching_are_inverse_and_stop_at_carrying_capacity():
    days, counts = _logistic_data()
    fit = fit_growth(days.tolist(), counts.tolist(), model="logistic")
    assert fit.carrying_capacity is not None
    assert fit.predict(0) == pytest.approx(fit.initial)
    day = fit.day_reaching(1000)
    assert day is not None and fit.predict(day) == pytest.approx(1000)
    # Half the carrying capacity is reached at ln((K - N0) / N0) / r.
    k, n0, r = fit.carrying_capacity, fit.initial, fit.rate_per_day
    assert fit.day_reaching(k / 2) == pytest.approx(math.log((k - n0) / n0) / r)
    assert fit.day_reaching(k) is None
    assert fit.day_reaching(k * 1.2) is None


def test_logistic_fit_on_still_rising_counts_reports_an_undetermined_carrying_capacity():
    # Pure doubling, no levelling off: K cannot be pinned down, so its interval must be huge, not
    # the zero-width interval a truncated pseudo-inverse would give.
    days = [0, 1, 2, 3, 4, 5]
    fit = fit_growth(days, [10, 21, 39, 82, 158, 330], model="logistic")
    assert fit.carrying_capacity_ci is not None and fit.carrying_capacity is not None
    low, high = fit.carrying_capacity_ci
    assert high - low > fit.carrying_capacity


def test_logistic_fit_allows_zero_counts():
    days, counts = _logistic_data()
    counts[0] = 0.0
    fit = fit_growth(days.tolist(), counts.tolist(), model="logistic")
    assert fit.carrying_capacity == pytest.approx(2000, rel=0.05)


def test_growth_fit_is_frozen():
    fit = fit_growth([0, 1, 2], [10, 20, 40])
    assert isinstance(fit, GrowthFit)
    with pytest.raises(dataclasses.FrozenInstanceError):
        fit.rate_per_day = 1.0  # type: ignore[misc]


@pytest.mark.parametrize(
    ("days", "counts", "model", "argument"),
    [
        ([0, 1], [10, 20], "exponential", "at least 3 points"),
        ([0, 1, 2], [10, 20, 40], "logistic", "at least 4 points"),
        ([0, 1, 2], [10, 20], "exponential", "same length"),
        ([0, 1, 2], [10, 0, 40], "exponential", r"counts\[1\]"),
        ([0, 1, 2], [10, -5, 40], "exponential", r"counts\[1\]"),
        ([0, 1, 2, 3], [10, -5, 40, 50], "logistic", r"counts\[1\]"),
        ([0, 1, 2], [10, math.nan, 40], "exponential", r"counts\[1\]"),
        ([0, 1, 2], [10, math.inf, 40], "exponential", r"counts\[1\]"),
        ([0, math.nan, 2], [10, 20, 40], "exponential", r"days\[1\]"),
        ([0, 1, 2], [10, 20, 40], "gompertz", "model"),
        ([3, 3, 3], [10, 20, 40], "exponential", "days"),
        ([0, 1, 2, 3], [0, 0, 0, 0], "logistic", "counts"),
    ],
)
def test_fit_growth_rejects_impossible_input(days, counts, model, argument):
    with pytest.raises(ValueError, match=argument):
        fit_growth(days, counts, model=model)


def test_fit_error_is_a_value_error():
    assert issubclass(FitError, ValueError)


def test_day_reaching_rejects_non_positive_size():
    fit = fit_growth([0, 1, 2], [10, 20, 40])
    with pytest.raises(ValueError, match="size"):
        fit.day_reaching(0)


@settings(max_examples=50, deadline=None)
@given(
    n0=st.floats(min_value=1, max_value=1e4),
    rate=st.floats(min_value=0.01, max_value=0.5),
    target_factor=st.floats(min_value=0.1, max_value=100),
)
def test_exponential_predict_inverts_day_reaching(n0, rate, target_factor):
    days = [0.0, 3.0, 7.0, 10.0]
    fit = fit_growth(days, [n0 * math.exp(rate * d) for d in days])
    day = fit.day_reaching(n0 * target_factor)
    assert day is not None
    assert fit.predict(day) == pytest.approx(n0 * target_factor, rel=1e-6)


def _trust_region_reference(days: np.ndarray, counts: np.ndarray) -> float:
    """The smallest sum of squares scipy.optimize.curve_fit (bounded trust-region reflective, numerical
    Jacobian: the method Vermilog used before) reaches from the same three starting values."""
    top, best = counts.max(), math.inf
    for k0 in (1.05 * top, 1.5 * top, 3 * top):
        line = stats.linregress(days, np.log(counts / (k0 - counts)))
        start = (k0, k0 / (1 + math.exp(-line.intercept)), line.slope)
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", optimize.OptimizeWarning)
                params, _ = optimize.curve_fit(_logistic, days, counts, p0=start, x_scale="jac", max_nfev=10_000,
                                               bounds=([top * 1e-9, top * 1e-12, -np.inf], [np.inf] * 3))
        except RuntimeError:
            continue
        best = min(best, float(((counts - _logistic(days, *params)) ** 2).sum()))
    return best


@settings(max_examples=25, deadline=None)
@given(
    k=st.floats(min_value=200, max_value=20_000),
    start_share=st.floats(min_value=0.02, max_value=0.4),
    rate=st.floats(min_value=0.05, max_value=0.5),
    noise=st.sampled_from([0.02, 0.05, 0.1]),
    seed=st.integers(min_value=0, max_value=2**16),
)
def test_logistic_fit_reaches_the_least_squares_of_a_trust_region_reference(k, start_share, rate, noise, seed):
    # Reference: scipy.optimize.curve_fit (bounded trust-region reflective), the method used before
    # the switch to MINPACK's Levenberg-Marquardt. On growth that levels off, where the least-squares
    # problem has a minimum, both must find it: the sum of squares may be lower, never higher.
    rng = np.random.default_rng(seed)
    days = np.arange(0, 16) * 20 / (rate * 15)  # the whole rise and the plateau, 16 censuses
    counts = np.round(k / (1 + (1 / start_share - 1) * np.exp(-rate * days)) * np.exp(rng.normal(0, noise, 16)))
    fit = fit_growth(days.tolist(), counts.tolist(), model="logistic")
    sse = float(((counts - _logistic(days, fit.carrying_capacity, fit.initial, fit.rate_per_day)) ** 2).sum())
    assert sse <= _trust_region_reference(days, counts) * (1 + 1e-7)


def test_logistic_fit_of_counts_that_never_level_off_gives_a_fit_or_a_fit_error_never_an_overflow():
    # Stationary counts around 3,000 (a culture kept at its density): K can run off to infinity.
    days = [0.0, 14.0, 28.0, 42.0, 56.0, 70.0, 84.0, 98.0]
    for counts in ([3400, 3310, 3320, 2990, 3520, 3290, 3760, 3710], [10, 20, 40, 80, 160, 320, 640, 1280]):
        try:
            fit = fit_growth(days, counts, model="logistic")
        except FitError:
            continue
        assert all(math.isfinite(v) for v in (fit.rate_per_day, fit.initial, fit.carrying_capacity))
