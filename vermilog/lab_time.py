"""The lab's one time zone (settings.TIME_ZONE, from the environment) and its one date format.

Every time is stored in UTC and shown in TIME_ZONE; the footer of every page, the sign-in page
included, names the zone the same way (`zone_label`), and date/time inputs say which zone they
mean. Dates are written the lab's way (vermilog/formats/en_GB/formats.py), never the browser's.
"""
from datetime import date, datetime

from django.conf import settings
from django.utils import formats, timezone


def zone_label(now: datetime | None = None) -> str:
    """'Europe/Berlin (CET, UTC+01:00)', or just 'UTC': the zone's name, its abbreviation and offset now."""
    now = timezone.localtime(now or timezone.now())
    name = settings.TIME_ZONE
    offset = now.strftime("%z")
    offset = f"UTC{offset[:3]}:{offset[3:]}"
    if name in ("UTC", "Etc/UTC") or (offset == "UTC+00:00" and now.tzname() == "UTC"):
        return name
    abbreviation = now.tzname()
    # Some zones have no abbreviation and give the offset instead ("+04"): say it once.
    return f"{name} ({abbreviation}, {offset})" if abbreviation and abbreviation[0].isalpha() else f"{name} ({offset})"


def lab_date(day: date) -> str:
    """A date the lab's way: '05 Dec 2026'."""
    return formats.date_format(day, "DATE_FORMAT")


def lab_moment(moment: datetime) -> str:
    """A moment in the lab's time zone, the lab's way: '05 Dec 2026 14:30'."""
    return formats.date_format(timezone.localtime(moment) if timezone.is_aware(moment) else moment,
                               "DATETIME_FORMAT")


def lab_time_context(request) -> dict:
    """For every template, signed in or not (the sign-in page too)."""
    return {
        "TIME_ZONE": settings.TIME_ZONE,
        "lab_zone": zone_label(),
        "lab_date_format": formats.get_format("DATE_FORMAT"),
    }
