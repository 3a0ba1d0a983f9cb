"""colonies.control_charts: the NIST/SEMATECH e-Handbook EWMA example and the Western Electric rules."""
import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from colonies.control_charts import (
    BEYOND_3_SIGMA,
    EIGHT_ON_ONE_SIDE,
    EWMA_BEYOND_LIMIT,
    FOUR_OF_5_BEYOND_1_SIGMA,
    TWO_OF_3_BEYOND_2_SIGMA,
    ChartSignal,
    baselines,
    estimate_baseline,
    ewma,
    ewma_columns,
    ewma_limits,
    ewma_signals,
    western_electric_signals,
)

# NIST/SEMATECH e-Handbook of Statistical Methods §6.3.2.4, EWMA example [V, reproduced].
NIST_TARGET = 50.0
NIST_SIGMA = 2.0539
NIST_DATA = [
    52.0, 47.0, 53.0, 49.3, 50.1, 47.0, 51.0, 50.1, 51.2, 50.5,
    49.6, 47.6, 49.9, 51.3, 47.8, 51.2, 52.6, 52.4, 53.6, 52.1,
]


def rules_at(signals: list[ChartSignal]) -> list[tuple[int, str]]:
    return [(s.index, s.rule) for s in signals]


# --- EWMA ----------------------------------------------------------------------------------------


def test_ewma_limits_match_nist_example():
    # NIST/SEMATECH §6.3.2.4: EWMA_0 = 50, s = 2.0539, λ = 0.3, k = 3 -> UCL 52.5884, LCL 47.4115 [V].
    # (The exact LCL is 47.41157; the handbook prints it cut to 47.4115.)
    lcl, ucl = ewma_limits(NIST_TARGET, NIST_SIGMA, 0.3, 3)
    assert ucl == pytest.approx(52.5884, abs=1e-4)
    assert lcl == pytest.approx(47.4115, abs=1e-4)


def test_nist_example_data_give_no_out_of_control_point():
    # NIST/SEMATECH §6.3.2.4: the 20 data points give no point out of control [V].
    assert ewma_signals(NIST_DATA, NIST_TARGET, NIST_SIGMA, lam=0.3, L=3.0) == []
    lcl, ucl = ewma_limits(NIST_TARGET, NIST_SIGMA, 0.3, 3)
    assert all(lcl <= z <= ucl for z in ewma(NIST_DATA, lam=0.3, target=NIST_TARGET))


def test_ewma_follows_the_recursion_from_the_target():
    # NIST §6.3.2.4 recursion: EWMA_1 = 0.3 × 52.0 + 0.7 × 50 = 50.6; EWMA_2 = 0.3 × 47 + 0.7 × 50.6 = 49.52.
    result = ewma(NIST_DATA, lam=0.3, target=NIST_TARGET)
    assert len(result) == len(NIST_DATA)
    assert result[0] == pytest.approx(50.6)
    assert result[1] == pytest.approx(49.52)


def test_ewma_starts_from_the_mean_without_a_target_and_lam_1_returns_the_data():
    assert ewma([1.0, 3.0], lam=0.5) == pytest.approx([1.5, 2.25])  # EWMA_0 = mean 2.0
    assert ewma(NIST_DATA, lam=1.0, target=0.0) == pytest.approx(NIST_DATA)


def test_exact_early_limits_are_narrower_and_approach_the_asymptotic_ones():
    # NIST §6.3.2.4 factor λ/(2-λ)[1-(1-λ)^(2t)]: at t = 1 it equals λ², so the half width is L σ λ.
    lcl_1, ucl_1 = ewma_limits(50.0, 2.0, 0.3, 3.0, t=1)
    assert (lcl_1, ucl_1) == pytest.approx((50.0 - 1.8, 50.0 + 1.8))
    widths = [ewma_limits(50.0, 2.0, 0.3, 3.0, t=t)[1] - 50.0 for t in range(1, 40)]
    assert widths == sorted(widths)
    assert widths[-1] == pytest.approx(ewma_limits(50.0, 2.0, 0.3, 3.0)[1] - 50.0)


def test_ewma_signals_a_sustained_shift_of_one_and_a_half_sigma():
    # Computed by hand from the NIST §6.3.2.4 formulas: with target 0, σ 1, λ 0.3, L 3 and every point
    # at 1.5, EWMA_4 = 1.5 (1 - 0.7^4) = 1.1399 is inside its exact limit 1.2234 and
    # EWMA_5 = 1.5 (1 - 0.7^5) = 1.2479 is the first above its exact limit 1.2423 (index 4).
    signals = ewma_signals([1.5] * 10, target=0.0, sigma=1.0)
    assert [s.index for s in signals] == [4, 5, 6, 7, 8, 9]
    assert {s.rule for s in signals} == {EWMA_BEYOND_LIMIT}
    assert "above the upper" in signals[0].description


def test_ewma_signals_a_downward_shift():
    signals = ewma_signals([-1.5] * 10, target=0.0, sigma=1.0)
    assert signals and "below the lower" in signals[0].description


@pytest.mark.parametrize(
    ("call", "match"),
    [
        (lambda: ewma([]), r"values is empty"),
        (lambda: ewma([1.0, math.nan]), r"values\[1\]=nan"),
        (lambda: ewma([1.0], lam=0.0), r"lam=0\.0 is outside the valid range 0 < lam <= 1"),
        (lambda: ewma([1.0], lam=1.5), r"lam=1\.5 is outside"),
        (lambda: ewma_limits(50.0, 0.0, 0.3), r"sigma=0\.0"),
        (lambda: ewma_limits(50.0, -1.0, 0.3), r"sigma=-1\.0"),
        (lambda: ewma_limits(50.0, 1.0, -0.1), r"lam=-0\.1"),
        (lambda: ewma_limits(50.0, 1.0, 0.3, L=0.0), r"L=0\.0"),
        (lambda: ewma_limits(50.0, 1.0, 0.3, t=0), r"t=0"),
        (lambda: ewma_signals([], 50.0, 1.0), r"values is empty"),
        (lambda: ewma_signals([1.0], 50.0, 0.0), r"sigma=0\.0"),
        (lambda: ewma_signals([1.0], 50.0, 1.0, lam=2.0), r"lam=2\.0"),
    ],
)
def test_ewma_functions_reject_invalid_arguments(call, match):
    with pytest.raises(ValueError, match=match):
        call()


@given(
    values=st.lists(st.floats(min_value=-1e6, max_value=1e6), min_size=1, max_size=50),
    lam=st.floats(min_value=0.01, max_value=1.0),
    target=st.floats(min_value=-1e6, max_value=1e6),
)
def test_ewma_stays_between_the_extremes_of_target_and_data(values, lam, target):
    low, high = min(values + [target]), max(values + [target])
    tolerance = 1e-9 * max(1.0, abs(low), abs(high))
    assert all(low - tolerance <= z <= high + tolerance for z in ewma(values, lam, target))


# --- Western Electric rules ----------------------------------------------------------------------
# Constructed sequences around center 0 with σ 1, so each value is its own z-score.


def test_in_control_sequence_gives_no_signal():
    assert western_electric_signals([0.5, -0.5, 1.2, -0.8, 0.3, -1.9, 0.7, -0.2] * 3, 0.0, 1.0) == []


def test_rule_1_one_point_beyond_3_sigma():
    assert rules_at(western_electric_signals([0.0, 0.0, 3.5, 0.0], 0.0, 1.0)) == [(2, BEYOND_3_SIGMA)]
    assert rules_at(western_electric_signals([0.0, -3.2], 0.0, 1.0)) == [(1, BEYOND_3_SIGMA)]


def test_rule_1_is_strict_at_exactly_3_sigma():
    assert western_electric_signals([0.0, 3.0, 0.0], 0.0, 1.0) == []


def test_rule_2_two_of_three_beyond_2_sigma_on_one_side():
    assert rules_at(western_electric_signals([0.0, 2.5, 0.5, 2.5], 0.0, 1.0)) == [(3, TWO_OF_3_BEYOND_2_SIGMA)]
    assert rules_at(western_electric_signals([0.0, -2.5, -2.4], 0.0, 1.0)) == [(2, TWO_OF_3_BEYOND_2_SIGMA)]


def test_rule_2_not_tripped_when_spread_out_or_on_opposite_sides():
    assert western_electric_signals([2.5, 0.0, 0.0, 2.5, 0.0, 0.0, 2.5], 0.0, 1.0) == []
    assert western_electric_signals([0.0, 2.5, -2.5, 0.0], 0.0, 1.0) == []


def test_rule_2_counts_a_short_window_at_the_start():
    # Documented choice: the first two points already form "2 of (up to) 3".
    assert rules_at(western_electric_signals([2.5, 2.5], 0.0, 1.0)) == [(1, TWO_OF_3_BEYOND_2_SIGMA)]


def test_rule_3_four_of_five_beyond_1_sigma_on_one_side():
    values = [0.0, 1.5, 1.5, 0.2, 1.5, 1.5]
    assert rules_at(western_electric_signals(values, 0.0, 1.0)) == [(5, FOUR_OF_5_BEYOND_1_SIGMA)]
    negative = [-v for v in values]
    assert rules_at(western_electric_signals(negative, 0.0, 1.0)) == [(5, FOUR_OF_5_BEYOND_1_SIGMA)]


def test_rule_3_not_tripped_by_three_of_five_or_alternating_sides():
    assert western_electric_signals([1.5, 1.5, 0.2, 0.2, 1.5, 1.5, -0.3], 0.0, 1.0) == []
    assert western_electric_signals([1.5, -1.5, 1.5, -1.5, 1.5, -1.5], 0.0, 1.0) == []


def test_rule_4_eight_in_a_row_on_one_side():
    assert rules_at(western_electric_signals([0.1] * 8, 0.0, 1.0)) == [(7, EIGHT_ON_ONE_SIDE)]
    assert rules_at(western_electric_signals([-0.1] * 9, 0.0, 1.0)) == [(7, EIGHT_ON_ONE_SIDE), (8, EIGHT_ON_ONE_SIDE)]


def test_rule_4_not_tripped_by_seven_or_a_run_broken_by_the_center_or_the_other_side():
    assert western_electric_signals([0.1] * 7, 0.0, 1.0) == []
    assert western_electric_signals([0.1] * 4 + [0.0] + [0.1] * 4, 0.0, 1.0) == []
    assert western_electric_signals([0.1] * 4 + [-0.1] + [0.1] * 4, 0.0, 1.0) == []


def test_one_point_can_trip_several_rules():
    signals = western_electric_signals([2.5, 3.5], 0.0, 1.0)
    assert rules_at(signals) == [(1, BEYOND_3_SIGMA), (1, TWO_OF_3_BEYOND_2_SIGMA)]
    assert all(isinstance(s.description, str) and s.description for s in signals)


def test_rules_use_center_and_sigma():
    # Same pattern as rule 1 above, on a tank at 20 °C with σ 0.5 °C: 21.6 is 3.2 σ above.
    assert rules_at(western_electric_signals([20.0, 20.1, 21.6], 20.0, 0.5)) == [(2, BEYOND_3_SIGMA)]


@given(
    quarters=st.lists(st.integers(min_value=-20, max_value=20), min_size=1, max_size=40),
    shift=st.integers(min_value=-1000, max_value=1000),
    scale_power=st.integers(min_value=-4, max_value=4),
)
def test_signals_do_not_depend_on_units_or_offset(quarters, shift, scale_power):
    # Quarter steps and powers of two keep the arithmetic exact, so no boundary flips by rounding.
    z = [q / 4 for q in quarters]
    scale = 2.0**scale_power
    shifted = [shift + scale * v for v in z]
    assert rules_at(western_electric_signals(shifted, float(shift), scale)) == rules_at(
        western_electric_signals(z, 0.0, 1.0)
    )


@pytest.mark.parametrize(
    ("args", "match"),
    [(([], 0.0, 1.0), r"values is empty"), (([1.0], 0.0, 0.0), r"sigma=0\.0"), (([1.0], 0.0, -2.0), r"sigma=-2\.0")],
)
def test_western_electric_rejects_invalid_arguments(args, match):
    with pytest.raises(ValueError, match=match):
        western_electric_signals(*args)


def test_chart_signal_is_immutable():
    signal = ChartSignal(3, BEYOND_3_SIGMA, "x")
    with pytest.raises(AttributeError):
        signal.index = 4


# --- Baseline ------------------------------------------------------------------------------------


def test_estimate_baseline_uses_mean_and_average_moving_range():
    # NIST §6.3.2 individuals chart: sigma = mean moving range / d2, d2 = 1.128 for n = 2.
    # [1, 3, 2, 4]: mean 2.5; moving ranges 2, 1, 2 -> 5/3 / 1.128 = 1.4775 (by hand).
    center, sigma = estimate_baseline([1.0, 3.0, 2.0, 4.0])
    assert center == pytest.approx(2.5)
    assert sigma == pytest.approx(5 / 3 / 1.128)


@pytest.mark.parametrize(
    ("values", "match"),
    [([], r"values is empty"), ([5.0], r"at least 2"), ([5.0, 5.0, 5.0], r"all equal"), ([1.0, math.inf], r"inf")],
)
def test_estimate_baseline_rejects_too_little_or_constant_data(values, match):
    with pytest.raises(ValueError, match=match):
        estimate_baseline(values)


# --- Many series at once (the drift rule over years of checks) -------------------------------------
# The reference is each formula written out with Python's sum, in the order of the data: the array
# functions must give the same bits, or a rescan and the check-by-check path could disagree.

finite = st.floats(min_value=-1e4, max_value=1e4, allow_nan=False)


@given(st.lists(st.lists(finite, min_size=2, max_size=45), min_size=1, max_size=6))
def test_baselines_of_many_slices_equal_the_formula_on_each_bit_for_bit(slices):
    values = np.array([v for s in slices for v in s])
    stops = np.cumsum([len(s) for s in slices])
    center, sigma = baselines(values, stops - [len(s) for s in slices], stops)
    for k, s in enumerate(slices):
        ranges = [abs(b - a) for a, b in zip(s, s[1:])]
        assert center[k] == sum(s) / len(s)  # NIST §6.3.2: mean, and mean moving range / d2 (1.128)
        assert sigma[k] == sum(ranges) / len(ranges) / 1.128


def test_baselines_refuse_a_slice_of_one_value():
    with pytest.raises(ValueError, match="at least 2"):
        baselines(np.array([1.0, 2.0, 3.0]), np.array([0, 2]), np.array([2, 3]))


@given(st.integers(min_value=1, max_value=9).flatmap(lambda n: st.tuples(
    st.lists(st.lists(finite, min_size=n, max_size=n), min_size=1, max_size=5),
    st.floats(min_value=0.01, max_value=1.0), st.lists(finite, min_size=5, max_size=5))))
def test_ewma_of_many_columns_follows_the_recursion_bit_for_bit(case):
    columns, lam, starts = case
    result = ewma_columns(np.array(columns).T, lam, np.array(starts[:len(columns)]))
    for k, column in enumerate(columns):
        current = starts[k]
        for t, y in enumerate(column):
            current = lam * y + (1 - lam) * current  # NIST §6.3.2.4
            assert result[t, k] == current


def test_ewma_limits_of_many_charts_equal_each_chart_and_name_a_bad_one():
    targets, sigmas = np.array([50.0, 10.0, -3.0]), np.array([2.0539, 0.5, 1.0])
    lcl, ucl = ewma_limits(targets, sigmas, 0.3, 3.0, t=7)
    for k in range(3):
        assert (lcl[k], ucl[k]) == ewma_limits(float(targets[k]), float(sigmas[k]), 0.3, 3.0, t=7)
    with pytest.raises(ValueError, match=r"sigma\[1\]=0\.0"):
        ewma_limits(targets, np.array([1.0, 0.0, 1.0]), 0.3)
    with pytest.raises(ValueError, match=r"target\[2\]=nan"):
        ewma_limits(np.array([1.0, 2.0, math.nan]), sigmas, 0.3)
