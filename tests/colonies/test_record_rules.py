"""colonies.record_rules: the pieces of the rules that issue 14 will change, and the drift zone, by hand.

The rules themselves are tested end to end in test_deviations.py (each fires in one scenario and not
in another) and test_rescan.py (a rescan equals the check-by-check path).
"""
import numpy as np
import pytest

from colonies.record_rules import DRIFT_ZONE, mortality_limit, near_limit


@pytest.mark.parametrize("mean, limit", [
    (1.0, 4.0),  # 1 + 3 sqrt(1)
    (6.0, 6.0 + 3 * 6.0 ** 0.5),  # 13.35, the case in test_deviations
    (0.2, 3.2),  # the root of at least 1: a nearly clean tank does not alarm at its first deaths
    (0.0, 3.0),
])
def test_mortality_limit_is_the_mean_plus_three_poisson_sigmas(mean, limit):
    # Poisson: variance = mean, so mean + 3 sqrt(mean) (common practice, a Shewhart c-chart's upper limit)
    assert mortality_limit(np.array([mean]))[0] == pytest.approx(limit)


def test_drift_zone_is_the_outer_quarter_of_the_band_or_of_a_one_sided_limit():
    assert DRIFT_ZONE == 0.25
    nan = np.nan
    z = np.array([23.8, 23.7, 21.2, 21.3, 99.0, 101.0, 0.4])
    toward_high = np.array([True, True, False, False, False, False, True])
    low = np.array([20.0, 20.0, 20.0, 20.0, 80.0, 80.0, nan])
    high = np.array([25.0, 25.0, 25.0, 25.0, nan, nan, nan])
    # 20-25: zones 23.75-25 and 20-21.25; >= 80 moving down: within 20 above it; no limit on that side: never
    assert near_limit(z, toward_high, low, high).tolist() == [True, False, True, False, True, False, False]
