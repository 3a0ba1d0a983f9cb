"""Measurement plans (colonies/schedules.py): when a parameter is due. Pure, no database.

The calendar facts below (which weekday a date is) are checked against Python's own calendar module,
so the tests fail if the weekday arithmetic is wrong rather than restating it.
"""
import calendar
from datetime import date, datetime, timedelta, timezone

import pytest

from colonies import schedules
from colonies.schedules import DAILY, EVERY_N_DAYS, ON_REQUEST, WEEKLY, Plan, due

UTC = timezone.utc
SATURDAY = date(2026, 12, 5)
assert calendar.weekday(2026, 12, 5) == calendar.SATURDAY  # the test's anchor date, from the calendar module


def _due(plan, today=SATURDAY, last_on=None, water_change_at=None, deviation_open=False, last_at=None):
    if last_on is not None and last_at is None:
        last_at = datetime(last_on.year, last_on.month, last_on.day, 9, 0, tzinfo=UTC)
    return due(plan, today=today, last_at=last_at, last_on=last_on, water_change_at=water_change_at,
               deviation_open=deviation_open)


def test_daily_is_due_until_measured_today():
    assert _due(Plan(DAILY), last_on=SATURDAY - timedelta(days=1)) == "daily"
    assert _due(Plan(DAILY), last_on=None) == "daily"
    assert _due(Plan(DAILY), last_on=SATURDAY) is None


@pytest.mark.parametrize("days_ago,expected", [(0, None), (2, None), (3, "every 3 days"), (10, "every 3 days")])
def test_every_n_days_counts_calendar_days_since_the_last_measurement(days_ago, expected):
    assert _due(Plan(EVERY_N_DAYS, every_days=3), last_on=SATURDAY - timedelta(days=days_ago)) == expected


def test_weekly_is_due_from_its_weekday_until_measured():
    monday = Plan(WEEKLY, weekday=calendar.MONDAY)
    this_monday = SATURDAY - timedelta(days=(SATURDAY.weekday() - calendar.MONDAY) % 7)
    assert calendar.weekday(this_monday.year, this_monday.month, this_monday.day) == calendar.MONDAY
    # Measured on Monday or later this week: not due; last measured the Sunday before: due (a missed Monday stays due).
    assert _due(monday, last_on=this_monday) is None
    assert _due(monday, last_on=this_monday + timedelta(days=2)) is None
    assert _due(monday, last_on=this_monday - timedelta(days=1)) == "weekly (Monday)"
    # On its own weekday it is due even if measured the day before.
    saturday_plan = Plan(WEEKLY, weekday=calendar.SATURDAY)
    assert _due(saturday_plan, last_on=SATURDAY - timedelta(days=1)) == "weekly (Saturday)"
    assert _due(saturday_plan, last_on=SATURDAY) is None


def test_after_a_water_change_until_measured_after_it():
    plan = Plan(ON_REQUEST, after_water_change=True)
    change = datetime(2026, 12, 4, 15, 0, tzinfo=UTC)
    assert _due(plan, last_at=change - timedelta(hours=1), last_on=date(2026, 12, 4), water_change_at=change) \
        == "after the water change"
    assert _due(plan, last_at=change + timedelta(hours=1), last_on=date(2026, 12, 4), water_change_at=change) is None
    assert _due(plan, last_on=None, water_change_at=None) is None  # no regular cadence, no change: never due


def test_while_a_deviation_is_open_daily_even_off_schedule():
    plan = Plan(WEEKLY, weekday=calendar.MONDAY, while_deviation_open=True)
    yesterday = SATURDAY - timedelta(days=1)
    assert _due(plan, last_on=yesterday, deviation_open=True) == "a deviation on it is open"
    assert _due(plan, last_on=SATURDAY, deviation_open=True) is None  # measured today already
    assert _due(Plan(WEEKLY, weekday=calendar.MONDAY), last_on=yesterday, deviation_open=True) is None  # not asked for


@pytest.mark.parametrize("kwargs,field", [
    ({"cadence": EVERY_N_DAYS, "every_days": 1}, "Every N days"),
    ({"cadence": EVERY_N_DAYS, "every_days": 91}, "Every N days"),
    ({"cadence": WEEKLY, "weekday": 7}, "Weekday"),
    ({"cadence": "fortnightly"}, "Cadence"),
])
def test_impossible_plans_are_refused_naming_the_field(kwargs, field):
    with pytest.raises(ValueError, match=field):
        Plan(**kwargs)


def test_plan_text_reads_as_a_sentence():
    plan = Plan(WEEKLY, weekday=calendar.MONDAY, after_water_change=True, while_deviation_open=True)
    assert plan.text() == "weekly on Monday, after each water change, daily while a deviation on it is open"
    assert Plan(ON_REQUEST).text() == "when asked"


def test_every_registered_parameter_has_a_default_plan():
    from colonies import parameters

    assert set(schedules.DEFAULT_PLANS) == set(parameters.KEYS)
    assert schedules.default_plan("temp_c").cadence == DAILY
    assert schedules.default_plan("not-a-parameter") == schedules.FALLBACK_PLAN
