"""The colony-health overview figure (colonies/overview_chart.py): pure, no database."""
import subprocess
import sys
from datetime import datetime, timedelta

import pytest

from colonies import charts, overview_chart

START = datetime(2026, 1, 1)
END = START + timedelta(days=120)
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


def _is_svg(body: bytes) -> bool:
    return body[:400].decode("utf-8", "replace").startswith("<?xml") and b"<svg" in body[:2000]


def _overview_rows():
    rows = []
    for code, rank, status in (("A-01", 2, "ok"), ("B-02", 1, "attention")):
        base = {"tank": code, "room": "wet-1", "species": "Testworm", "rank": rank}
        for i in range(4):
            rows.append({**base, "series": "population", "at": START + timedelta(days=20 * i), "value": 100 + 30 * i,
                         "lower": 90 + 30 * i, "upper": 110 + 30 * i})
        rows += [{**base, "series": "status", "at": END, "note": status},
                 {**base, "series": "capacity", "at": END, "value": 300},
                 {**base, "series": "density_pct_of_max", "at": END, "value": 60},
                 {**base, "series": "mortality_per_1000_animal_days", "at": END, "value": 1.25},
                 {**base, "series": "flagged_checks_pct", "at": END, "value": 10},
                 {**base, "series": "open_deviations", "at": END, "value": 2}]
    return rows


@pytest.mark.parametrize("fmt", ["svg", "png"])
def test_overview_figure_renders_small_multiples(fmt):
    body = overview_chart.overview_figure(charts.overview_frame(_overview_rows()), title="Colony health", start=START,
                                  end=END, fmt=fmt)
    assert body.startswith(PNG_MAGIC) if fmt == "png" else _is_svg(body)


def test_overview_figure_puts_the_worst_ranked_tank_first_with_its_health_line():
    body = overview_chart.overview_figure(charts.overview_frame(_overview_rows()), title="Colony health", start=START,
                                  end=END).decode()
    assert body.index("B-02 · needs attention") < body.index("A-01 · ok")
    assert "mortality 1.25/1000 a-d" in body and "2 open deviations" in body


@pytest.mark.parametrize("fmt", ["svg", "png"])
def test_overview_figure_handles_no_tanks(fmt):
    body = overview_chart.overview_figure(charts.overview_frame([]), title="Colony health", start=START, end=END, fmt=fmt)
    assert body.startswith(PNG_MAGIC) if fmt == "png" else _is_svg(body)


def test_overview_chart_module_imports_no_django():
    code = "import sys; import colonies.overview_chart; print(any(m.startswith('django') for m in sys.modules))"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"
