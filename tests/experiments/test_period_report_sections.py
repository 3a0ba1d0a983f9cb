"""The period report's pure sections (experiments/period_report/sections.py), without the database."""
from datetime import date, datetime, timedelta, timezone

import pytest
from scipy import stats

from colonies import schedules
from experiments.period_report import sections

UTC = timezone.utc
END = datetime(2026, 11, 9, tzinfo=UTC)


def _day_starts(first: date, days: int) -> dict:
    return {first + timedelta(days=n): datetime.combine(first + timedelta(days=n), datetime.min.time(), UTC)
            for n in range(days)}


def test_a_parameter_never_measured_has_no_share_and_no_hours():
    [row] = sections.compliance([sections.TankParameter("T1", "ph", "pH", "6.5–8", [
        sections.Reading(datetime(2026, 11, 2, 9, tzinfo=UTC), date(2026, 11, 2), None, False)])], END)
    assert (row["checks_measured"], row["share_within_pct"], row["hours_outside"]) == (0, None, None)


def test_the_last_reading_outside_holds_until_the_period_ends():
    reading = sections.Reading(datetime(2026, 11, 8, 12, tzinfo=UTC), date(2026, 11, 8), 9.0, True)
    [row] = sections.compliance([sections.TankParameter("T1", "ph", "pH", "6.5–8", [reading])], END)
    # 8 Nov 12:00 to 9 Nov 00:00: 12 h outside of 12 h observed.  # hand computation
    assert (row["share_within_pct"], row["hours_outside"], row["hours_observed"]) == (0.0, 12.0, 12.0)


def test_every_n_days_counts_from_the_last_reading_before_the_period():
    first = date(2026, 11, 2)
    plan = schedules.Plan(schedules.EVERY_N_DAYS, every_days=3)
    last = datetime(2026, 11, 1, 9, tzinfo=UTC)
    item = sections.PlanInput("T1", "salinity", "Salinity", plan, first, date(2026, 11, 8), _day_starts(first, 7),
                              last, last.date(), [(datetime(2026, 11, 5, 9, tzinfo=UTC), date(2026, 11, 5))])
    [row] = sections.missed_days([item])
    # Read 1 Nov: due from 4 Nov (missed), read 5 Nov, due again from 8 Nov (missed): 3 due, 2 missed.
    assert (row["days_due"], row["days_missed"], row["missed_on"]) == (3, 2, "2026-11-04 2026-11-08")


def test_median_time_to_close_of_an_odd_number_and_open_at_the_end():
    start = datetime(2026, 11, 2, tzinfo=UTC)

    def dev(n, opened_h, closed_h):
        return sections.DeviationRow(n, "T1", "Feeding overdue", 1, "Minor", start + timedelta(hours=opened_h),
                                     None if closed_h is None else start + timedelta(hours=closed_h), "", "", "")
    [row] = sections.deviation_summary([dev(1, 0, 2), dev(2, 10, 20), dev(3, 30, 31), dev(4, 100, None),
                                        dev(5, 150, 200)], start, END)
    # Closed in the period: 2, 10 and 1 h (the 5th closes after the period's end, 168 h); median 2, max 10.
    assert (row["opened"], row["closed"], row["median_hours_to_close"], row["max_hours_to_close"],
            row["open_at_period_end"]) == (5, 3, 2.0, 10.0, 2)


def test_no_deaths_still_has_an_upper_limit():
    [row] = sections.mortality([("T1", 0, 1000.0)])
    # Exact upper 95 % limit for a count of 0: 3.689 (Garwood 1936; chi2(0.975; 2) / 2 = -ln(0.025); from memory),
    # checked with scipy.
    assert round(stats.chi2.ppf(0.975, 2) / 2, 3) == 3.689
    assert (row["per_1000_animal_days"], row["lower_95"], row["upper_95"]) == (0.0, 0.0, 3.689)


def test_no_census_gives_no_rate():
    assert sections.mortality([("T1", 4, None)]) == [{"tank": "T1", "deaths": 4, "animal_days": None,
                                                      "per_1000_animal_days": None, "lower_95": None,
                                                      "upper_95": None}]


@pytest.mark.parametrize("max_total,drawn,state,remaining", [(None, 5, "not set", None), (10, 10, "within", 0),
                                                             (10, 12, "over the approved number", -2)])
def test_animals_against_the_approved_number(max_total, drawn, state, remaining):
    [row] = sections.animals([sections.ProtocolAnimals("P-1", "t", max_total, 1, drawn, 0, 0)])
    assert (row["status"], row["remaining"]) == (state, remaining)


def test_exposure_summary_counts_overrides_per_dish():
    rows = [{"dish": "C-1-D1", "protocol": "P", "run_at": "2026-11-0%d" % n, "slot": n, "over_limit": over,
             "override_by": by} for n, over, by in ((1, "", ""), (2, "rest", "mona"), (3, "", "mona"))]
    assert sections.exposure_summary(rows) == [{"dish": "C-1-D1", "protocol": "P", "exposures": 3, "over_limit": 2,
                                                "with_override": 2}]
