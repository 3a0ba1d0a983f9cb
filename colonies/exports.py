"""Helpers for files people open in spreadsheets (every CSV and XLSX export goes through them).

Every export streams: rows are built a chunk at a time and sent as they are made, so memory does not
grow with the number of rows. This module makes the text (no Django); reading a large table from the
database and sending the response are in colonies/export_stream.py.
"""
import csv
import io
from collections.abc import Collection, Iterable, Iterator, Mapping, Sequence
from datetime import datetime

import pandas as pd

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


class _Line:
    """A file for csv.writer that hands back the line it was given (no buffer)."""

    def write(self, line: str) -> str:
        return line


def rows_csv(rows: Iterable[Mapping], columns: Sequence[str], *, numeric: Collection[str] = (),
             date_format: str = "%Y-%m-%d %H:%M:%S", batch: int = 2000) -> Iterator[str]:
    """CSV text of `rows` (mappings; a missing key is an empty cell), header first, then `batch`
    rows per chunk, so a long export streams with flat memory.

    The text is what frame_csv gives for a DataFrame of the same rows, without building one (which
    cost ~3 ms per chunk): `numeric` columns as floats (an integer as 12.0, missing as empty),
    datetimes with `date_format`, text defused (spreadsheet_safe), rows ending in CRLF. Another
    column is written as its values are, so a column of whole numbers must be on every row (pandas
    would make it a float column, 1.0, if a row lacked it; it cannot be known before the last row).
    """
    writer = csv.writer(_Line(), lineterminator="\r\n")
    yield writer.writerow(list(columns))
    numeric = frozenset(numeric)
    kinds = [c in numeric for c in columns]
    dates: dict[tuple, str] = {}  # rows often share a time (e.g. every metric of the overview at its end)
    chunk = []
    for row in rows:
        cells = []
        for column, is_number in zip(columns, kinds):
            value = row.get(column)
            if value is None:
                cells.append("")
            elif is_number:
                value = float(value)
                cells.append("" if value != value else repr(value))  # NaN is the one value unequal to itself
            elif type(value) is str:
                cells.append("'" + value if value.startswith(FORMULA_START) else value)  # spreadsheet_safe, inline
            elif isinstance(value, datetime):
                key = (value, value.utcoffset())  # equal instants in two zones are written differently
                text = dates.get(key)
                if text is None:
                    text = dates[key] = value.strftime(date_format)
                cells.append(text)
            elif isinstance(value, float) and value != value:
                cells.append("")
            else:
                cells.append(spreadsheet_safe(value))
        chunk.append(writer.writerow(cells))
        if len(chunk) >= batch:
            yield "".join(chunk)
            chunk = []
    if chunk:
        yield "".join(chunk)
