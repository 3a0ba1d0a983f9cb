"""Tests for colonies.population: pure computation, no database."""

import dataclasses
import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy import special, stats
from statsmodels.stats.rates import confint_poisson

from colonies.population import (
    Estimate,
    aliquot_estimate,
    animal_days,
    direct_count_estimate,
    gravimetric_estimate,
    mortality_rate_per_1000_animal_days,
    poisson_interval,
    split_balance,
)

# ---------------------------------------------------------------------------
# poisson_interval


def test_poisson_interval_k10_matches_garwood_table():
    # Garwood (1936) Biometrika 28:437-442, as tabulated (REFERENCES.md [V]): k = 10 -> 4.7954-18.3904 at 95 %.
    lower, upper = poisson_interval(10, 0.95)
    assert lower == pytest.approx(4.7954, abs=5e-5)
    assert upper == pytest.approx(18.3904, abs=5e-5)


def test_poisson_interval_k0_has_lower_zero_and_closed_form_upper():
    # Closed form, not a table: for k = 0 the upper bound solves P(X = 0) = exp(-mu) = alpha/2,
    # so mu = -ln(0.025) = 3.68888 at 95 % two-sided. (The "rule of three", 2.996 = -ln(0.05),
    # is the 95 % one-sided bound, a different quantity.)
    lower, upper = poisson_interval(0, 0.95)
    assert lower == 0.0
    assert upper == pytest.approx(-math.log(0.025), rel=1e-12)
    assert upper == pytest.approx(3.689, abs=5e-4)


@pytest.mark.parametrize("k", [1, 2, 5, 17, 30, 100, 1000])
@pytest.mark.parametrize("confidence", [0.90, 0.95, 0.99])
def test_poisson_interval_matches_reference_libraries(k, confidence):
    # Reference library 1: statsmodels confint_poisson(method="exact-c"), the exact central interval.
    # Reference library 2: the gamma-function form lower = P^-1(k, a/2), upper = P^-1(k + 1, 1 - a/2)
    # with scipy.special.gammaincinv (an independent route to the same Garwood bounds).
    alpha = 1 - confidence
    lower, upper = poisson_interval(k, confidence)
    sm_lower, sm_upper = confint_poisson(k, 1.0, method="exact-c", alpha=alpha)
    assert lower == pytest.approx(sm_lower, rel=1e-9)
    assert upper == pytest.approx(sm_upper, rel=1e-9)
    assert lower == pytest.approx(special.gammaincinv(k, alpha / 2), rel=1e-9)
    assert upper == pytest.approx(special.gammaincinv(k + 1, 1 - alpha / 2), rel=1e-9)


@given(k=st.integers(min_value=0, max_value=5000), confidence=st.floats(min_value=0.5, max_value=0.999))
def test_poisson_interval_bounds_satisfy_their_defining_tail_probabilities(k, confidence):
    # Definition (Garwood 1936): P(X >= k | lower) = alpha/2 and P(X <= k | upper) = alpha/2,
    # checked with scipy.stats.poisson as the reference library.
    alpha = 1 - confidence
    lower, upper = poisson_interval(k, confidence)
    assert lower <= k <= upper
    assert stats.poisson.cdf(k, upper) == pytest.approx(alpha / 2, rel=1e-6)
    if k > 0:
        assert stats.poisson.sf(k - 1, lower) == pytest.approx(alpha / 2, rel=1e-6)


@given(k=st.integers(min_value=1, max_value=2000))
def test_poisson_relative_width_shrinks_as_more_animals_are_counted(k):
    lo1, hi1 = poisson_interval(k)
    lo2, hi2 = poisson_interval(k + 1)
    assert (hi2 - lo2) / (k + 1) < (hi1 - lo1) / k


@given(k=st.integers(min_value=0, max_value=500))
def test_poisson_interval_at_higher_confidence_contains_the_lower_confidence_one(k):
    lo90, hi90 = poisson_interval(k, 0.90)
    lo99, hi99 = poisson_interval(k, 0.99)
    assert lo99 <= lo90 and hi90 <= hi99


@pytest.mark.parametrize("count", [-1, 2.0, 2.5, True, None, "3"])
def test_poisson_interval_rejects_a_count_that_is_not_a_whole_number_of_animals(count):
    with pytest.raises(ValueError, match="count"):
        poisson_interval(count)


@pytest.mark.parametrize("confidence", [0, 1, 1.5, -0.1, math.nan, math.inf])
def test_poisson_interval_rejects_confidence_outside_zero_to_one(confidence):
    with pytest.raises(ValueError, match="confidence"):
        poisson_interval(5, confidence)


def test_poisson_interval_accepts_numpy_integers():
    assert poisson_interval(np.int64(10)) == poisson_interval(10)


# ---------------------------------------------------------------------------
# aliquot_estimate


def test_aliquot_estimate_poisson_case_worked_by_hand():
    # Counts 12, 8, 10 in three 1 mL aliquots of 100 mL:
    # sum 30, sampled fraction 3/100 = 0.03, N = 30 / 0.03 = 1000.
    # mean 10, sample variance ((2^2 + 2^2 + 0^2) / 2) = 4, variance/mean 0.4 <= 1 -> Poisson only.
    # Interval = Garwood(30) / 0.03 = (20.2409 / 0.03, 42.8269 / 0.03) = (674.70, 1427.56).
    est = aliquot_estimate([12, 8, 10], aliquot_ml=1.0, total_ml=100.0)
    lo30, hi30 = poisson_interval(30)
    assert est.value == pytest.approx(1000.0)
    assert est.lower == pytest.approx(lo30 / 0.03)
    assert est.upper == pytest.approx(hi30 / 0.03)
    assert est.lower == pytest.approx(674.70, abs=0.01)
    assert est.upper == pytest.approx(1427.56, abs=0.01)
    assert est.variance_to_mean == pytest.approx(0.4)
    assert est.n == 3 and est.counted == 30 and est.confidence == 0.95
    assert "Poisson" in est.method


def test_aliquot_estimate_clumped_counts_use_the_wider_t_interval():
    # Counts 2, 18, 10 in three 1 mL aliquots of 100 mL: sum 30, N = 1000 as above.
    # mean 10, variance ((8^2 + 8^2 + 0) / 2) = 64, variance/mean 6.4 > 1.
    # t interval: sd 8, se 8 / sqrt(3) = 4.6188, t(0.975, 2 df) = 4.30265, half-width 19.873
    # -> per aliquot (-9.873, 29.873), x 100 mL/1 mL -> (-987.3, 2987.3); the lower bound is raised
    # to the 30 animals actually counted. Width 2957 > Poisson width 1427.6 - 674.7 = 752.9.
    est = aliquot_estimate([2, 18, 10], aliquot_ml=1.0, total_ml=100.0)
    assert est.value == pytest.approx(1000.0)
    assert est.variance_to_mean == pytest.approx(6.4)
    assert est.lower == 30.0
    assert est.upper == pytest.approx(100 * (10 + 4.302653 * 8 / math.sqrt(3)), rel=1e-6)
    assert est.upper == pytest.approx(2987.3, abs=0.1)
    assert "t interval" in est.method and "clumped" in est.method


def test_aliquot_estimate_keeps_poisson_when_it_is_wider_despite_mild_overdispersion():
    # 100 aliquots of 1 mL from 1000 mL, counts alternating 0 and 2: sum 100, fraction 0.1, N = 1000.
    # mean 1, variance 100 / 99 = 1.0101 -> variance/mean 1.0101 > 1, so the t interval is tried:
    # se = sqrt(1.0101 / 100) = 0.10050, t(0.975, 99) = 1.98422, half 0.19942 -> x 1000: 1000 +/- 199.4,
    # width 398.8. Poisson: Garwood(100) = (81.364, 121.627) / 0.1 -> (813.6, 1216.3), width 402.6, wider.
    est = aliquot_estimate([0, 2] * 50, aliquot_ml=1.0, total_ml=1000.0)
    lo, hi = poisson_interval(100)
    assert est.variance_to_mean == pytest.approx(100 / 99)
    assert (est.lower, est.upper) == pytest.approx((lo / 0.1, hi / 0.1))
    assert "kept because it is wider" in est.method


def test_aliquot_estimate_single_aliquot_has_no_dispersion_and_uses_poisson():
    # 7 animals in 2 mL of 500 mL: fraction 0.004, N = 7 / 0.004 = 1750.
    est = aliquot_estimate([7], aliquot_ml=2.0, total_ml=500.0)
    lo, hi = poisson_interval(7)
    assert est.value == pytest.approx(1750.0)
    assert (est.lower, est.upper) == pytest.approx((lo / 0.004, hi / 0.004))
    assert est.variance_to_mean is None


def test_aliquot_estimate_all_zero_counts_gives_zero_with_an_upper_bound():
    # No animals in 4 x 5 mL of 1000 mL: N = 0, upper = 3.6889 / 0.02 = 184.4.
    est = aliquot_estimate([0, 0, 0, 0], aliquot_ml=5.0, total_ml=1000.0)
    assert est.value == 0.0 and est.lower == 0.0
    assert est.upper == pytest.approx(-math.log(0.025) / 0.02)
    assert est.variance_to_mean is None


def test_aliquot_estimate_lower_bound_never_below_the_animals_counted():
    # 1 animal in 1 mL of 10 mL: Garwood(1) lower 0.0253 / 0.1 = 0.253 < 1 animal seen -> 1.
    est = aliquot_estimate([1], aliquot_ml=1.0, total_ml=10.0)
    assert est.lower == 1.0


def test_aliquot_estimate_aliquots_covering_the_whole_volume_is_a_census():
    # 3 x 0.1 mL is 0.30000000000000004 in floating point: still "the whole 0.3 mL".
    est = aliquot_estimate([4, 9, 6], aliquot_ml=0.1, total_ml=0.3)
    assert (est.value, est.lower, est.upper) == (19.0, 19.0, 19.0)
    assert "Census" in est.method


@pytest.mark.parametrize(
    ("kwargs", "argument"),
    [
        ({"counts": [], "aliquot_ml": 1, "total_ml": 10}, "counts"),
        ({"counts": [3, -1], "aliquot_ml": 1, "total_ml": 10}, r"counts\[1\]"),
        ({"counts": [3, 1.5], "aliquot_ml": 1, "total_ml": 10}, r"counts\[1\]"),
        ({"counts": [3], "aliquot_ml": 0, "total_ml": 10}, "aliquot_ml"),
        ({"counts": [3], "aliquot_ml": -1, "total_ml": 10}, "aliquot_ml"),
        ({"counts": [3], "aliquot_ml": math.nan, "total_ml": 10}, "aliquot_ml"),
        ({"counts": [3], "aliquot_ml": 1, "total_ml": 0}, "total_ml"),
        ({"counts": [3], "aliquot_ml": 1, "total_ml": -5}, "total_ml"),
        ({"counts": [3], "aliquot_ml": 20, "total_ml": 10}, "total_ml"),
        ({"counts": [3, 4, 5], "aliquot_ml": 4, "total_ml": 10}, "total_ml"),
        ({"counts": [3], "aliquot_ml": 1, "total_ml": 10, "confidence": 95}, "confidence"),
    ],
)
def test_aliquot_estimate_rejects_impossible_input(kwargs, argument):
    with pytest.raises(ValueError, match=argument):
        aliquot_estimate(**kwargs)


@given(
    counts=st.lists(st.integers(min_value=0, max_value=300), min_size=1, max_size=12),
    aliquot_ml=st.floats(min_value=0.01, max_value=10),
    volume_factor=st.floats(min_value=1.0, max_value=1e4),
    confidence=st.sampled_from([0.8, 0.9, 0.95, 0.99]),
)
def test_aliquot_interval_contains_the_point_estimate(counts, aliquot_ml, volume_factor, confidence):
    total_ml = len(counts) * aliquot_ml * volume_factor
    est = aliquot_estimate(counts, aliquot_ml, total_ml, confidence)
    assert sum(counts) <= est.lower <= est.value <= est.upper
    assert math.isfinite(est.upper)


@given(per_aliquot=st.integers(min_value=1, max_value=200), n=st.integers(min_value=1, max_value=40))
def test_more_counted_aliquots_give_a_narrower_relative_interval_for_poisson_data(per_aliquot, n):
    # Equal counts (variance/mean 0) stay on the Poisson path; a tiny sampled fraction keeps
    # the "at least what was counted" floor out of play.
    fewer = aliquot_estimate([per_aliquot] * n, aliquot_ml=1.0, total_ml=1e6)
    more = aliquot_estimate([per_aliquot] * (n + 1), aliquot_ml=1.0, total_ml=1e6)
    assert (more.upper - more.lower) / more.value < (fewer.upper - fewer.lower) / fewer.value


def test_aliquot_estimate_with_real_poisson_data_covers_the_truth_most_of_the_time():
    # Simulation sanity check (fixed seed): 1000 animals, 5 aliquots of 1 % each.
    rng = np.random.default_rng(12345)
    hits = 0
    for _ in range(400):
        counts = rng.poisson(10, size=5).tolist()
        est = aliquot_estimate(counts, 1.0, 100.0)
        hits += est.lower <= 1000 <= est.upper
    assert hits / 400 >= 0.93


def test_estimate_is_frozen():
    est = direct_count_estimate(5)
    with pytest.raises(dataclasses.FrozenInstanceError):
        est.value = 6  # type: ignore[misc]


# ---------------------------------------------------------------------------
# direct_count_estimate and gravimetric_estimate


def test_direct_count_is_exact():
    est = direct_count_estimate(57)
    assert est == Estimate(
        value=57.0, lower=57.0, upper=57.0, confidence=1.0, method=est.method, n=1, counted=57
    )
    assert "Direct count" in est.method


@pytest.mark.parametrize("count", [-1, 3.0, None])
def test_direct_count_rejects_impossible_count(count):
    with pytest.raises(ValueError, match="count"):
        direct_count_estimate(count)


def test_gravimetric_estimate_worked_by_hand():
    # 40 animals in 0.25 g of a 12.5 g mass: 40 x 12.5 / 0.25 = 40 x 50 = 2000 animals.
    # Interval = Garwood(40) x 50 = (28.5766 x 50, 54.4686 x 50) = (1428.8, 2723.4).
    est = gravimetric_estimate(12.5, 0.25, 40)
    lo, hi = poisson_interval(40)
    assert est.value == pytest.approx(2000.0)
    assert (est.lower, est.upper) == pytest.approx((lo * 50, hi * 50))
    assert (est.lower, est.upper) == pytest.approx((1428.8, 2723.4), abs=0.1)
    assert "Poisson" in est.method and "mass" in est.method


def test_gravimetric_estimate_whole_mass_counted_is_bounded_below_by_the_count():
    est = gravimetric_estimate(2.0, 2.0, 40)
    assert est.value == 40.0 and est.lower == 40.0


@pytest.mark.parametrize(
    ("args", "argument"),
    [
        ((0, 0.1, 5), "total_mass_g"),
        ((-1, 0.1, 5), "total_mass_g"),
        ((1, 0, 5), "sample_mass_g"),
        ((1, -0.1, 5), "sample_mass_g"),
        ((1, 2, 5), "sample_mass_g"),
        ((1, 0.1, 0), "sample_count"),
        ((1, 0.1, -3), "sample_count"),
        ((1, 0.1, 2.5), "sample_count"),
        ((math.inf, 0.1, 5), "total_mass_g"),
    ],
)
def test_gravimetric_estimate_rejects_impossible_input(args, argument):
    with pytest.raises(ValueError, match=argument):
        gravimetric_estimate(*args)


@given(
    total=st.floats(min_value=0.01, max_value=1000),
    share=st.floats(min_value=1e-4, max_value=1.0),
    count=st.integers(min_value=1, max_value=5000),
)
def test_gravimetric_interval_contains_the_point_estimate(total, share, count):
    est = gravimetric_estimate(total, total * share, count)
    assert count <= est.lower <= est.value <= est.upper


# ---------------------------------------------------------------------------
# mortality and animal-days


def test_animal_days_trapezoid_worked_by_hand():
    # 100 animals on day 0, 200 on day 10: (100 + 200) / 2 x 10 = 1500 animal-days.
    assert animal_days([(0, 100), (10, 200)], 0, 10) == pytest.approx(1500.0)


def test_animal_days_holds_population_constant_outside_the_estimates():
    # Estimates 100 on day 5 and 200 on day 10, period day 0-15:
    # days 0-5 at 100 (first estimate held) = 500; days 5-10 trapezoid (100 + 200) / 2 x 5 = 750;
    # days 10-15 at 200 (last estimate held) = 1000; total 2250.
    assert animal_days([(10, 200), (5, 100)], 0, 15) == pytest.approx(2250.0)


def test_animal_days_with_a_period_inside_one_segment():
    # Linear from 100 (day 0) to 200 (day 10); day 2-4 runs from 120 to 140: 130 x 2 = 260.
    assert animal_days([(0, 100), (10, 200)], 2, 4) == pytest.approx(260.0)


def test_animal_days_of_an_empty_period_is_zero():
    assert animal_days([(0, 100)], 3, 3) == 0.0


@given(
    points=st.dictionaries(
        st.integers(min_value=0, max_value=100), st.floats(min_value=0, max_value=1e5), min_size=1, max_size=8
    ),
    a=st.floats(min_value=-10, max_value=110),
    b=st.floats(min_value=-10, max_value=110),
    c=st.floats(min_value=-10, max_value=110),
)
def test_animal_days_adds_up_over_adjoining_periods(points, a, b, c):
    start, middle, end = sorted((a, b, c))
    est = [(float(d), n) for d, n in points.items()]
    whole = animal_days(est, start, end)
    assert whole == pytest.approx(animal_days(est, start, middle) + animal_days(est, middle, end), rel=1e-9, abs=1e-6)
    assert min(points.values()) * (end - start) - 1e-6 <= whole <= max(points.values()) * (end - start) + 1e-6


@pytest.mark.parametrize(
    ("estimates", "start", "end", "argument"),
    [
        ([], 0, 10, "estimates"),
        ([(0, -1)], 0, 10, "N"),
        ([(0, 10), (0, 20)], 0, 10, "day 0"),
        ([(0, 10)], 10, 0, "end_day"),
        ([(0, math.nan)], 0, 10, "N"),
        ([(math.inf, 10)], 0, 10, "day"),
        ([(0, 10)], math.nan, 10, "start_day"),
        ([(0, 10, 3)], 0, 10, "pair"),
    ],
)
def test_animal_days_rejects_impossible_input(estimates, start, end, argument):
    with pytest.raises(ValueError, match=argument):
        animal_days(estimates, start, end)


def test_mortality_rate_worked_by_hand():
    # 3 deaths over 1500 animal-days: 3 / 1500 x 1000 = 2.0 per 1000 animal-days.
    assert mortality_rate_per_1000_animal_days(3, 1500.0) == pytest.approx(2.0)
    assert mortality_rate_per_1000_animal_days(0, 1500.0) == 0.0


@pytest.mark.parametrize(
    ("deaths", "exposure", "argument"),
    [(-1, 100, "deaths"), (1.5, 100, "deaths"), (1, 0, "animal_days"), (1, -10, "animal_days"), (1, math.inf, "animal_days")],
)
def test_mortality_rate_rejects_impossible_input(deaths, exposure, argument):
    with pytest.raises(ValueError, match=argument):
        mortality_rate_per_1000_animal_days(deaths, exposure)


# ---------------------------------------------------------------------------
# split_balance


def test_split_balance_worked_by_hand():
    # 1000 animals split into 480 + 505 = 985: 15 missing, -15 / 1000 = -1.5 %.
    balance = split_balance(1000, [480, 505])
    assert balance.parts_total == 985.0
    assert balance.difference == pytest.approx(-15.0)
    assert balance.relative_difference == pytest.approx(-0.015)


@given(
    source=st.floats(min_value=1, max_value=1e6),
    parts=st.lists(st.floats(min_value=0, max_value=1e6), min_size=1, max_size=10),
)
def test_split_balance_difference_is_parts_minus_source(source, parts):
    balance = split_balance(source, parts)
    assert balance.difference == pytest.approx(sum(parts) - source, rel=1e-9, abs=1e-6)
    assert balance.relative_difference == pytest.approx(balance.difference / source)


@pytest.mark.parametrize(
    ("source", "parts", "argument"),
    [(0, [1], "source_before"), (-5, [1], "source_before"), (100, [], "parts"), (100, [50, -1], r"parts\[1\]"), (100, [math.nan], r"parts\[0\]")],
)
def test_split_balance_rejects_impossible_input(source, parts, argument):
    with pytest.raises(ValueError, match=argument):
        split_balance(source, parts)
