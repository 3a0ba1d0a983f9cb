"""Helpers for files people open in spreadsheets (every CSV and XLSX export goes through them).

Every export streams: rows are built a chunk at a time and sent as they are made (`csv_text`,
`csv_response`), so memory does not grow with the number of rows. Large tables are read with
`raw_chunks` and built a column at a time.
"""
import csv
import datetime
import io
from collections.abc import Iterable, Iterator, Sequence

import pandas as pd
from django.db import connections
from django.db.models import TextField
from django.db.models.functions import Cast
from django.db.models.sql.constants import MULTI
from django.http import StreamingHttpResponse
from django.utils.dateparse import parse_datetime

CHUNK = 2000  # rows read, built and sent at a time

FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def spreadsheet_safe(value):
    """Free text that a spreadsheet would run as a formula (=, +, -, @, tab or CR first) gets a leading apostrophe.

    Numbers pass unchanged; only strings are touched (OWASP's advice on CSV injection).
    """
    if isinstance(value, str) and value.startswith(FORMULA_START):
        return "'" + value
    return value


def safe_row(row):
    """One CSV/XLSX row with every text cell defused; numbers, dates and None untouched."""
    return [spreadsheet_safe(cell) for cell in row]


def safe_column(cells: Iterable) -> list:
    """A column of cells with every text cell defused (for rows built a column at a time).

    Each distinct value is defused once: a column of tank codes or empty notes holds few."""
    cells = list(cells)
    safe = {cell: spreadsheet_safe(cell) for cell in set(cells)}
    return [safe[cell] for cell in cells]


def safe_frame(frame: pd.DataFrame) -> pd.DataFrame:
    """The frame with every text cell defused. Only text columns (object, string, category) are touched,
    and spreadsheet_safe leaves any non-string in them alone, so numbers, negative ones included, stay numbers."""
    text = [c for c in frame.columns
            if frame[c].dtype == object or isinstance(frame[c].dtype, (pd.StringDtype, pd.CategoricalDtype))]
    if not text:
        return frame
    return frame.assign(**{str(c): frame[c].astype(object).map(spreadsheet_safe) for c in text})


def frame_csv(frame: pd.DataFrame, **options) -> str:
    """The frame as CSV text, spreadsheet-safe. Rows end in CRLF (RFC 4180), which also makes the csv
    writer quote a cell holding a bare CR, so a note with line breaks stays one cell."""
    return safe_frame(frame).to_csv(index=False, lineterminator="\r\n", **options)


def csv_text(header: Sequence[str], chunks: Iterable[Iterable[Sequence]]) -> Iterator[str]:
    """CSV text: the header, then one string per chunk of rows (a few large pieces for the response to
    send, not one per line). Excel dialect with CRLF line ends, as `frame_csv`; None is an empty cell.
    The rows must already be spreadsheet-safe."""
    buffer = io.StringIO()
    writer = csv.writer(buffer)
    writer.writerow(header)
    for rows in chunks:
        writer.writerows(rows)
        yield buffer.getvalue()
        buffer.seek(0)
        buffer.truncate()
    if buffer.tell():  # no rows at all: the header alone
        yield buffer.getvalue()


def frames_text(frames: Iterable[pd.DataFrame], columns: Sequence[str], **options) -> Iterator[str]:
    """`frame_csv` of one table given as consecutive frames (chunks of its rows), header from the first."""
    first = True
    for frame in frames:
        yield frame_csv(frame, header=first, **options)
        first = False
    if first:
        yield frame_csv(pd.DataFrame(columns=list(columns)), **options)


def frame_chunks(frame: pd.DataFrame, size: int | None = None, **options) -> Iterator[str]:
    """`frame_csv` of a frame already in memory, a slice of rows at a time (the same text, in pieces)."""
    size = size or CHUNK
    return frames_text((frame.iloc[start:start + size] for start in range(0, len(frame), size)), frame.columns,
                       **options)


def batches(items: Iterable, size: int | None = None) -> Iterator[list]:
    """Consecutive lists of `size` items (the last may be shorter)."""
    size = size or CHUNK
    batch = []
    for item in items:
        batch.append(item)
        if len(batch) == size:
            yield batch
            batch = []
    if batch:
        yield batch


def csv_response(text: Iterable[str], filename: str) -> StreamingHttpResponse:
    """A streamed CSV download; `text` is produced while the response is sent."""
    response = StreamingHttpResponse(text, content_type="text/csv; charset=utf-8")
    response["Content-Disposition"] = f'attachment; filename="{filename}"'
    return response


# --- Reading rows for an export ---------------------------------------------------------------------

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
        queryset = queryset.annotate(**{f"{name}__text": Cast(name, TextField()) for name in timestamps})
        fields = [f"{name}__text" if name in timestamps else name for name in fields]
    compiler = queryset.values_list(*fields).query.get_compiler(using=queryset.db)
    yield from compiler.execute_sql(MULTI, chunked_fetch=True, chunk_size=size or CHUNK)


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
