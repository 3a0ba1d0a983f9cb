"""The period report's sections: plain rows in, plain rows out. No Django.

Each function takes what `queries.py` read from the records (dataclasses and tuples of plain values)
and returns a list of dicts whose keys are the section's CSV columns, in a fixed order, so that the
same records give the same rows (and `render.py` the same bytes). Definitions, as the page states them:

- Share within target: of the checks in the period that measured (or let us derive) the parameter,
  those whose stored flags (the targets in force when the check was saved) do not mark it.
- Time outside target: each reading is taken to hold until the next reading of the same parameter,
  or until the period's end; the hours held by out-of-target readings are summed. Hours observed run
  from the first reading in the period to its end (before it the value is not known).
- Missed days: for each local day of the period, the tank's measurement plan is applied as the round
  applies it (colonies/schedules.due) to what the records said at the start of that day (the last
  reading before it, the last water change before it, a deviation on the parameter open then); a day
  on which the parameter was due and no reading of it was recorded is missed.
- Time to close a deviation: closed_at - opened_at, in hours, for those closed in the period.
- Mortality: deaths per 1,000 animal-days with the exact Poisson interval for the count
  (Garwood 1936; colonies/population.poisson_interval) scaled by the same factor.
"""
from __future__ import annotations

import statistics
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from datetime import date, datetime, timedelta

from colonies import population, schedules

HOUR = 3600.0


# ---------------------------------------------------------------------------------------------
# 1. Care-target compliance and measurement plans
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Reading:
    at: datetime
    on: date  # the lab's local date of `at`
    value: float | None  # None: the check did not measure it
    out: bool  # the check's stored flags mark this parameter


@dataclass
class TankParameter:
    tank: str
    parameter: str  # the registry key
    label: str  # label with unit
    target: str  # the target in force now, in words ("6.5–8 pH")
    readings: list[Reading] = field(default_factory=list)  # the period's checks, oldest first


def compliance(items: Iterable[TankParameter], end: datetime) -> list[dict]:
    rows = []
    for item in sorted(items, key=lambda i: (i.tank, i.parameter)):
        measured = [r for r in item.readings if r.value is not None]
        within = sum(1 for r in measured if not r.out)
        outside_s = observed_s = 0.0
        for here, after in zip(measured, [*measured[1:], None]):
            held = ((after.at if after else end) - here.at).total_seconds()
            observed_s += held
            outside_s += held if here.out else 0.0
        rows.append({
            "tank": item.tank, "parameter": item.parameter, "label": item.label, "target": item.target,
            "checks_measured": len(measured), "within_target": within,
            "share_within_pct": round(100.0 * within / len(measured), 1) if measured else None,
            "hours_outside": round(outside_s / HOUR, 1) if measured else None,
            "hours_observed": round(observed_s / HOUR, 1) if measured else None,
        })
    return rows


@dataclass
class PlanInput:
    tank: str
    parameter: str
    label: str
    plan: schedules.Plan
    first_day: date  # the period's first day, or the tank's start if later
    last_day: date  # the period's last day
    day_starts: dict[date, datetime]  # each day's local midnight (aware)
    last_before: datetime | None  # the last reading before first_day, and its local date
    last_before_on: date | None
    readings: list[tuple[datetime, date]] = field(default_factory=list)  # the period's readings, oldest first
    water_changes: list[datetime] = field(default_factory=list)  # oldest first; the last one before the period too
    deviations: list[tuple[datetime, datetime | None]] = field(default_factory=list)  # (opened, closed) on it


def missed_days(items: Iterable[PlanInput]) -> list[dict]:
    rows = []
    for item in sorted(items, key=lambda i: (i.tank, i.parameter)):
        last_at, last_on = item.last_before, item.last_before_on
        measured_on: dict[date, datetime] = {}
        for at, on in item.readings:
            measured_on[on] = at  # the day's last reading (oldest first)
        due_days = missed = 0
        missed_list: list[str] = []
        day = item.first_day
        while day <= item.last_day:
            start = item.day_starts[day]
            water = [w for w in item.water_changes if w < start]
            open_then = any(o < start and (c is None or c > start) for o, c in item.deviations)
            why = schedules.due(item.plan, today=day, last_at=last_at, last_on=last_on,
                                water_change_at=water[-1] if water else None, deviation_open=open_then)
            if why:
                due_days += 1
                if day not in measured_on:
                    missed += 1
                    missed_list.append(day.isoformat())
            if day in measured_on:
                last_at, last_on = measured_on[day], day
            day += timedelta(days=1)
        rows.append({"tank": item.tank, "parameter": item.parameter, "label": item.label, "plan": item.plan.text(),
                     "plan_source": item.plan.source, "days_due": due_days, "days_missed": missed,
                     "missed_on": " ".join(missed_list)})
    return rows


# ---------------------------------------------------------------------------------------------
# 2. Deviations
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class DeviationRow:
    number: int
    where: str  # tank code or subject
    rule: str
    severity: int
    severity_label: str
    opened_at: datetime
    closed_at: datetime | None
    summary: str
    corrective_action: str
    closed_by: str


def _hours(delta: timedelta) -> float:
    return delta.total_seconds() / HOUR


def deviation_list(devs: Sequence[DeviationRow], start: datetime, end: datetime, when) -> list[dict]:
    """Every deviation opened or closed in the period, or open at its end; `when` writes a moment."""
    rows = []
    for d in sorted(devs, key=lambda d: (d.opened_at, d.number)):
        closed_in = d.closed_at is not None and start <= d.closed_at < end
        open_at_end = d.opened_at < end and (d.closed_at is None or d.closed_at >= end)
        rows.append({
            "deviation": d.number, "where": d.where, "rule": d.rule, "severity": d.severity_label,
            "opened_at": when(d.opened_at), "closed_at": when(d.closed_at) if closed_in else "",
            "hours_to_close": round(_hours(d.closed_at - d.opened_at), 1) if closed_in else None,
            "open_at_period_end": open_at_end, "closed_by": d.closed_by if closed_in else "",
            "corrective_action": d.corrective_action if closed_in else "", "summary": d.summary,
        })
    return rows


def deviation_summary(devs: Sequence[DeviationRow], start: datetime, end: datetime) -> list[dict]:
    """By rule and severity: opened and closed in the period, hours to close (median, max), open at its end."""
    groups: dict[tuple[str, int, str], list[DeviationRow]] = {}
    for d in devs:
        groups.setdefault((d.rule, d.severity, d.severity_label), []).append(d)
    rows = []
    for (rule, _, label), items in sorted(groups.items(), key=lambda kv: (kv[0][0], -kv[0][1])):
        hours = [_hours(d.closed_at - d.opened_at) for d in items
                 if d.closed_at is not None and start <= d.closed_at < end]
        rows.append({
            "rule": rule, "severity": label,
            "opened": sum(1 for d in items if start <= d.opened_at < end),
            "closed": len(hours),
            "median_hours_to_close": round(statistics.median(hours), 1) if hours else None,
            "max_hours_to_close": round(max(hours), 1) if hours else None,
            "open_at_period_end": sum(1 for d in items if d.opened_at < end and (d.closed_at is None or d.closed_at >= end)),
        })
    return rows


# ---------------------------------------------------------------------------------------------
# 3. Mortality
# ---------------------------------------------------------------------------------------------
def mortality(rows: Iterable[tuple[str, int, float | None]], confidence: float = 0.95) -> list[dict]:
    """(tank, deaths, animal-days) -> deaths per 1,000 animal-days with the exact Poisson interval.

    The count is Poisson with mean rate x exposure, so the interval for the rate is the count's exact
    interval divided by the exposure (x 1,000). No animal-days (no census): no rate.
    """
    out = []
    for tank, deaths, exposure in sorted(rows):
        rate = low = high = None
        if exposure:
            lower, upper = population.poisson_interval(deaths, confidence)
            rate = population.mortality_rate_per_1000_animal_days(deaths, exposure)
            low, high = 1000.0 * lower / exposure, 1000.0 * upper / exposure
        out.append({"tank": tank, "deaths": deaths, "animal_days": None if exposure is None else round(exposure, 1),
                    "per_1000_animal_days": _sig(rate), "lower_95": _sig(low), "upper_95": _sig(high)})
    return out


def _sig(value: float | None, digits: int = 4) -> float | None:
    return None if value is None else float(f"{value:.{digits}g}")


# ---------------------------------------------------------------------------------------------
# 4. Animals per protocol
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class ProtocolAnimals:
    reference: str
    title: str
    max_total: int | None
    drawn_in_period: int
    drawn_to_end: int  # every cohort drawn under it up to the period's end
    in_exposed_dishes: int  # animals in dishes set up in the period that had at least one exposure
    returned_in_period: int


def animals(items: Iterable[ProtocolAnimals]) -> list[dict]:
    rows = []
    for p in sorted(items, key=lambda p: p.reference):
        if p.max_total is None:
            state = "not set"
        elif p.drawn_to_end > p.max_total:
            state = "over the approved number"
        else:
            state = "within"
        rows.append({
            "protocol": p.reference, "title": p.title, "approved_animals": p.max_total,
            "drawn_in_period": p.drawn_in_period, "used_in_period": p.in_exposed_dishes,
            "returned_in_period": p.returned_in_period, "drawn_to_period_end": p.drawn_to_end,
            "remaining": None if p.max_total is None else p.max_total - p.drawn_to_end,
            "share_of_approved_pct": None if not p.max_total else round(100.0 * p.drawn_to_end / p.max_total, 1),
            "status": state,
        })
    return rows


# ---------------------------------------------------------------------------------------------
# 5. Exposures against limits
# ---------------------------------------------------------------------------------------------
EXPOSURE_COLUMNS = ["dish", "origin_tank", "protocol", "run_at", "study", "slot", "stimulus", "settings", "animals",
                    "dose_mj_cm2", "exposure_number", "max_exposures", "cumulative_dose_mj_cm2",
                    "max_cumulative_dose_mj_cm2", "rest_h", "min_rest_h", "over_limit", "override_breaches",
                    "override_reason", "override_by"]


def exposures(ledger: Iterable[dict]) -> list[dict]:
    """The exposure ledger's rows (experiments/reports.ledger_rows, blinding applied there) in the report's
    columns and order: by dish, then time."""
    rows = [{c: r.get(c) for c in EXPOSURE_COLUMNS} for r in ledger]
    return sorted(rows, key=lambda r: (r["dish"], r["run_at"], r["slot"] or 0))


def exposure_summary(rows: Sequence[dict]) -> list[dict]:
    """Per dish: exposures in the period, how many went over a limit and how many of those carry an override."""
    by_dish: dict[tuple[str, str], list[dict]] = {}
    for r in rows:
        by_dish.setdefault((r["dish"], r["protocol"]), []).append(r)
    return [{"dish": dish, "protocol": protocol, "exposures": len(items),
             "over_limit": sum(1 for r in items if r["over_limit"] or r["override_by"]),
             "with_override": sum(1 for r in items if r["override_by"])}
            for (dish, protocol), items in sorted(by_dish.items())]


# ---------------------------------------------------------------------------------------------
# 6. Corrections and voids
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Change:
    at: datetime
    who: str
    record: str  # e.g. "Check #12 · LV-01"
    action: str  # "corrected" or "voided"
    reason: str


def changes(items: Iterable[Change], when) -> list[dict]:
    return [{"when": when(c.at), "who": c.who, "record": c.record, "action": c.action, "reason": c.reason}
            for c in sorted(items, key=lambda c: (c.at, c.record, c.action))]


# Each section's CSV columns, in order (an empty section still has its header).
COLUMNS = {
    "1a": ["tank", "parameter", "label", "target", "checks_measured", "within_target", "share_within_pct",
           "hours_outside", "hours_observed"],
    "1b": ["tank", "parameter", "label", "plan", "plan_source", "days_due", "days_missed", "missed_on"],
    "2a": ["rule", "severity", "opened", "closed", "median_hours_to_close", "max_hours_to_close", "open_at_period_end"],
    "2b": ["deviation", "where", "rule", "severity", "opened_at", "closed_at", "hours_to_close", "open_at_period_end",
           "closed_by", "corrective_action", "summary"],
    "3": ["tank", "deaths", "animal_days", "per_1000_animal_days", "lower_95", "upper_95"],
    "4": ["protocol", "title", "approved_animals", "drawn_in_period", "used_in_period", "returned_in_period",
          "drawn_to_period_end", "remaining", "share_of_approved_pct", "status"],
    "5a": ["dish", "protocol", "exposures", "over_limit", "with_override"],
    "5b": EXPOSURE_COLUMNS,
    "6": ["when", "who", "record", "action", "reason"],
    "7": ["criterion", "requirement", "result", "evidence", "modelled_on"],
}

# What each section counts and how, printed under its heading (the module docstring in words for readers).
NOTES = {
    "1a": "Share within target: of the period's checks that measured the parameter (or from which it is derived), "
          "those not flagged against the target in force when the check was saved. Time outside: each reading is "
          "taken to hold until the next reading of the same parameter or the period's end; hours held by readings "
          "outside the target are summed. Hours observed run from the first reading in the period to its end. "
          "The target column is the target in force now.",
    "1b": "Each day of the period, the tank's measurement plan (as it stands now) is applied as the round applies "
          "it, to the records at the start of that day: the last reading, the last water change, a deviation on "
          "the parameter open then. A day on which the parameter was due and no reading was recorded is missed.",
    "2a": "Opened and closed count deviations whose opening or closing falls in the period; hours to close "
          "(closed less opened) of those closed in the period; open at the period's end counts every deviation "
          "opened before its end and not closed by then.",
    "2b": "Every deviation opened or closed in the period, or open at its end, with the corrective action of "
          "those closed in the period.",
    "3": "Deaths: dead animals removed at checks and outside the round in the period. Animal-days: the census "
         "estimates joined by straight lines (held before the first and after the last), from the period's start "
         "or the tank's. Interval: exact Poisson interval for the count (Garwood 1936, chi-square quantiles), "
         "divided by the animal-days.",
    "4": "Drawn: animals drawn into cohorts in the period; used: animals in dishes set up in the period that had "
         "at least one exposure; returned: animals put back alive from cohorts and dishes ended in the period; "
         "drawn to the period's end counts every cohort drawn under the protocol until then, against the "
         "approved number.",
    "5a": "Exposures in the period per dish (the group of animals the protocol's limits count).",
    "5b": "Every exposure in the period with the running totals of its dish over all its exposures, as the "
          "exposure ledger shows them. While a study is blind, its trials show their code, not their stimulus, "
          "dose or override reason.",
    "6": "Changes with a reason recorded in the period: corrections and voids of husbandry records, corrected, "
         "excluded and voided trials, voided dishes.",
    "7": "A study's report only: the validity criteria the study declared, each met, not met or cannot tell, "
         "judged on all the study's trials and its source tanks' checks over the study's own period (as on the "
         "study page; experiments/validity.py). Reference survival cannot be told while the study is blind.",
}

# Headings the page shows where the CSV's column name reads badly.
HEADINGS = {"share_within_pct": "within target (%)", "per_1000_animal_days": "per 1,000 animal-days",
            "lower_95": "95 % interval, lower", "upper_95": "95 % interval, upper", "plan_source": "plan from",
            "share_of_approved_pct": "share of approved (%)", "open_at_period_end": "open at period end",
            "median_hours_to_close": "median hours to close", "max_hours_to_close": "longest hours to close"}


def _of(value, limit, unit: str = "") -> str:
    if value is None:
        return "–"
    text = f"{value:g}" if isinstance(value, float) else str(value)
    return f"{text} of {limit:g}{unit}" if limit is not None else text


def exposure_page_row(r: dict) -> dict:
    """An exposure as the page shows it: the limits beside the values (the CSV keeps a column each)."""
    override = " · ".join(x for x in (r["override_reason"], r["override_breaches"],
                                      f"by {r['override_by']}" if r["override_by"] else "") if x)
    return {"dish": r["dish"], "origin tank": r["origin_tank"], "protocol": r["protocol"], "run at": r["run_at"],
            "study · slot": f"{r['study']} · {r['slot']}", "stimulus and settings": r["settings"],
            "animals": r["animals"], "exposure": _of(r["exposure_number"], r["max_exposures"]),
            "cumulative dose (mJ/cm²)": _of(r["cumulative_dose_mj_cm2"], r["max_cumulative_dose_mj_cm2"])
            if r["cumulative_dose_mj_cm2"] is not None else "hidden (blinded)" if "blinded" in (r["settings"] or "") else "–",
            "rest (h)": "–" if r["rest_h"] is None else f"{r['rest_h']:g} (least {r['min_rest_h']:g})",
            "over limit": r["over_limit"] and f"▲ {r['over_limit']}", "override": override}
