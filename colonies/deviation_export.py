"""The deviation register as a CSV: read and built a chunk at a time (memory flat), oldest first.

The evidence lists are never read (they are not exported and are the bulk of a deviation's row). The
text is what the register's CSV has always held: times as `str()` of the UTC time ("2024-05-01
09:30:00+00:00"), severity by its label, hours to close to two decimals (empty while open), and every
text cell defused (colonies/exports.py).
"""
from collections.abc import Iterator
from datetime import datetime

from django.db import connections

from . import export_stream, exports
from .export_stream import utc_text
from .exports import safe_column
from .models import Deviation

COLUMNS = ["id", "tank", "room", "subject", "rule", "parameter", "severity", "status", "opened_at_utc",
           "last_seen_at_utc", "evidence_count", "summary", "acknowledged_at_utc", "acknowledged_by",
           "closed_at_utc", "closed_by", "hours_to_close", "corrective_action"]
FIELDS = ["pk", "tank__code", "tank__room__code", "subject", "rule", "parameter", "severity", "status",
          "opened_at", "last_seen_at", "evidence_count", "summary", "acknowledged_at", "acknowledged_by__username",
          "closed_at", "closed_by__username", "corrective_action"]
TIMESTAMPS = ("opened_at", "last_seen_at", "acknowledged_at", "closed_at")
SEVERITY = dict(Deviation.Severity.choices)


def csv_text(queryset) -> Iterator[str]:
    return exports.csv_text(COLUMNS, chunks(queryset))


def chunks(queryset) -> Iterator[list[tuple]]:
    tz = connections[queryset.db].timezone
    for raw in export_stream.raw_chunks(queryset.order_by("opened_at", "pk"), FIELDS, timestamps=TIMESTAMPS):
        yield _rows(raw, tz)


def _rows(raw: list[tuple], tz) -> list[tuple]:
    (pk, tank, room, subject, rule, parameter, severity, status, opened, last_seen, evidence_count, summary,
     acknowledged, acknowledged_by, closed, closed_by, action) = zip(*raw)
    opened, closed = utc_text(opened, tz, " "), utc_text(closed, tz, " ")
    return list(zip(
        pk, _text(tank), _text(room), safe_column(subject), safe_column(rule), safe_column(parameter),
        safe_column(SEVERITY.get(s, s) for s in severity), safe_column(status), opened,
        utc_text(last_seen, tz, " "), evidence_count, safe_column(summary), utc_text(acknowledged, tz, " "),
        _text(acknowledged_by), closed, _text(closed_by), _hours_to_close(opened, closed), safe_column(action),
    ))


def _text(values) -> list:
    """A joined text column: "" where the deviation has no tank, acknowledger or closer."""
    return safe_column("" if v is None else v for v in values)


def _hours_to_close(opened: list[str], closed: list[str | None]) -> list:
    """From the ISO 8601 texts with their offsets (utc_text), which give back the aware times."""
    out = []
    for start, end in zip(opened, closed):
        if end is None:
            out.append(None)
            continue
        took = datetime.fromisoformat(end) - datetime.fromisoformat(start)
        # A deviation closed the instant it opened has no time to close (the register has always said so).
        out.append(round(took.total_seconds() / 3600, 2) if took else None)
    return out
