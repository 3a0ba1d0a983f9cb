"""colonies/growth.py: pure functions over loaded points (no database)."""
from datetime import datetime, timedelta, timezone

import pytest

from colonies import growth, population

T0 = datetime(2026, 1, 1, tzinfo=timezone.utc)


def _points(days_values):
    return [growth.Point(T0 + timedelta(days=d), v, None, None, "census") for d, v in days_values]


@pytest.mark.parametrize("start_day,end_day", [(10, 40), (0, 90), (-5, 12), (25, 200), (33, 34), (20, 30)])
def test_mortality_from_the_points_around_the_window_equals_every_point(start_day, end_day):
    # The trimmed series must give exactly the animal-days of the full series (population.animal_days
    # interpolates linearly and holds the end values). # common practice (trapezoid rule)
    points = _points([(0, 100), (5, 120), (20, 150), (20, 155), (30, 90), (60, 200), (90, 210)])
    start, end = T0 + timedelta(days=start_day), T0 + timedelta(days=end_day)
    got = growth.mortality(points, 7, start, end)
    series = {}
    for p in points:
        series[(p.at - start).total_seconds() / 86400] = p.value
    expected = population.animal_days(sorted(series.items()), 0.0, (end - start).total_seconds() / 86400)
    assert got.animal_days == pytest.approx(expected, rel=1e-12)


def test_a_remembered_fit_changes_with_any_estimate():
    now = T0 + timedelta(days=60)
    points = _points([(10, 100), (20, 200), (30, 400), (40, 800)])
    first = growth.fit_points(points, now)
    assert first is growth.fit_points(list(points), now)  # same inputs: the remembered result
    corrected = points[:-1] + _points([(40, 700)])
    other = growth.fit_points(corrected, now)
    assert other is not first and other.fit.rate_per_day < first.fit.rate_per_day
