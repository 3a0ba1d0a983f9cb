"""The deviation register CSV (colonies/deviation_export.py): streamed a chunk at a time, the same text as the
register's former one-frame export (pandas, one Deviation instance at a time) on the cases that differ."""
from datetime import datetime, timedelta, timezone as dt_timezone

import pandas as pd
import pytest
from django.urls import reverse

from colonies import deviation_export, exports
from colonies.exports import frame_csv, spreadsheet_safe
from colonies.models import Deviation
from tests.factories import make_room, make_tank, make_user

T0 = datetime(2025, 4, 2, 8, 30, tzinfo=dt_timezone.utc)


@pytest.fixture
def register(manager):
    odd = make_user("=closer")
    tank = make_tank(code="DV-01", room=make_room(code="-dv"))
    rows = [
        dict(tank=tank, rule=Deviation.Rule.OUT_OF_TARGET, parameter="temp_c", severity=Deviation.Severity.MAJOR,
             summary="=Temperature 26.9 °C, above target", opened_at=T0, last_seen_at=T0 + timedelta(hours=2),
             evidence_count=2),
        dict(tank=None, rule=Deviation.Rule.MISSED_CHECK, subject="+room air", summary="No tank: the whole room",
             opened_at=T0 + timedelta(minutes=5, microseconds=250_000), last_seen_at=T0 + timedelta(minutes=5)),
        dict(tank=tank, rule=Deviation.Rule.MORTALITY, summary='Deaths, "many", 12', opened_at=T0 + timedelta(hours=1),
             last_seen_at=T0 + timedelta(hours=1), status=Deviation.Status.ACKNOWLEDGED,
             acknowledged_at=T0 + timedelta(hours=3, microseconds=7), acknowledged_by=manager),
        dict(tank=tank, rule=Deviation.Rule.DRIFT, parameter="ph", summary="Drift", opened_at=T0 + timedelta(hours=4),
             last_seen_at=T0 + timedelta(hours=4), status=Deviation.Status.CLOSED,
             acknowledged_at=T0 + timedelta(hours=5), acknowledged_by=manager, closed_at=T0 + timedelta(hours=9, seconds=17),
             closed_by=odd, corrective_action="-3 dead removed\r\nwater changed"),
        dict(tank=None, rule=Deviation.Rule.CENSUS_OVERDUE, summary="Closed the instant it opened",
             opened_at=T0 + timedelta(hours=6), last_seen_at=T0 + timedelta(hours=6), status=Deviation.Status.CLOSED,
             acknowledged_at=T0 + timedelta(hours=6), acknowledged_by=odd, closed_at=T0 + timedelta(hours=6),
             closed_by=odd, corrective_action="@duplicate of another"),
    ]
    return [Deviation.objects.create(**row) for row in rows]


def _former_csv(queryset) -> str:
    """The register CSV as it was written before it streamed: a DataFrame of one dict per Deviation."""
    rows = [{
        "id": d.pk, "tank": d.tank.code if d.tank else "", "room": d.tank.room.code if d.tank else "",
        "subject": d.subject, "rule": d.rule, "parameter": d.parameter, "severity": d.get_severity_display(),
        "status": d.status, "opened_at_utc": d.opened_at, "last_seen_at_utc": d.last_seen_at,
        "evidence_count": d.evidence_count, "summary": spreadsheet_safe(d.summary),
        "acknowledged_at_utc": d.acknowledged_at,
        "acknowledged_by": d.acknowledged_by.get_username() if d.acknowledged_by else "",
        "closed_at_utc": d.closed_at, "closed_by": d.closed_by.get_username() if d.closed_by else "",
        "hours_to_close": round(d.time_to_close.total_seconds() / 3600, 2) if d.time_to_close else None,
        "corrective_action": spreadsheet_safe(d.corrective_action),
    } for d in queryset.order_by("opened_at", "pk")]
    return frame_csv(pd.DataFrame(rows, columns=deviation_export.COLUMNS))


def _body(response) -> str:
    assert response.streaming
    return b"".join(response.streaming_content).decode("utf-8")


@pytest.mark.parametrize("chunk", [2, exports.CHUNK])
def test_register_csv_equals_the_former_export_text(client, manager, register, monkeypatch, chunk):
    # common practice: the streamed export is judged against the plain one it replaces
    monkeypatch.setattr(exports, "CHUNK", chunk)
    client.force_login(manager)

    body = _body(client.get(reverse("colonies:deviation-csv")))

    assert body == _former_csv(Deviation.objects.all())
    lines = body.splitlines()
    assert len(lines) == 1 + 5 + 1  # the corrective action's line break is inside quotes
    assert "'=closer" in body and "'=Temperature" in body and "'@duplicate" in body and "'+room air" in body
    assert ",5.0," in body  # 5 h 17 s from opening to closing, in hours to two decimals


def test_register_csv_follows_the_filter(client, manager, register):
    client.force_login(manager)

    body = _body(client.get(reverse("colonies:deviation-csv"), {"unresolved": "on"}))

    assert body == _former_csv(Deviation.objects.unresolved())
    assert body.count("\r\n") == 1 + 3


def test_register_csv_of_nothing_is_the_header(client, manager, db):
    client.force_login(manager)

    assert _body(client.get(reverse("colonies:deviation-csv"))) == ",".join(deviation_export.COLUMNS) + "\r\n"


def test_register_csv_query_count_does_not_grow(client, manager, register, django_assert_max_num_queries, monkeypatch):
    monkeypatch.setattr(exports, "CHUNK", 2)
    client.force_login(manager)
    with django_assert_max_num_queries(10) as small:
        _body(client.get(reverse("colonies:deviation-csv")))
    for i in range(12):
        Deviation.objects.create(rule=Deviation.Rule.MISSED_CHECK, summary=f"more {i}", subject=f"s{i}")
    with django_assert_max_num_queries(len(small.captured_queries)):
        _body(client.get(reverse("colonies:deviation-csv")))
