"""The checks table behind the CSV and XLSX exports: one query streamed in chunks, memory flat.

Rows are read CHUNK at a time in the order of the `check_export_order` index (`export_stream.raw_chunks`: the
`values_list` query without the ORM's per-value converters), so neither the database nor Python holds
the whole table, and each chunk is built a column at a time; the columns that need a conversion get a
column-level one giving the text the ORM's values gave. Derived values are computed for the whole chunk
by `derived.derive_arrays`, which runs the registry's own functions: the very floats `Check.derived()`
gives. The CSV is byte for byte what a check-by-check recomputation writes (tests/colonies/test_check_export.py).
"""
import json
import tempfile
from collections.abc import Iterable, Iterator

import xlsxwriter
from django.db import connections

from . import derived, export_stream, exports, parameters
from .export_stream import utc_text
from .exports import safe_column

CHUNK = exports.CHUNK
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
    tz = connections[queryset.db].timezone
    for raw in export_stream.raw_chunks(queryset.order_by("observed_at", "pk"), FIELDS, timestamps=TIMESTAMPS, size=CHUNK):
        yield _rows(raw, tz)


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
        pk, safe_column(tank), safe_column(room), utc_text(observed, tz), utc_text(recorded, tz), safe_column(user),
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
