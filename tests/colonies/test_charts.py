"""Colony-health plots (colonies/charts.py): pure functions, no database."""
import re
import subprocess
import sys
from datetime import datetime, timedelta

import pandas as pd
import pytest

from colonies import charts

START = datetime(2026, 1, 1)
END = START + timedelta(days=120)
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


def _is_svg(body: bytes) -> bool:
    head = body[:400].decode("utf-8", "replace")
    return head.startswith("<?xml") and "<svg" in body[:2000].decode("utf-8", "replace")


def _tank_rows():
    rows = []
    for i, n in enumerate([50, 70, 98, 140, 190]):
        at = START + timedelta(days=3 + 14 * i)
        rows.append({"series": "population", "at": at, "value": n, "lower": n * 0.8, "upper": n * 1.25,
                     "unit": "animals", "note": "census"})
    rows.append({"series": "population", "at": START + timedelta(days=80), "value": 120, "unit": "animals",
                 "note": "split"})
    rows.append({"series": "split", "at": START + timedelta(days=80), "value": 120, "unit": "animals"})
    for d in range(0, 120, 10):
        rows.append({"series": "fit", "at": START + timedelta(days=d), "value": 50 * 2 ** (d / 14),
                     "note": "exponential"})
    rows.append({"series": "capacity", "at": START, "value": 300, "unit": "animals"})
    for d in range(120):
        at = START + timedelta(days=d, hours=9)
        temp = 27.5 if d == 40 else 23.0 + (d % 5) * 0.2
        rows.append({"series": "reading", "at": at, "parameter": "temp_c", "label": "Temperature", "unit": "°C",
                     "value": temp, "target_low": 21, "target_high": 25, "flagged": "high" if temp > 25 else ""})
        if d % 7 == 0:
            rows.append({"series": "reading", "at": at, "parameter": "tan_mg_l", "value": 0.2 if d != 63 else 2.5,
                         "target_high": 1.9, "flagged": "high" if d == 63 else ""})
        rows.append({"series": "deaths", "at": at, "value": 3 if d == 41 else 0})
        if d % 3 == 0:
            rows.append({"series": "feeding", "at": at, "value": 0.05, "unit": "g"})
        if d % 7 == 0:
            rows.append({"series": "water_change", "at": at, "value": 50, "unit": "%"})
    return rows


def test_tank_frame_has_exactly_the_published_columns_and_fills_missing_keys():
    frame = charts.tank_frame([{"series": "deaths", "at": START, "value": 2}])
    assert list(frame.columns) == charts.TANK_COLUMNS
    assert pd.isna(frame.loc[0, "lower"]) and frame.loc[0, "value"] == 2


def test_csv_header_is_the_column_list():
    body = charts.to_csv(charts.tank_frame(_tank_rows()))
    assert body.decode().splitlines()[0] == ",".join(charts.TANK_COLUMNS)


def test_overview_frame_has_exactly_the_published_columns():
    frame = charts.overview_frame([{"tank": "A-01", "rank": 1, "series": "estimate", "at": START, "value": 5}])
    assert list(frame.columns) == charts.OVERVIEW_COLUMNS


@pytest.mark.parametrize("fmt", ["svg", "png"])
def test_tank_figure_renders_full_data_as_valid_bytes(fmt):
    body = charts.tank_figure(charts.tank_frame(_tank_rows()), title="Tank A-01", start=START, end=END, fmt=fmt)
    assert body.startswith(PNG_MAGIC) if fmt == "png" else _is_svg(body)


def test_tank_figure_labels_units_from_the_registry_and_marks_flagged_points():
    body = charts.tank_figure(charts.tank_frame(_tank_rows()), title="Tank A-01", start=START, end=END).decode()
    assert "Temperature (°C)" in body
    assert "mg/L NH3-N" in body
    assert "1 outside (▲ above, ▼ below)" in body  # one temperature excursion above 25 °C
    assert "Fitted exponential curve" in body
    assert "Maximum stocking (300)" in body


@pytest.mark.parametrize("rows", [[], [{"series": "population", "at": START + timedelta(days=1), "value": 10}],
                                  [{"series": "reading", "at": START, "parameter": "ph", "value": 7.0}]],
                         ids=["empty", "one-census", "one-reading"])
@pytest.mark.parametrize("fmt", ["svg", "png"])
def test_tank_figure_handles_empty_and_short_data(rows, fmt):
    body = charts.tank_figure(charts.tank_frame(rows), title="Tank A-01", start=START, end=END, fmt=fmt)
    assert body.startswith(PNG_MAGIC) if fmt == "png" else _is_svg(body)


def test_empty_tank_figure_says_there_is_no_data():
    body = charts.tank_figure(charts.tank_frame([]), title="Tank A-01", start=START, end=END).decode()
    assert "No census in this period" in body and "No checks in this period" in body


def test_same_rows_give_the_same_svg_bytes():
    frame = charts.tank_frame(_tank_rows())
    first = charts.tank_figure(frame, title="T", start=START, end=END)
    assert charts.tank_figure(frame, title="T", start=START, end=END) == first


def _svg_size_pt(body: bytes) -> tuple[float, float]:
    head = body[:2000].decode()
    width = re.search(r'<svg[^>]* width="([\d.]+)pt"', head).group(1)
    height = re.search(r'<svg[^>]* height="([\d.]+)pt"', head).group(1)
    return float(width), float(height)


def test_tank_figure_phone_layout_is_narrow_with_one_panel_per_row():
    frame = charts.tank_frame(_tank_rows())
    wide = charts.tank_figure(frame, title="Tank LV-01 · Lumbriculus variegatus · Freshwater room 1", start=START, end=END)
    phone = charts.tank_figure(frame, title="Tank LV-01 · Lumbriculus variegatus · Freshwater room 1", start=START,
                               end=END, layout="phone")

    # 72 pt to the inch: the wide figure is 11 in across, the phone one PHONE_WIDTH_IN (3.6 in)
    assert _svg_size_pt(wide)[0] == 11 * 72 and _svg_size_pt(phone)[0] == charts.PHONE_WIDTH_IN * 72
    # two parameters (temperature, ammonia): side by side in the wide figure, one under the other on a phone
    assert _svg_size_pt(phone)[1] > _svg_size_pt(wide)[1] + 1.45 * 72 * 0.9
    text = phone.decode()
    assert "Temperature (°C)" in text and "1 outside (▲ above, ▼ below)" in text
    assert "Tank LV-01 · Lumbriculus variegatus · Freshwater" not in text  # the title wraps onto two lines
    assert "Tank LV-01 · Lumbriculus" in text and "Freshwater room 1" in text


def test_tank_figure_rejects_an_unknown_layout_naming_the_allowed_ones():
    with pytest.raises(ValueError, match=r"layout must be one of wide, phone, got 'tablet'"):
        charts.tank_figure(charts.tank_frame([]), title="T", start=START, end=END, layout="tablet")


def test_tank_figure_rejects_unknown_format_and_reversed_period():
    frame = charts.tank_frame([])
    with pytest.raises(ValueError, match="format must be one of svg, png, got 'gif'"):
        charts.tank_figure(frame, title="T", start=START, end=END, fmt="gif")
    with pytest.raises(ValueError, match="end must be after start"):
        charts.tank_figure(frame, title="T", start=END, end=START)


def test_charts_module_imports_no_django():
    code = "import sys; import colonies.charts; print(any(m.startswith('django') for m in sys.modules))"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"
