"""Rendered colony-health figures and their CSV, cached under keys that carry a data version.

A tank's figure is keyed by that tank's records version (health_series.records_versions); the
overview's by the facility version (the newest history id of each record type it shows), so any
save, correction or void anywhere it looks makes a new key. The pictures come from charts.py.
"""
import hashlib
import itertools
from datetime import datetime, timedelta

from django.core.cache import cache
from django.utils import timezone

from . import charts, growth, health_overview, health_series, overview_chart
from .exports import rows_csv
from .health_series import local, window
from .models import Tank

CACHE_SECONDS = 24 * 3600


def cached(key: str, build) -> tuple[bytes, bool]:
    """(bytes, came from the cache)."""
    hit = cache.get(key)
    if hit is not None:
        return hit, True
    value = build()
    cache.set(key, value, CACHE_SECONDS)
    return value, False


def cache_key(*parts) -> str:
    return "vermilog:" + hashlib.sha256(":".join(str(p) for p in parts).encode()).hexdigest()


# ---------------------------------------------------------------------------------------------
# One tank
# ---------------------------------------------------------------------------------------------
def tank_plot_key(tank: Tank, days: int, fmt: str, layout: str = "wide") -> str:
    """Cache key of a tank's figure: tank, period (whole local days), records version, format and layout."""
    start, _ = window(days)
    return cache_key("tank-plot", tank.pk, days, start.isoformat(),
                     health_series.records_versions([tank.pk])[tank.pk], fmt, *(() if layout == "wide" else (layout,)))


def render_tank_plot(tank: Tank, days: int, fmt: str, layout: str = "wide") -> tuple[bytes, bool]:
    """The tank's figure for the last `days` days, from the cache when its records have not changed."""
    start, end = window(days)

    def build():
        frame = charts.tank_frame(health_series.tank_plot_rows(tank, start, end))
        title = f"Tank {tank.code} · {tank.species.scientific_name} · {tank.room.name}"
        subtitle = (f"{local(start):%d %b %Y} to {local(end - timedelta(seconds=1)):%d %b %Y} ({days} days) · "
                    f"{tank.volume_l:g} L · made by Vermilog {timezone.localdate():%Y-%m-%d}")
        return charts.tank_figure(frame, title=title, subtitle=subtitle, start=local(start), end=local(end), fmt=fmt,
                                  layout=layout)

    return cached(tank_plot_key(tank, days, fmt, layout), build)


def tank_csv_chunks(tank: Tank, days: int):
    """The tank figure's rows as CSV text (charts.TANK_COLUMNS), grouped by series, header first."""
    start, end = window(days)
    rows = health_series.tank_plot_rows(tank, start, end)
    by_series: dict[str, list] = {}
    for row in rows:
        by_series.setdefault(row["series"], []).append(row)
    return _csv(charts.TANK_COLUMNS, itertools.chain.from_iterable(by_series.values()))


def _csv(columns, rows):
    """The rows as the same CSV text charts.to_csv gives for their frame, streamed in chunks."""
    return rows_csv(rows, columns, numeric=charts.NUMERIC_COLUMNS, date_format=charts.CSV_DATE_FORMAT)


# ---------------------------------------------------------------------------------------------
# The facility overview, one page (a room, or all rooms, PAGE_TANKS tanks worst first) at a time
# ---------------------------------------------------------------------------------------------
def overview_plot_key(days: int, fmt: str, room: str = "", page: int = 1) -> str:
    return cache_key("overview-plot", days, timezone.localdate().isoformat(), room, page,
                     health_series.facility_version(), fmt)


def render_overview_plot(days: int, fmt: str, room: str = "", page: int = 1) -> tuple[bytes, bool]:
    today = timezone.localdate()

    def build():
        data = health_overview.overview(days)
        shown = health_overview.select(data, room, page)
        trend_start = trend_from(data)
        frame = charts.overview_frame(health_overview.overview_rows(data, trend_start, shown["rows"]))
        title = (f"Colony health · {today:%d %b %Y} · {shown['label']} · worst first · health over the last "
                 f"{days} days, population over {max(days, growth.FIT_WINDOW_DAYS)} days")
        return overview_chart.overview_figure(frame, title=title, start=local(trend_start), end=local(data["end"]), fmt=fmt)

    return cached(overview_plot_key(days, fmt, room, page), build)


def trend_from(data: dict) -> datetime:
    return data["end"] - timedelta(days=max(data["days"], growth.FIT_WINDOW_DAYS))


def overview_csv_chunks(data: dict, rows: list[dict]):
    """The overview's rows (`rows`, a selection of data["rows"]) as CSV text, built a tank at a time."""
    trend_start = trend_from(data)
    return _csv(charts.OVERVIEW_COLUMNS, itertools.chain.from_iterable(
        health_overview.overview_rows(data, trend_start, [row]) for row in rows))
