import math
from datetime import datetime, timezone
from zoneinfo import ZoneInfo

import pandas as pd
from hypothesis import given, settings
from hypothesis import strategies as st

from colonies.exports import frame_csv, rows_csv, spreadsheet_safe


def test_spreadsheet_safe_prefixes_formula_starts_and_leaves_the_rest():
    # OWASP "CSV Injection" guidance (from memory): cells starting with = + - @ are run as formulas.
    assert spreadsheet_safe("=1+1") == "'=1+1"
    assert spreadsheet_safe("+31 6 000") == "'+31 6 000"
    assert spreadsheet_safe("@SUM(A1)") == "'@SUM(A1)"
    assert spreadsheet_safe("-3 dead") == "'-3 dead"
    assert spreadsheet_safe("Heater replaced") == "Heater replaced"
    assert spreadsheet_safe(-3.5) == -3.5  # numbers are data, not text
    assert spreadsheet_safe("") == ""


_ZONE = ZoneInfo("Europe/Berlin")  # two UTC offsets a year: the offset is written per row
_TEXT = st.one_of(st.none(), st.sampled_from(["", "=1+1", "-3 dead", "+31", "@SUM(A1)", "\tx", "a,b", 'say "hi"',
                                               "two\r\nlines", "Lumbriculus variegatus", "ok"]), st.text(max_size=6))
_NUMBER = st.one_of(st.none(), st.integers(-10**6, 10**6), st.floats(allow_infinity=False),
                    st.sampled_from([0.1 + 0.2, 1e16, 1e-5, 123456789.123, -0.0, math.nan]))
# Real instants shown in local time, as the exports write them (never a wall time skipped by DST).
_TIME = st.datetimes(min_value=datetime(2020, 1, 1), max_value=datetime(2030, 1, 1),
                     timezones=st.just(timezone.utc)).map(lambda t: t.astimezone(_ZONE))


@settings(max_examples=60, deadline=None)
@given(st.lists(st.fixed_dictionaries({"note": _TEXT, "at": _TIME, "value": _NUMBER, "lower": _NUMBER,
                                       "rank": st.integers(1, 400)}, optional={"upper": _NUMBER}),
                min_size=1, max_size=30),
       st.integers(1, 7))
def test_rows_csv_writes_the_text_pandas_writes_for_the_same_rows(rows, batch):
    # Reference: pandas DataFrame.to_csv through frame_csv, which the exports used before; the rows are
    # streamed in chunks instead, and must read back as the same text.
    columns = ["note", "at", "value", "lower", "upper", "rank"]
    frame = pd.DataFrame(rows, columns=columns)
    frame["at"] = pd.to_datetime(frame["at"])
    for col in ("value", "lower", "upper"):
        frame[col] = pd.to_numeric(frame[col], errors="coerce").astype("float64")
    expected = frame_csv(frame, date_format="%Y-%m-%dT%H:%M:%S%z")
    chunks = list(rows_csv(rows, columns, numeric={"value", "lower", "upper"}, date_format="%Y-%m-%dT%H:%M:%S%z",
                           batch=batch))
    assert "".join(chunks) == expected
    assert len(chunks) == 1 + -(-len(rows) // batch)  # the header, then a chunk per `batch` rows
