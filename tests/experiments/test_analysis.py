"""Tests for experiments/analysis.py: survival (Kaplan-Meier, log-rank); dose-response fits are in
test_dose_response.py.

Pure module, no database. Published values are named beside each check; lifelines and
statsmodels serve as independent reference implementations (the hard checks).
"""
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from lifelines import KaplanMeierFitter
from lifelines.statistics import logrank_test as lifelines_logrank
from scipy import stats
from statsmodels.duration.survfunc import SurvfuncRight, survdiff

from experiments.analysis import (
    KM_COLUMNS,
    condition_summary,
    kaplan_meier,
    logrank_test,
    median_survival,
)

# Remission times in weeks, Freireich et al. 1963 (Blood 21:699-716), as worked in
# Kleinbaum & Klein, Survival Analysis: A Self-Learning Text, chapter 2. "+" = censored.
# Group 1, 6-MP: 6,6,6,7,10,13,16,22,23, 6+,9+,10+,11+,17+,19+,20+,25+,32+,32+,34+,35+
MP_TIMES = [6, 6, 6, 7, 10, 13, 16, 22, 23, 6, 9, 10, 11, 17, 19, 20, 25, 32, 32, 34, 35]
MP_OBSERVED = [1] * 9 + [0] * 12
# Group 2, placebo: every remission ended in relapse.
PLACEBO_TIMES = [1, 1, 2, 2, 3, 4, 4, 5, 5, 8, 8, 8, 8, 11, 11, 12, 12, 15, 17, 22, 23]
PLACEBO_OBSERVED = [1] * 21


def _row(frame, time):
    return frame.loc[frame["time"] == time].iloc[0]


# --- Kaplan-Meier: published worked example ---------------------------------------------------


def test_km_matches_kleinbaum_klein_6mp_table():
    km = kaplan_meier(MP_TIMES, MP_OBSERVED)
    # Kleinbaum & Klein ch. 2, KM table for the 6-MP group, printed to 3 decimals.
    # from memory (not re-read from the book); the same values follow exactly from the hand
    # product-limit fractions below and from lifelines/statsmodels in the next tests.
    published = {6: 0.857, 7: 0.807, 10: 0.753, 13: 0.690, 16: 0.627, 22: 0.538, 23: 0.448}
    for time, value in published.items():
        assert _row(km, time)["survival"] == pytest.approx(value, abs=5e-4), time

    # Hand product-limit (at risk n, dispersals d at each event time): exact fractions.
    hand = {
        6: 18 / 21,
        7: 18 / 21 * 16 / 17,
        10: 18 / 21 * 16 / 17 * 14 / 15,
        13: 18 / 21 * 16 / 17 * 14 / 15 * 11 / 12,
        16: 18 / 21 * 16 / 17 * 14 / 15 * 11 / 12 * 10 / 11,
        22: 18 / 21 * 16 / 17 * 14 / 15 * 11 / 12 * 10 / 11 * 6 / 7,
        23: 18 / 21 * 16 / 17 * 14 / 15 * 11 / 12 * 10 / 11 * 6 / 7 * 5 / 6,
    }
    for time, value in hand.items():
        assert _row(km, time)["survival"] == pytest.approx(value, rel=1e-12), time

    # Risk sets of the same worked table: 21, 17, 15, 12, 11, 7, 6 at the event times.
    assert [int(_row(km, t)["at_risk"]) for t in hand] == [21, 17, 15, 12, 11, 7, 6]


def test_km_medians_match_kleinbaum_klein():
    # Kleinbaum & Klein ch. 2: median remission 8 weeks on placebo, 23 weeks on 6-MP
    # (from memory); lifelines agrees below.
    assert median_survival(kaplan_meier(PLACEBO_TIMES, PLACEBO_OBSERVED)) == 8
    assert median_survival(kaplan_meier(MP_TIMES, MP_OBSERVED)) == 23
    for times, observed in ((MP_TIMES, MP_OBSERVED), (PLACEBO_TIMES, PLACEBO_OBSERVED)):
        reference = KaplanMeierFitter().fit(times, observed).median_survival_time_
        assert median_survival(kaplan_meier(times, observed)) == reference


@pytest.mark.parametrize(
    ("times", "observed"),
    [(MP_TIMES, MP_OBSERVED), (PLACEBO_TIMES, PLACEBO_OBSERVED)],
    ids=["6-MP", "placebo"],
)
def test_km_table_and_log_log_band_match_lifelines(times, observed):
    km = kaplan_meier(times, observed)
    assert tuple(km.columns) == KM_COLUMNS
    reference = KaplanMeierFitter().fit(times, observed)  # log(-log) Greenwood band by default
    table = reference.event_table
    np.testing.assert_array_equal(km["time"], table.index.to_numpy())
    np.testing.assert_array_equal(km["at_risk"], table["at_risk"])
    np.testing.assert_array_equal(km["events"], table["observed"])
    np.testing.assert_array_equal(km["censored"], table["censored"])
    np.testing.assert_allclose(km["survival"], reference.survival_function_.iloc[:, 0], rtol=1e-12)
    band = reference.confidence_interval_
    np.testing.assert_allclose(km["lower"], band.iloc[:, 0], rtol=1e-9)
    np.testing.assert_allclose(km["upper"], band.iloc[:, 1], rtol=1e-9)


def test_km_survival_and_greenwood_match_statsmodels():
    km = kaplan_meier(MP_TIMES, MP_OBSERVED)
    reference = SurvfuncRight(np.array(MP_TIMES, float), np.array(MP_OBSERVED, float))
    steps = km.loc[km["events"] > 0]
    np.testing.assert_array_equal(steps["time"], reference.surv_times)
    np.testing.assert_allclose(steps["survival"], reference.surv_prob, rtol=1e-12)
    np.testing.assert_array_equal(steps["at_risk"], reference.n_risk)
    # Greenwood SE recovered from our log(-log) band: se = S |log S| * log(log L / log S) / z.
    z = stats.norm.ppf(0.975)
    s = steps["survival"].to_numpy()
    se = s * np.abs(np.log(s)) * np.log(np.log(steps["lower"]) / np.log(s)) / z
    np.testing.assert_allclose(se, reference.surv_prob_se, rtol=1e-9)


def test_km_band_uses_requested_confidence():
    wide = kaplan_meier(MP_TIMES, MP_OBSERVED, confidence=0.99)
    reference = KaplanMeierFitter(alpha=0.01).fit(MP_TIMES, MP_OBSERVED).confidence_interval_
    np.testing.assert_allclose(wide["lower"], reference.iloc[:, 0], rtol=1e-9)
    narrow = kaplan_meier(MP_TIMES, MP_OBSERVED, confidence=0.90)
    assert (narrow["lower"] >= wide["lower"]).all() and (narrow["upper"] <= wide["upper"]).all()


# --- Kaplan-Meier: censoring and ties ----------------------------------------------------------


def test_censoring_shrinks_risk_set_without_making_a_step():
    km = kaplan_meier([1, 2, 3, 4], [True, False, True, False])
    assert km["time"].tolist() == [0, 1, 2, 3, 4]
    assert km["at_risk"].tolist() == [4, 4, 3, 2, 1]
    assert km["events"].tolist() == [0, 1, 0, 1, 0]
    assert km["censored"].tolist() == [0, 0, 1, 0, 1]
    # Step at 1 (1 of 4), flat through the censoring at 2, step at 3 (1 of 2 left), flat at 4.
    assert km["survival"].tolist() == pytest.approx([1, 0.75, 0.75, 0.375, 0.375])
    censored_only = km.loc[(km["censored"] > 0) & (km["events"] == 0)].index
    for i in censored_only:
        assert km.loc[i, "survival"] == km.loc[i - 1, "survival"]
        assert km.loc[i, "lower"] == km.loc[i - 1, "lower"]


def test_tied_event_and_censoring_count_the_censored_trial_as_at_risk():
    # Convention: dispersals at t happen before censorings at t, so 1 of 3 at t = 2, not 1 of 2.
    km = kaplan_meier([2, 2, 3], [1, 0, 1])
    assert _row(km, 2)["at_risk"] == 3
    assert _row(km, 2)["survival"] == pytest.approx(2 / 3)
    assert _row(km, 3)["survival"] == 0
    reference = KaplanMeierFitter().fit([2, 2, 3], [1, 0, 1]).survival_function_.iloc[:, 0]
    np.testing.assert_allclose(km["survival"], reference)


def test_all_censored_group_stays_at_one_with_median_none():
    km = kaplan_meier([600, 600, 450, 600], [0, 0, 0, 0])
    assert (km["survival"] == 1).all()
    assert (km["lower"] == 1).all() and (km["upper"] == 1).all()
    assert km["events"].sum() == 0
    assert km["at_risk"].tolist() == [4, 4, 3]
    assert median_survival(km) is None
    summary = condition_summary([600, 600, 450, 600], [0, 0, 0, 0])
    assert summary == {
        "n": 4,
        "n_dispersed": 0,
        "fraction_dispersed": 0.0,
        "median": None,
        "q25": None,
        "q75": None,
    }


def test_first_row_is_time_zero_with_survival_one():
    km = kaplan_meier([30.5, 12.0, 600.0], [1, 1, 0])
    first = km.iloc[0]
    assert first["time"] == 0 and first["survival"] == 1 and first["at_risk"] == 3
    assert first["events"] == 0 and first["censored"] == 0


def test_dispersal_at_time_zero_is_counted_in_the_first_row_like_lifelines():
    km = kaplan_meier([0, 0, 2, 3], [1, 0, 1, 0])
    assert km.iloc[0]["events"] == 1 and km.iloc[0]["censored"] == 1
    reference = KaplanMeierFitter().fit([0, 0, 2, 3], [1, 0, 1, 0]).survival_function_.iloc[:, 0]
    np.testing.assert_allclose(km["survival"], reference)


def test_band_collapses_to_zero_once_every_clump_has_dispersed():
    km = kaplan_meier([1, 2, 3], [1, 1, 1])
    last = km.iloc[-1]
    assert last["survival"] == 0 and last["lower"] == 0 and last["upper"] == 0
    assert (km["lower"] <= km["survival"]).all() and (km["survival"] <= km["upper"]).all()


def test_median_at_exactly_one_half_is_the_first_time_reaching_it():
    # S(3) = 5/6 * 4/5 * 3/4 = 0.5 exactly in arithmetic but 0.5000000000000001 in floating
    # point, where lifelines then reports 4. Smallest time with S <= 0.5 is 3 (R would report
    # the midpoint of the flat stretch, 3.5).
    times = [1, 2, 3, 4, 5, 6]
    km = kaplan_meier(times, [1] * 6)
    assert _row(km, 3)["survival"] == pytest.approx(0.5, abs=1e-12)
    assert median_survival(km) == 3


def test_km_accepts_booleans_and_numpy_input():
    from_bool = kaplan_meier(np.array([5.0, 8.0, 9.0]), np.array([True, False, True]))
    from_int = kaplan_meier([5, 8, 9], [1, 0, 1])
    np.testing.assert_allclose(from_bool["survival"], from_int["survival"])


@settings(max_examples=60, deadline=None)
@given(
    st.lists(
        st.tuples(st.integers(min_value=1, max_value=20), st.booleans()),
        min_size=1,
        max_size=30,
    )
)
def test_km_matches_lifelines_on_random_data_with_ties(rows):
    times = [t for t, _ in rows]
    observed = [e for _, e in rows]
    km = kaplan_meier(times, observed)
    reference = KaplanMeierFitter().fit(times, observed)
    np.testing.assert_allclose(km["survival"], reference.survival_function_.iloc[:, 0], atol=1e-12)
    np.testing.assert_allclose(km["lower"], reference.confidence_interval_.iloc[:, 0], atol=1e-9)
    np.testing.assert_allclose(km["upper"], reference.confidence_interval_.iloc[:, 1], atol=1e-9)
    # lifelines' median can differ only where the curve sits on 0.5 up to rounding (it compares
    # the floating-point product, e.g. 0.5000000000000001 > 0.5); skip those cases here.
    if not np.any(np.isclose(km["survival"], 0.5, rtol=0, atol=1e-9)):
        assert median_survival(km) == (
            None
            if math.isinf(reference.median_survival_time_)
            else reference.median_survival_time_
        )


# --- Kaplan-Meier: bad input --------------------------------------------------------------------


@pytest.mark.parametrize(
    ("durations", "observed", "message"),
    [
        ([1, 2, 3], [1, 0], "same length"),
        ([], [], "at least one"),
        ([1, -2, 3], [1, 1, 1], "zero or positive"),
        ([1, float("nan")], [1, 1], "finite"),
        ([1, float("inf")], [1, 0], "finite"),
        ([1, 2], [1, 2], "0/1"),
        ([1, 2], ["yes", "no"], "0/1"),
    ],
)
def test_km_rejects_bad_input(durations, observed, message):
    with pytest.raises(ValueError, match=message):
        kaplan_meier(durations, observed)


@pytest.mark.parametrize("confidence", [0, 1, 1.5, -0.1, 95])
def test_km_rejects_confidence_outside_zero_one(confidence):
    with pytest.raises(ValueError, match="confidence"):
        kaplan_meier([1, 2], [1, 1], confidence=confidence)


# --- Log-rank -------------------------------------------------------------------------------------


def test_logrank_matches_kleinbaum_klein_remission_example():
    statistic, p_value = logrank_test(MP_TIMES, MP_OBSERVED, PLACEBO_TIMES, PLACEBO_OBSERVED)
    # Kleinbaum & Klein ch. 2: log-rank chi-square 16.79 on 1 df, P < 0.0001
    # (from memory; O1 = 9 vs E1 = 19.26 for 6-MP). Hard checks against libraries follow.
    assert statistic == pytest.approx(16.79, abs=0.005)
    assert p_value < 1e-4

    reference = lifelines_logrank(MP_TIMES, PLACEBO_TIMES, MP_OBSERVED, PLACEBO_OBSERVED)
    assert statistic == pytest.approx(reference.test_statistic, rel=1e-10)
    assert p_value == pytest.approx(reference.p_value, rel=1e-8)

    chisq, sm_p = survdiff(
        np.array(MP_TIMES + PLACEBO_TIMES, float),
        np.array(MP_OBSERVED + PLACEBO_OBSERVED, float),
        np.array([0] * 21 + [1] * 21),
    )
    assert statistic == pytest.approx(chisq, rel=1e-10)
    assert p_value == pytest.approx(sm_p, rel=1e-8)


def test_logrank_is_symmetric_in_the_two_groups():
    ab = logrank_test(MP_TIMES, MP_OBSERVED, PLACEBO_TIMES, PLACEBO_OBSERVED)
    ba = logrank_test(PLACEBO_TIMES, PLACEBO_OBSERVED, MP_TIMES, MP_OBSERVED)
    assert ab == pytest.approx(ba)


def test_logrank_identical_groups_give_zero_and_p_one():
    statistic, p_value = logrank_test(MP_TIMES, MP_OBSERVED, MP_TIMES, MP_OBSERVED)
    assert statistic == pytest.approx(0, abs=1e-12)
    assert p_value == pytest.approx(1)


@settings(max_examples=60, deadline=None)
@given(
    st.lists(st.tuples(st.integers(1, 15), st.booleans()), min_size=1, max_size=20),
    st.lists(st.tuples(st.integers(1, 15), st.booleans()), min_size=1, max_size=20),
)
def test_logrank_matches_lifelines_and_statsmodels_on_random_data(group_a, group_b):
    ta, ea = [t for t, _ in group_a], [e for _, e in group_a]
    tb, eb = [t for t, _ in group_b], [e for _, e in group_b]
    try:
        statistic, p_value = logrank_test(ta, ea, tb, eb)
    except ValueError:
        # No information (no dispersal, or none while both groups were observed).
        assert not any(ea + eb) or _logrank_variance_is_zero(ta, ea, tb, eb)
        return
    reference = lifelines_logrank(ta, tb, ea, eb)
    assert statistic == pytest.approx(reference.test_statistic, rel=1e-8, abs=1e-10)
    chisq, _ = survdiff(np.array(ta + tb, float), np.array(ea + eb, float),
                        np.array([0] * len(ta) + [1] * len(tb)))
    assert statistic == pytest.approx(chisq, rel=1e-8, abs=1e-10)
    assert 0 <= p_value <= 1


def _logrank_variance_is_zero(ta, ea, tb, eb):
    times = {t for t, e in zip(ta + tb, ea + eb) if e}
    for t in times:
        n_a = sum(x >= t for x in ta)
        n_b = sum(x >= t for x in tb)
        d = sum(1 for x, e in zip(ta + tb, ea + eb) if e and x == t)
        if n_a and n_b and n_a + n_b > d:
            return False
    return True


def test_logrank_rejects_two_all_censored_groups():
    with pytest.raises(ValueError, match="no dispersal"):
        logrank_test([600, 600], [0, 0], [600, 500], [0, 0])


def test_logrank_rejects_comparison_with_no_overlap_in_observation():
    # Group B was censored before group A's only dispersal: nothing to compare.
    with pytest.raises(ValueError, match="variance is zero"):
        logrank_test([10], [1], [5], [0])


def test_logrank_rejects_bad_input_naming_the_group():
    with pytest.raises(ValueError, match="group B"):
        logrank_test([1, 2], [1, 1], [1, 2], [1])
    with pytest.raises(ValueError, match="group A"):
        logrank_test([], [], [1, 2], [1, 1])


# --- Condition summary ------------------------------------------------------------------------


def test_condition_summary_6mp_and_placebo():
    mp = condition_summary(MP_TIMES, MP_OBSERVED)
    assert mp["n"] == 21 and mp["n_dispersed"] == 9
    assert mp["fraction_dispersed"] == pytest.approx(9 / 21)
    assert mp["median"] == 23
    assert mp["q25"] == 13  # first time S <= 0.75 (S(13) = 0.690, S(10) = 0.753)
    assert mp["q75"] is None  # the 6-MP curve never falls to 0.25

    placebo = condition_summary(PLACEBO_TIMES, PLACEBO_OBSERVED)
    # No censoring: S(t) = fraction still in remission; S(4) = 14/21 <= 0.75 first,
    # S(12) = 4/21 <= 0.25 first (S(11) = 6/21 = 0.286).
    assert placebo["median"] == 8 and placebo["q25"] == 4 and placebo["q75"] == 12
    fitter = KaplanMeierFitter().fit(PLACEBO_TIMES, PLACEBO_OBSERVED)
    from lifelines.utils import qth_survival_time

    assert placebo["q25"] == qth_survival_time(0.75, fitter.survival_function_)
    assert placebo["q75"] == qth_survival_time(0.25, fitter.survival_function_)


def test_condition_summary_with_no_trials_is_empty_not_an_error():
    assert condition_summary([], []) == {
        "n": 0,
        "n_dispersed": 0,
        "fraction_dispersed": None,
        "median": None,
        "q25": None,
        "q75": None,
    }


def test_condition_summary_rejects_mismatched_lengths():
    with pytest.raises(ValueError, match="same length"):
        condition_summary([1, 2, 3], [1, 1])
