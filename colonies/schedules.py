"""Measurement plans: which water parameters are due on a tank today, and why. Pure; no Django.

Labs read temperature every day but pH, oxygen, ammonia, nitrite, nitrate, conductivity and hardness
on schedules of their own: weekly, after a water change, every few days, and every day while a problem
with that parameter is open. A plan says that for one parameter; `due()` applies it to what the records
say (when the parameter was last measured, the last water change, the open deviations).

Days are the lab's local calendar days (the round is a daily walk): "daily" means once per local day,
"every 3 days" means measured on day D, due again from day D + 3, and "weekly on Monday" means due from
the most recent Monday until it is measured, so a missed Monday is still due on Tuesday.
"""
from dataclasses import dataclass
from datetime import date, datetime

DAILY = "daily"
EVERY_N_DAYS = "every_n_days"
WEEKLY = "weekly"
ON_REQUEST = "on_request"  # no regular cadence: only after a water change / while a deviation is open, or when asked

WEEKDAYS = ("Monday", "Tuesday", "Wednesday", "Thursday", "Friday", "Saturday", "Sunday")
MIN_EVERY_DAYS, MAX_EVERY_DAYS = 2, 90


@dataclass(frozen=True)
class Plan:
    cadence: str = DAILY
    every_days: int | None = None  # EVERY_N_DAYS only
    weekday: int | None = None  # WEEKLY only: 0 = Monday ... 6 = Sunday
    after_water_change: bool = False
    while_deviation_open: bool = False
    source: str = "default"  # "default", "species" or "tank"

    def __post_init__(self):
        if self.cadence not in (DAILY, EVERY_N_DAYS, WEEKLY, ON_REQUEST):
            raise ValueError(f"Cadence: '{self.cadence}' is not one of daily, every_n_days, weekly, on_request.")
        if self.cadence == EVERY_N_DAYS and not (self.every_days and MIN_EVERY_DAYS <= self.every_days <= MAX_EVERY_DAYS):
            raise ValueError(f"Every N days: {self.every_days} is outside {MIN_EVERY_DAYS} to {MAX_EVERY_DAYS} days.")
        if self.cadence == WEEKLY and self.weekday not in range(7):
            raise ValueError(f"Weekday: {self.weekday} is not 0 (Monday) to 6 (Sunday).")

    def text(self) -> str:
        """The plan in words, e.g. "weekly on Monday, after each water change, daily while a deviation is open"."""
        parts = {DAILY: ["daily"], EVERY_N_DAYS: [f"every {self.every_days} days"],
                 WEEKLY: [f"weekly on {WEEKDAYS[self.weekday or 0]}"], ON_REQUEST: []}[self.cadence]
        if self.after_water_change:
            parts.append("after each water change")
        if self.while_deviation_open:
            parts.append("daily while a deviation on it is open")
        return ", ".join(parts) or "when asked"


# Vermilog's defaults where a species has no plan of its own for a parameter. # common practice: temperature
# daily, the nitrogen series, pH and oxygen weekly and after water changes, hardness monthly; every plan is a
# lab setting a manager changes on the species' care profile.
DEFAULT_PLANS: dict[str, Plan] = {
    "temp_c": Plan(DAILY),
    "ph": Plan(WEEKLY, weekday=0, after_water_change=True, while_deviation_open=True),
    "do_mg_l": Plan(WEEKLY, weekday=0, after_water_change=True, while_deviation_open=True),
    "tan_mg_l": Plan(WEEKLY, weekday=0, after_water_change=True, while_deviation_open=True),
    "no2_mg_l": Plan(WEEKLY, weekday=0, while_deviation_open=True),
    "no3_mg_l": Plan(WEEKLY, weekday=0, while_deviation_open=True),
    "conductivity_us_cm": Plan(WEEKLY, weekday=0, after_water_change=True, while_deviation_open=True),
    "salinity": Plan(EVERY_N_DAYS, every_days=2, after_water_change=True, while_deviation_open=True),
    "hardness_mg_l": Plan(EVERY_N_DAYS, every_days=28, while_deviation_open=True),
}
FALLBACK_PLAN = Plan(ON_REQUEST, while_deviation_open=True)  # a parameter added to the registry later


def default_plan(key: str) -> Plan:
    return DEFAULT_PLANS.get(key, FALLBACK_PLAN)


def due(plan: Plan, *, today: date, last_at: datetime | None, last_on: date | None,
        water_change_at: datetime | None, deviation_open: bool) -> str | None:
    """Why the parameter is due today, or None when it is not.

    last_at / last_on: when it was last measured (the instant, and its local date); water_change_at: the
    tank's last water change; deviation_open: an unresolved deviation concerns this parameter.
    """
    measured_today = last_on == today
    if plan.while_deviation_open and deviation_open and not measured_today:
        return "a deviation on it is open"
    if plan.after_water_change and water_change_at is not None and (last_at is None or last_at < water_change_at):
        return "after the water change"
    if plan.cadence == DAILY:
        return None if measured_today else "daily"
    if plan.cadence == EVERY_N_DAYS:
        if last_on is None or (today - last_on).days >= plan.every_days:
            return f"every {plan.every_days} days"
        return None
    if plan.cadence == WEEKLY:
        since = today.toordinal() - (today.weekday() - plan.weekday) % 7  # the latest such weekday, today included
        if last_on is None or last_on.toordinal() < since:
            return f"weekly ({WEEKDAYS[plan.weekday]})"
        return None
    return None
