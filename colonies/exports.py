"""Helpers for files people open in spreadsheets (every CSV and XLSX export goes through them)."""
import pandas as pd

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
