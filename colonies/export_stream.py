"""Reading a large table for an export and sending it: the database side of colonies/exports.py.

`raw_chunks` reads rows without the ORM's per-value converters and `utc_text` turns a timestamp column
into text a column at a time; `csv_response` sends text as it is made.
"""
import datetime
from collections.abc import Iterable, Iterator, Sequence

from django.db.models import TextField
from django.db.models.functions import Cast
from django.db.models.sql.constants import MULTI
from django.http import StreamingHttpResponse
from django.utils.dateparse import parse_datetime

from . import exports


def csv_response(text: Iterable[str], filename: str) -> StreamingHttpResponse:
    """A streamed CSV download; `text` is produced while the response is sent."""
    response = StreamingHttpResponse(text, content_type="text/csv; charset=utf-8")
    response["Content-Disposition"] = f'attachment; filename="{filename}"'
    return response


def raw_chunks(queryset, fields: Sequence[str], *, timestamps: Sequence[str] = (), size: int | None = None
               ) -> Iterator[list[tuple]]:
    """The rows of `queryset.values_list(*fields)` as the database driver returns them, `size` at a time.

    The query is the one Django compiles for `values_list`, read through the chunked cursor `.iterator()`
    uses (server-side on PostgreSQL), without the ORM's per-value converters, which cost more than the
    rest of a large export: the caller converts a column at a time. The `timestamps` fields are read as
    the database's text for `utc_text`: parsing each into a datetime (sqlite3's converter; on PostgreSQL
    Django's time-zone loader, pure Python) only for it to be formatted back into text cost more than
    anything else in the checks export.
    """
    if timestamps:
        queryset = queryset.annotate(**{f"{name}_as_text": Cast(name, TextField()) for name in timestamps})
        fields = [f"{name}_as_text" if name in timestamps else name for name in fields]
    compiler = queryset.values_list(*fields).query.get_compiler(using=queryset.db)
    yield from compiler.execute_sql(MULTI, chunked_fetch=True, chunk_size=size or exports.CHUNK)


def utc_text(values: Iterable, tz, sep: str = "T") -> list:
    """A timestamp column of `raw_chunks` as `isoformat(sep)` of the aware datetimes the ORM would give
    (None stays None). `tz` is the connection's time zone (`connections[alias].timezone`).

    With the connection in UTC (Django's default) the database's text is rewritten as text (`_utc_iso`);
    any other shape or zone goes through Django's parser and the time zone, as the ORM's values do.
    """
    if tz is not datetime.timezone.utc:
        return [None if v is None else aware(v, tz).isoformat(sep) for v in values]
    return [None if v is None else (type(v) is str and _utc_iso(v, sep)) or aware(v, tz).isoformat(sep)
            for v in values]


def _utc_iso(text: str, sep: str) -> str | None:
    """ISO 8601 with "+00:00" from a UTC time as the database writes it, or None for another shape.

    SQLite holds `str()` of the naive UTC time, "YYYY-MM-DD HH:MM:SS" or "YYYY-MM-DD HH:MM:SS.ffffff";
    PostgreSQL writes timestamptz in UTC as "YYYY-MM-DD HH:MM:SS+00", a fraction with its trailing zeros
    dropped ("...:SS.12+00"). isoformat() writes no fraction for whole seconds, else all six digits.
    """
    if len(text) == 26 and text[19] == "." and text[10] == " " and text[13] == ":" and text[16] == ":" \
            and text[20:].isdigit():  # SQLite's usual shape, microseconds in full: -40 % of this function's time
        return (text if sep == " " else text[:10] + sep + text[11:]) + "+00:00"
    body = text[:-3] if text.endswith("+00") else text
    if len(body) < 19 or body[10] != " " or body[13] != ":" or body[16] != ":":
        return None
    if len(body) == 19:
        return body[:10] + sep + body[11:] + "+00:00"
    if body[19] == "." and 21 <= len(body) <= 26 and body[20:].isdigit():
        return body[:10] + sep + body[11:20] + body[20:].ljust(6, "0") + "+00:00"
    return None


def aware(value, tz) -> datetime.datetime:
    """A raw timestamp of `raw_chunks` (text or datetime) as the aware datetime the ORM would give."""
    if isinstance(value, str):
        value = parse_datetime(value)
    if value.tzinfo is None and tz is not None:
        value = value.replace(tzinfo=tz)  # what timezone.make_aware(value, connection.timezone) does
    return value
