"""The checks table behind the CSV and XLSX exports: one query streamed in chunks, memory flat.

Rows come from the query Django compiles for `values_list`, in the order of the `check_export_order`
index, read CHUNK at a time through the chunked cursor that `.iterator()` uses (a server-side cursor on
PostgreSQL), so neither the database nor Python holds the whole table. Each chunk is built a column at
a time from the raw database values, without the ORM's per-value converters (their cost was a fifth of
the export): the few columns that need one get a column-level equivalent below, giving the same text.
Derived values are computed for the whole chunk by `derived.derive_arrays`, which runs the registry's
own functions and gives the very floats `Check.derived()` gives.
"""
import datetime
import json
import tempfile
from collections.abc import Iterable, Iterator

import xlsxwriter
from django.db import connections
from django.db.models import TextField
from django.db.models.functions import Cast
from django.db.models.sql.constants import MULTI
from django.utils.dateparse import parse_datetime

from . import derived, exports, parameters
from .exports import safe_column

CHUNK = 2000
TAIL = ["activity", "clumping", "dead_removed", "surface_film", "odour", "clarity", "flags",
        "corrective_action", "note", "voided", "void_reason"]
FIELDS = (["pk", "tank__code", "tank__room__code", "observed_at", "recorded_at", "recorded_by__username",
           "tank__species__habitat"] + [p.key for p in parameters.PARAMETERS]
          + ["activity", "clumping", "dead_removed", "surface_film", "odour", "clarity", "flags",
             "corrective_action", "note", "voided_at", "void_reason"])
_PARAMS = slice(7, 7 + len(parameters.PARAMETERS))
TIMESTAMPS = ("observed_at", "recorded_at")


def header() -> list[str]:
    out = ["check_id", "tank", "room", "observed_at_utc", "recorded_at_utc", "recorded_by"]
    out += [f"{p.key} [{p.unit}]" if p.unit else p.key for p in parameters.PARAMETERS]
    out += [f"{d.key} [{d.unit}] (derived)" for d in derived.DERIVED]
    return out + TAIL


def chunks(queryset) -> Iterator[list[tuple]]:
    """Export rows of `queryset` (checks), oldest first, a list of up to CHUNK rows at a time.

    A cell is a number, text, or None for an empty cell (a missing reading, a derived value that does
    not apply or cannot be computed). Free text is defused (colonies/exports.py).
    """
    connection = connections[queryset.db]
    if connection.vendor == "sqlite":
        # Read the stored text: Python's sqlite3 module would otherwise parse every timestamp into a
        # datetime (Django registers that converter) only for it to be formatted back into text.
        queryset = queryset.annotate(**{f"{name}_text": Cast(name, TextField()) for name in TIMESTAMPS})
        fields = [f"{name}_text" if name in TIMESTAMPS else name for name in FIELDS]
    else:
        fields = FIELDS
    query = queryset.order_by("observed_at", "pk").values_list(*fields).query
    compiler = query.get_compiler(using=queryset.db)
    for raw in compiler.execute_sql(MULTI, chunked_fetch=True, chunk_size=CHUNK):
        yield _rows(raw, connection.timezone)


def rows(queryset) -> Iterator[tuple]:
    """The export rows one at a time (see `chunks`)."""
    for chunk in chunks(queryset):
        yield from chunk


def _rows(raw: list[tuple], tz) -> list[tuple]:
    columns = list(zip(*raw))
    (pk, tank, room, observed, recorded, user, habitat), params = columns[:7], columns[_PARAMS]
    (activity, clumping, dead, film, odour, clarity, flags, action, note, voided_at,
     void_reason) = columns[_PARAMS.stop:]
    inputs = {key: params[i] for i, key in enumerate(parameters.KEYS) if key in derived.INPUTS}
    values = derived.derive_arrays(inputs, habitat)
    derived_columns = [_rounded(values[d.key], d.decimals + 2) for d in derived.DERIVED]
    return list(zip(
        pk, safe_column(tank), safe_column(room), _iso_utc(observed, tz), _iso_utc(recorded, tz), safe_column(user),
        *params, *derived_columns,
        activity, _ints(clumping), dead, _ints(film), odour, clarity, _flag_lists(flags),
        safe_column(action), safe_column(note), [0 if v is None else 1 for v in voided_at], safe_column(void_reason),
    ))


def _rounded(values, digits: int) -> list:
    # Python's round() (correctly rounded, unlike numpy's); NaN (v != v) is an empty cell.
    return [None if v != v else round(v, digits) for v in values.tolist()]


def _ints(values) -> list[int]:
    return list(map(int, values))  # booleans: 0/1 from SQLite, True/False from PostgreSQL


def _flag_lists(values) -> list[str]:
    """The flagged keys, sorted, space-separated (the JSON object's keys; "{}" is by far the most common)."""
    out = []
    for value in values:
        if not value or value == "{}":
            out.append("")
        else:
            out.append(" ".join(sorted(json.loads(value) if isinstance(value, str) else value)))
    return out


def _iso_utc(values, tz) -> list[str]:
    """ISO 8601 with the offset, as `isoformat()` of the aware datetime the ORM would give.

    PostgreSQL returns aware datetimes. SQLite returns the text Django stored, which is `str()` of the
    naive UTC time ("YYYY-MM-DD HH:MM:SS" or "...:SS.ffffff"): with the database in UTC that shape is
    rewritten as text; any other goes through Django's parser and time zone, as the ORM's converter does.
    """
    if tz is not datetime.timezone.utc:
        return [_iso_parsed(v, tz) for v in values]
    return [v[:10] + "T" + v[11:] + "+00:00"
            if type(v) is str and (len(v) == 19 or len(v) == 26 and v[19] == ".") and v[10] == " " and v[13] == v[16] == ":"
            else _iso_parsed(v, tz) for v in values]


def _iso_parsed(value, tz) -> str:
    if isinstance(value, str):
        value = parse_datetime(value)
    if value.tzinfo is None:
        value = value.replace(tzinfo=tz)  # what timezone.make_aware(value, connection.timezone) does
    return value.isoformat()


def csv_text(queryset) -> Iterator[str]:
    """The CSV text (header first), one string per chunk of rows."""
    return exports.csv_text(header(), chunks(queryset))


# --- XLSX ---------------------------------------------------------------------------------------

XLSX_OPTIONS = {
    "constant_memory": True,  # each row goes to a temporary file as it is written: memory flat
    # Cells hold what the records say: text that looks like a formula, a number or a URL stays text.
    "strings_to_formulas": False, "strings_to_numbers": False, "strings_to_urls": False,
}


def write_xlsx(queryset):
    """The table as an .xlsx in a temporary file (XlsxWriter, constant-memory mode).

    Returns the open file at position 0; closing it deletes it. An empty reading is an empty cell.
    """
    out = tempfile.TemporaryFile(suffix=".xlsx")
    write_xlsx_rows(rows(queryset), out)
    out.seek(0)
    return out


def write_xlsx_rows(table: Iterable[tuple], out) -> None:
    """Header and rows into `out` as the "checks" sheet. Also the benchmark's library floor: the same
    rows, already built, written by XlsxWriter alone."""
    book = xlsxwriter.Workbook(out, XLSX_OPTIONS)
    sheet = book.add_worksheet("checks")
    sheet.freeze_panes(1, 2)  # header row and the check id / tank columns stay in view ("C2")
    sheet.write_row(0, 0, header(), book.add_format({"bold": True}))
    write_string, write_number = sheet.write_string, sheet.write_number
    for r, row in enumerate(table, 1):
        for c, value in enumerate(row):
            if value is None or value == "":
                continue
            if type(value) is str:
                write_string(r, c, value)
            else:
                write_number(r, c, value)
    book.close()
