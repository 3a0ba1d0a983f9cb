"""Helpers for files people open in spreadsheets (every CSV and XLSX export goes through them).

Every export streams: rows are built a chunk at a time and sent as they are made, so memory does not
grow with the number of rows. This module makes the text (no Django); reading a large table from the
database and sending the response are in colonies/export_stream.py.
"""
import csv
import io
from collections.abc import Iterable, Iterator, Sequence

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
