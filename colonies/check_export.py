"""The checks table behind the CSV and XLSX exports: one query streamed in chunks, memory flat.

Rows come from `values_list` (no model instances) in the order of the `check_export_order` index,
so neither the database nor Python holds the whole table. Derived values are the registry's own
functions (colonies/derived.py), the numbers `Check.derived()` gives. (Memoising them on their inputs
was tried: readings carry noise, so on the benchmark facility no two checks shared them.)
"""
import tempfile
from collections.abc import Iterator

from openpyxl import Workbook
from openpyxl.cell import WriteOnlyCell
from openpyxl.styles import Font

from . import derived, parameters
from .exports import spreadsheet_safe

CHUNK = 2000
DERIVED_INPUTS = ("temp_c", "ph", "do_mg_l", "tan_mg_l", "conductivity_us_cm", "salinity")
TAIL = ["activity", "clumping", "dead_removed", "surface_film", "odour", "clarity", "flags",
        "corrective_action", "note", "voided", "void_reason"]
FIELDS = (["pk", "tank__code", "tank__room__code", "observed_at", "recorded_at", "recorded_by__username",
           "tank__species__habitat"] + [p.key for p in parameters.PARAMETERS]
          + ["activity", "clumping", "dead_removed", "surface_film", "odour", "clarity", "flags",
             "corrective_action", "note", "voided_at", "void_reason"])
_PARAMS = slice(7, 7 + len(parameters.PARAMETERS))
_INPUT_AT = [7 + [p.key for p in parameters.PARAMETERS].index(k) for k in DERIVED_INPUTS]


def header() -> list[str]:
    out = ["check_id", "tank", "room", "observed_at_utc", "recorded_at_utc", "recorded_by"]
    out += [f"{p.key} [{p.unit}]" if p.unit else p.key for p in parameters.PARAMETERS]
    out += [f"{d.key} [{d.unit}] (derived)" for d in derived.DERIVED]
    return out + TAIL


def _derived_cells(habitat: str, inputs: tuple) -> list:
    values = derived.derive(dict(zip(DERIVED_INPUTS, inputs)), habitat)
    return ["" if values.get(d.key) is None else round(values[d.key], d.decimals + 2) for d in derived.DERIVED]


def _row(v: tuple) -> list:
    """One export row from a values_list tuple; free text defused (spreadsheet_safe)."""
    (pk, tank, room, observed, recorded, user, habitat), params = v[:7], v[_PARAMS]
    (activity, clumping, dead, film, odour, clarity, flags, action, note, voided_at, void_reason) = v[_PARAMS.stop:]
    return ([pk, spreadsheet_safe(tank), spreadsheet_safe(room), observed.isoformat(), recorded.isoformat(),
             spreadsheet_safe(user)]
            + ["" if x is None else x for x in params]
            + _derived_cells(habitat, tuple(v[i] for i in _INPUT_AT))
            + [activity, int(clumping), dead, int(film), odour, clarity, " ".join(sorted(flags)),
               spreadsheet_safe(action), spreadsheet_safe(note), int(voided_at is not None),
               spreadsheet_safe(void_reason)])


def rows(queryset) -> Iterator[list]:
    """Export rows of `queryset` (checks), oldest first, fetched CHUNK at a time (memory flat)."""
    return map(_row, queryset.order_by("observed_at", "pk").values_list(*FIELDS).iterator(chunk_size=CHUNK))


def write_xlsx(queryset):
    """The table as an .xlsx in a temporary file (openpyxl write-only mode: rows go to disk as written).

    Returns the open file at position 0; closing it deletes it. An empty reading is an empty cell.
    """
    book = Workbook(write_only=True)
    sheet = book.create_sheet("checks")
    sheet.freeze_panes = "C2"  # header row and the check id / tank columns stay in view
    bold = Font(bold=True)
    sheet.append([_bold(sheet, h, bold) for h in header()])
    for row in rows(queryset):
        sheet.append([None if cell == "" else cell for cell in row])
    out = tempfile.TemporaryFile(suffix=".xlsx")
    book.save(out)
    out.seek(0)
    return out


def _bold(sheet, value, font):
    cell = WriteOnlyCell(sheet, value=value)
    cell.font = font
    return cell
