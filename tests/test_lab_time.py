"""One time zone and one date format for the lab (vermilog/lab_time.py, vermilog/formats/)."""
import re
import subprocess
import sys
from datetime import date, datetime
from pathlib import Path
from zoneinfo import ZoneInfo

import pytest
from django.urls import reverse
from django.utils import formats, timezone

from tests.factories import make_room, make_tank
from vermilog.lab_time import lab_date, lab_moment, moment_formatter, zone_label

BASE_DIR = Path(__file__).resolve().parent.parent


def _footer(response) -> str:
    return re.search(r'<footer class="foot">(.*?)</footer>', response.content.decode(), re.S).group(1)


@pytest.mark.parametrize(("zone", "moment", "label"), [
    ("UTC", datetime(2026, 1, 15, 12, tzinfo=ZoneInfo("UTC")), "UTC"),
    # from the IANA tz database: Central European Time is UTC+1 in winter, CEST UTC+2 in summer
    ("Europe/Berlin", datetime(2026, 1, 15, 12, tzinfo=ZoneInfo("UTC")), "Europe/Berlin (CET, UTC+01:00)"),
    ("Europe/Berlin", datetime(2026, 7, 15, 12, tzinfo=ZoneInfo("UTC")), "Europe/Berlin (CEST, UTC+02:00)"),
    # from the IANA tz database: India has no daylight saving, UTC+5:30 all year
    ("Asia/Kolkata", datetime(2026, 7, 15, 12, tzinfo=ZoneInfo("UTC")), "Asia/Kolkata (IST, UTC+05:30)"),
    # a zone without a letter abbreviation: the offset alone, said once
    ("Asia/Dubai", datetime(2026, 7, 15, 12, tzinfo=ZoneInfo("UTC")), "Asia/Dubai (UTC+04:00)"),
])
def test_zone_label_names_the_zone_its_abbreviation_and_offset(settings, zone, moment, label):
    settings.TIME_ZONE = zone

    assert zone_label(moment) == label


def test_dates_and_moments_are_written_the_labs_way_in_its_zone(settings):
    settings.TIME_ZONE = "Europe/Berlin"

    assert lab_date(date(2026, 3, 5)) == "05 Mar 2026"
    # 23:30 UTC on 31 Dec is already the next day and year in Berlin (UTC+1)
    assert lab_moment(datetime(2026, 12, 31, 23, 30, tzinfo=ZoneInfo("UTC"))) == "01 Jan 2027 00:30"


@pytest.mark.django_db
@pytest.mark.parametrize("zone", ["UTC", "Europe/Berlin", "America/New_York", "Asia/Kolkata"])
@pytest.mark.parametrize("name", ["DATETIME_FORMAT", "SHORT_DATETIME_FORMAT", "DATE_FORMAT", "TIME_FORMAT", "d M Y H:i:s"])
def test_moment_formatter_writes_what_django_date_format_writes(settings, zone, name):
    # Reference: Django's own django.utils.formats.date_format on the moment in the lab's zone; moments
    # over a year at odd hours, across both daylight-saving changes, month and year ends.
    settings.TIME_ZONE = zone
    write = moment_formatter(name)
    start = datetime(2025, 12, 31, 22, 59, tzinfo=ZoneInfo("UTC"))
    for step in range(0, 400 * 24, 7):
        moment = start + timezone.timedelta(hours=step, minutes=step % 60)
        assert write(moment) == formats.date_format(timezone.localtime(moment), name), moment


def test_moment_formatter_falls_back_to_django_for_other_format_characters(monkeypatch):
    original = formats.get_format
    # weekday name and 12-hour time: not in the formatter's own table
    monkeypatch.setattr(formats, "get_format", lambda name, *args, **kwargs:
                        "D, d M Y P" if name == "DATETIME_FORMAT" else original(name, *args, **kwargs))
    moment = datetime(2026, 7, 15, 13, 5, tzinfo=ZoneInfo("UTC"))

    # from Django's date format reference: D = "Wed", P = "1:05 p.m."
    assert moment_formatter("DATETIME_FORMAT")(moment) == "Wed, 15 Jul 2026 1:05 p.m."


def test_sign_in_page_and_signed_in_pages_name_the_same_zone(client, technician, settings):
    settings.TIME_ZONE = "America/Chicago"
    anonymous = _footer(client.get(reverse("login")))
    client.force_login(technician)
    signed_in = _footer(client.get(reverse("colonies:tank-list")))

    assert anonymous == signed_in
    assert "lab time: <span class=\"lab-zone\">America/Chicago (C" in signed_in  # CST or CDT by season
    assert "the lab's time zone" not in anonymous


@pytest.mark.django_db
def test_pages_show_times_in_the_lab_format_and_zone(client, technician, settings):
    settings.TIME_ZONE = "Europe/Berlin"
    tank = make_tank(code="LV-01", room=make_room(code="fw-1"))
    from colonies.models import Check
    Check.objects.create(tank=tank, recorded_by=technician, temp_c=22.0,
                         observed_at=datetime(2026, 1, 15, 23, 30, tzinfo=ZoneInfo("UTC")))
    client.force_login(technician)

    text = client.get(reverse("colonies:tank-list")).content.decode()

    assert "16 Jan 00:30" in text  # the list's short form: day, month, time (Berlin = UTC+1 in January)


@pytest.mark.django_db
def test_a_filtered_date_input_keeps_its_value_as_iso(client, manager):
    # en_GB's first input format is 05/12/2026, which an <input type="date"> cannot show (it went blank
    # after filtering); the lab's formats write ISO back into the input.
    client.force_login(manager)

    html = client.get(reverse("colonies:deviation-register"), {"start": "2026-01-05"}).content.decode()

    assert re.search(r'<input type="date" name="start" value="2026-01-05"', html)


def test_an_unknown_time_zone_stops_the_start_up():
    environ = {"DEBUG": "1", "TIME_ZONE": "Mars/Olympus_Mons", "PATH": "/usr/bin:/bin"}
    result = subprocess.run([sys.executable, "manage.py", "check"], cwd=BASE_DIR, env=environ,
                            capture_output=True, text=True, timeout=60)

    assert result.returncode != 0
    assert "Incorrect timezone setting: Mars/Olympus_Mons" in result.stderr
