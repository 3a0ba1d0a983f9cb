"""experiments/agreement.py: Bland-Altman against the 1986 Lancet worked example, Cohen's kappa against statsmodels."""
import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from statsmodels.stats.inter_rater import cohens_kappa as sm_cohens_kappa

from experiments.agreement import Z95, bland_altman, cohens_kappa

# statsmodels' own kappa warns (NaN variance) on degenerate tables; those are compared on kappa only.
pytestmark = pytest.mark.filterwarnings("ignore::RuntimeWarning")

# Bland JM, Altman DG (1986). Statistical methods for assessing agreement between two methods of clinical
# measurement. Lancet 327(8476):307-310, Table 1: peak expiratory flow rate (l/min) of 17 subjects, the first
# reading with the Wright peak flow meter and with the mini Wright meter. [V, reproduced: the same columns
# appear in several independent teaching scripts of the paper]. The paper's text: mean difference -2.1 l/min,
# SD of the differences 38.8 l/min, limits of agreement (with 2 SD) -79.7 to 75.5 l/min; 95 % confidence
# interval of the lower limit -114.3 to -45.1 (SE of a limit sqrt(3 s²/n), t with 16 df).
WRIGHT = [494, 395, 516, 434, 476, 557, 413, 442, 650, 433, 417, 656, 267, 478, 178, 423, 427]
MINI = [512, 430, 520, 428, 500, 600, 364, 380, 658, 445, 432, 626, 260, 477, 259, 350, 451]


def test_bland_altman_reproduces_the_lancet_1986_worked_example():
    r = bland_altman(WRIGHT, MINI, z=2)  # the paper used 2 SD
    assert r.n == 17
    assert r.bias == pytest.approx(-2.1, abs=0.05)
    assert r.sd == pytest.approx(38.8, abs=0.05)
    # The paper rounds the mean and SD first: -2.1 ± 77.6.
    assert r.lower == pytest.approx(-79.7, abs=0.1)
    assert r.upper == pytest.approx(75.5, abs=0.1)
    assert r.lower_ci == pytest.approx((-114.3, -45.1), abs=0.2)


def test_bland_altman_with_196_sd_matches_a_direct_numpy_computation():
    d = np.array(WRIGHT, float) - np.array(MINI, float)
    r = bland_altman(WRIGHT, MINI)
    assert r.z == Z95
    assert (r.bias, r.sd) == pytest.approx((d.mean(), d.std(ddof=1)))
    assert (r.lower, r.upper) == pytest.approx((d.mean() - 1.959964 * d.std(ddof=1), d.mean() + 1.959964 * d.std(ddof=1)))


def test_bland_altman_needs_two_pairs_and_matching_lengths():
    assert bland_altman([1.0], [2.0]) is None
    with pytest.raises(ValueError, match="Pairs"):
        bland_altman([1.0, 2.0], [1.0])


KAPPA_CASES = [
    # (image says dispersed, scorer says dispersed) as 0/1 strings
    ("11100101100111", "10100111100111"),
    ("1111000011110000", "1111000011110000"),
    ("1010101010", "0101010101"),
    ("1111111100", "1111111110"),
]


@pytest.mark.parametrize("a,b", KAPPA_CASES)
def test_kappa_and_its_standard_error_match_statsmodels(a, b):
    x, y = [c == "1" for c in a], [c == "1" for c in b]
    k = cohens_kappa(x, y)
    reference = sm_cohens_kappa(np.array(k.table))  # statsmodels.stats.inter_rater.cohens_kappa, same 2×2 table
    assert k.table[0][0] == sum(p and q for p, q in zip(x, y))
    assert k.kappa == pytest.approx(reference.kappa)
    assert k.se == pytest.approx(reference.std_kappa)


@given(st.lists(st.tuples(st.booleans(), st.booleans()), min_size=2, max_size=60))
def test_kappa_matches_statsmodels_on_any_table(pairs):
    k = cohens_kappa([p for p, _q in pairs], [q for _p, q in pairs])
    if k.kappa is None:
        assert k.expected == pytest.approx(1.0)  # both raters gave one answer throughout: kappa is 0/0
        return
    reference = sm_cohens_kappa(np.array(k.table))
    assert k.kappa == pytest.approx(reference.kappa, abs=1e-9)


def test_kappa_is_undefined_when_both_always_say_the_same_thing():
    k = cohens_kappa([True] * 5, [True] * 5)
    assert k.kappa is None and k.observed == 1.0
    assert cohens_kappa([], []) is None
