"""Plausible and physical bounds for what the husbandry forms and the back office accept.

A value outside these bounds cannot be real (a feeding of 1e308 g, 30 L changed in a 2 L tank, a
round observed before the tank existed): forms refuse it with a message that names the field,
the value and the allowed range, in the style of the parameter registry ("Amount: -1 g is
impossible; allowed range 0 to 1000 g."). Where a bound needs no other row, the database holds
it too (a CheckConstraint of the same meaning), so no route can store it.

The bounds are generous on purpose: they catch typing mistakes and unit mix-ups, not unusual
husbandry. Care *targets* are a different, narrower thing and only flag.
"""
import math
from datetime import date, datetime, time, timedelta
from functools import lru_cache

from django.core.exceptions import ValidationError
from django.utils import timezone, translation
from django.utils.deconstruct import deconstructible

from vermilog.lab_time import lab_date, lab_moment

# Clocks differ a little between the bench tablet and the server: a time up to this far ahead of
# the server's "now" is still taken as now-ish; anything later is in the future and refused.
FUTURE_LEEWAY = timedelta(minutes=10)
# No record in a culture lab's books is older than this (plausible, not physical): catches "1900"
# and two-digit years typed as "0026".
EARLIEST_DATE = date(1950, 1, 1)
MAX_COUNT = 1_000_000  # more animals than any culture tank holds in one count: a typo, not a count
MAX_ANIMALS = 10_000_000  # estimated animals in one tank (splits, estimates)
MAX_TANK_VOLUME_L = 10000  # the largest system the Tank model allows
MAX_TEXT = 4000  # characters in a note or free-text field: a paragraph, not a pasted file
MAX_INTERVAL_DAYS = 365  # a feeding, water change or census due less than once a year is no schedule
MAX_CHECK_INTERVAL_HOURS = 24 * 31
MAX_DENSITY_PER_L = 1_000_000  # animals per litre; the densest microworm cultures are far below (plausible)

# Most that can go into a tank at one feeding, per unit (plausible: a kilogram of food in one
# go is beyond any culture this app keeps; a "pinch" is counted in pinches).
FEEDING_MAX = {"g": 1000.0, "mg": 1_000_000.0, "mL": 5000.0, "pinch": 100.0}

CENSUS_MAX_ML = MAX_TANK_VOLUME_L * 1000  # a census volume beyond the largest tank is a unit mistake
CENSUS_MAX_MASS_G = 100_000.0  # 100 kg of worms: beyond any culture here


def number(value) -> str:
    """A value as the message shows it: integers whole, floats in the shortest form."""
    if isinstance(value, int):
        return str(value)
    if value.is_integer() and abs(value) < 1e12:  # 2000000.0 reads better as 2000000 than as 2e+06
        return str(int(value))
    return f"{value:g}"


def range_text(low, high, unit: str = "") -> str:
    unit = f" {unit}" if unit else ""
    return f"{number(low)} to {number(high)}{unit}"


def impossible(label: str, value, low, high, unit: str = "", why: str = "") -> str:
    shown = f"{number(value)} {unit}".strip() if isinstance(value, (int, float)) else str(value)
    return f"{label}: {shown} is impossible; allowed range {range_text(low, high, unit)}{why}."


def check_range(label: str, value, low, high, unit: str = "", why: str = ""):
    """Raise ValidationError unless low <= value <= high (and finite); returns the value."""
    if value is None:
        return value
    if isinstance(value, float) and not math.isfinite(value) or not low <= value <= high:
        raise ValidationError(impossible(label, value, low, high, unit, why), code="out_of_range")
    return value


@deconstructible
class Range:
    """Field validator: the value lies in [low, high]; the message names the field, value and range."""

    def __init__(self, label: str, low, high, unit: str = ""):
        self.label, self.low, self.high, self.unit = label, low, high, unit

    def __call__(self, value):
        check_range(self.label, value, self.low, self.high, self.unit)

    def __eq__(self, other):
        return isinstance(other, Range) and (other.label, other.low, other.high, other.unit) == (
            self.label, self.low, self.high, self.unit)


@deconstructible
class DateRange:
    """Field validator for a calendar date: not before EARLIEST_DATE, not more than `ahead_days` after today."""

    def __init__(self, label: str, ahead_days: int = 0):
        self.label, self.ahead_days = label, ahead_days

    def __call__(self, value):
        if value is None:
            return
        check_date(self.label, value, ahead_days=self.ahead_days)

    def __eq__(self, other):
        return isinstance(other, DateRange) and (other.label, other.ahead_days) == (self.label, self.ahead_days)


def check_date(label: str, value: date, *, earliest: date = EARLIEST_DATE, ahead_days: int = 0,
               today: date | None = None, why: str = "") -> date:
    today = today or timezone.localdate()
    latest = today + timedelta(days=ahead_days)
    if not earliest <= value <= latest:
        raise ValidationError(f"{label}: {lab_date(value)} is impossible; allowed range {lab_date(earliest)} "
                              f"to {lab_date(latest)}{why}.", code="out_of_range")
    return value


def start_of(day: date) -> datetime:
    """Local midnight at the start of `day`, as an aware datetime."""
    return timezone.make_aware(datetime.combine(day, time.min))


def _minute(dt: datetime) -> str:
    return lab_moment(dt)


def check_moment(label: str, value: datetime | None, *, started_on: date | None = None, what: str = "",
                 now: datetime | None = None) -> datetime | None:
    """An observed time lies between the start of the tank (or EARLIEST_DATE) and now + FUTURE_LEEWAY.

    `what` names the lower end in the message (e.g. "when tank FW-01 was started").
    """
    if value is None:
        return value
    now = now or timezone.now()
    earliest = start_of(max(started_on or EARLIEST_DATE, EARLIEST_DATE))
    latest = now + FUTURE_LEEWAY
    if value > latest:
        raise ValidationError(f"{label}: {_minute(value)} is in the future; allowed range {_minute(earliest)}"
                              f"{' (' + what + ')' if what else ''} to {_minute(latest)} (now).", code="future")
    if value < earliest:
        raise ValidationError(f"{label}: {_minute(value)} is impossible; allowed range {_minute(earliest)}"
                              f"{' (' + what + ')' if what else ''} to {_minute(latest)} (now).", code="too_early")
    return value


def name_errors(form) -> None:
    """Give each field's generic errors ("Enter a number.", "This field is required.") its label.

    Django's own messages do not say which field they are about; a refusal shown as a flash
    message or read by a screen reader must. Messages a form already wrote are kept.
    """
    language = translation.get_language()
    for name, field in form.fields.items():
        label = str(field.label or name.replace("_", " ").capitalize())
        messages = dict(field.error_messages)
        defaults = _default_messages(type(field), language)
        for code, text in list(messages.items()):
            text = str(text)
            if text and code in defaults and text == defaults[code] and not text.startswith(label):
                messages[code] = f"{label}: {text[0].lower()}{text[1:]}"
        limits = {
            "max_length": f"{label}: %(show_value)d characters is too long; allowed at most %(limit_value)d.",
            "min_length": f"{label}: %(show_value)d characters is too short; allowed at least %(limit_value)d.",
            "min_value": f"{label}: %(value)s is impossible; allowed %(limit_value)s or more.",
            "max_value": f"{label}: %(value)s is impossible; allowed at most %(limit_value)s.",
        }
        for code, text in limits.items():
            messages.setdefault(code, text)
        field.error_messages = messages


@lru_cache(maxsize=256)
def _default_messages(field_class, language) -> dict[str, str]:
    """Django's generic messages of a field class in a language, merged along its classes once (per form and field
    this took a quarter of building the tank page's eight forms)."""
    defaults = {}
    for cls in reversed(field_class.__mro__):
        defaults.update(getattr(cls, "default_error_messages", {}))
    return {code: str(text) for code, text in defaults.items()}


class NamedErrorsMixin:
    """Forms whose generic field errors name the field (see name_errors)."""

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        name_errors(self)
