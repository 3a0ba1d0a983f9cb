"""Colony-health plots: tidy rows in, SVG or PNG bytes out.

Pure: no Django import, so the figures can be made from a notebook with the CSV a page offers.
The overview's small multiples are drawn by colonies/overview_chart.py with the helpers here.
The views build the rows (tank_frame / overview_frame) and send the same frame as CSV.

Conventions: Okabe & Ito's colour-blind-safe palette ("Color Universal Design", 2008); every
series also differs by marker shape or line style, so a grey-scale print still reads; axis
labels carry units from the parameter registry; times are the lab's local time.
"""
from __future__ import annotations

import functools
import gc
import io
import math
import textwrap
from collections.abc import Iterable, Mapping
from datetime import datetime

import matplotlib

matplotlib.use("Agg")  # server-side rendering only; must precede any pyplot import elsewhere

import matplotlib.dates as mdates  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.lines import Line2D  # noqa: E402

from . import parameters  # noqa: E402  (pure registry)
from .exports import frame_csv  # noqa: E402  (pure)

__all__ = ["OVERVIEW_COLUMNS", "TANK_COLUMNS", "OKABE_ITO", "overview_frame", "tank_figure",
           "tank_frame", "to_csv"]

OKABE_ITO = {
    "black": "#000000", "orange": "#E69F00", "sky": "#56B4E9", "green": "#009E73",
    "yellow": "#F0E442", "blue": "#0072B2", "vermillion": "#D55E00", "purple": "#CC79A7",
}
INK = "#1d2a2c"
GRID = "#d9dcd5"
BAND = "#009E73"  # care band fill (green, light alpha)

FORMATS = {"svg": "image/svg+xml", "png": "image/png"}
# The tank figure's layouts: "wide" (two columns of parameter panels, for a desktop page, print and
# download) and "phone" (one panel per row, sized for a phone held upright: the page picks it below
# 40rem with <picture>).
LAYOUTS = ("wide", "phone")
PHONE_WIDTH_IN = 3.6  # shown about 350 CSS px wide on a phone: 8 pt text stays about 10.5 px

# One tidy table per chart. `series` says what a row is:
#   population  census or split estimate (value, lower, upper; note = "census" or "split")
#   fit         the fitted growth curve (value; note = model)
#   capacity    maximum stocking (value, constant)
#   reading     a measured parameter (parameter, unit, value, target_low/high, flagged = "", "high", "low")
#   deaths      dead removed per day (value)
#   feeding / water_change / split   events (value empty or the amount)
TANK_COLUMNS = ["series", "at", "parameter", "label", "unit", "value", "lower", "upper",
                "target_low", "target_high", "flagged", "note"]
OVERVIEW_COLUMNS = ["tank", "room", "species", "rank", "series", "at", "value", "lower", "upper", "unit", "note"]

# Overview metrics, in the order the health line shows them.
OVERVIEW_METRICS = {
    "status": "",
    "estimate": "animals",
    "density_pct_of_max": "% of max",
    "growth_rate_per_day": "per day",
    "mortality_per_1000_animal_days": "deaths per 1000 animal-days",
    "deaths": "animals",
    "flagged_checks_pct": "% of checks",
    "open_deviations": "deviations",
}


# ---------------------------------------------------------------------------------------------
# Frames
# ---------------------------------------------------------------------------------------------
def tank_frame(rows: Iterable[Mapping]) -> pd.DataFrame:
    """A tank chart's rows as a DataFrame with exactly TANK_COLUMNS (missing keys empty)."""
    frame = pd.DataFrame(list(rows), columns=TANK_COLUMNS)
    return _typed(frame)


def overview_frame(rows: Iterable[Mapping]) -> pd.DataFrame:
    frame = pd.DataFrame(list(rows), columns=OVERVIEW_COLUMNS)
    return _typed(frame)


def _typed(frame: pd.DataFrame) -> pd.DataFrame:
    for col in NUMERIC_COLUMNS:
        if col in frame:
            frame[col] = pd.to_numeric(frame[col], errors="coerce")
    if "at" in frame:
        frame["at"] = pd.to_datetime(frame["at"])
    return frame


NUMERIC_COLUMNS = {"value", "lower", "upper", "target_low", "target_high"}


CSV_DATE_FORMAT = "%Y-%m-%dT%H:%M:%S%z"


def to_csv(frame: pd.DataFrame, header: bool = True) -> bytes:
    """The chart's rows as CSV, every text cell defused for spreadsheets (colonies/exports.py)."""
    return frame_csv(frame, date_format=CSV_DATE_FORMAT, header=header).encode("utf-8")


def _naive(times: pd.Series) -> pd.Series:
    """Matplotlib plots local wall-clock time; drop the zone after the view localised the times."""
    times = pd.to_datetime(times)
    if getattr(times.dt, "tz", None) is not None:
        times = times.dt.tz_localize(None)
    return times


def _naive_dt(value: datetime | None) -> datetime | None:
    if value is None:
        return None
    value = pd.Timestamp(value)
    return (value.tz_localize(None) if value.tzinfo else value).to_pydatetime()


# ---------------------------------------------------------------------------------------------
# Rendering
# ---------------------------------------------------------------------------------------------
def _without_collections(draw):
    """Draw a figure with Python's cyclic garbage collector paused.

    A figure allocates a few hundred thousand objects that live until it is rendered: long enough to
    be promoted to the oldest generation, so every other first render set off a collection of the
    whole process (a Django worker's heap: +150 ms CPU on a tank figure, measured). Paused, they stay
    young, and the first young collection after the figure frees them. The collector is process-wide:
    another thread drawing at the same time only finds it paused already and leaves it to this one.
    """
    @functools.wraps(draw)
    def drawing(*args, **kwargs):
        paused = gc.isenabled()
        gc.disable()
        try:
            return draw(*args, **kwargs)
        finally:
            if paused:
                gc.enable()
    return drawing


def _render(fig: Figure, fmt: str) -> bytes:
    if fmt not in FORMATS:
        raise ValueError(f"format must be one of {', '.join(FORMATS)}, got {fmt!r}")
    buffer = io.BytesIO()
    with matplotlib.rc_context({"svg.fonttype": "none", "svg.hashsalt": "vermilog"}):
        # No creation date in the file: the same data give the same bytes.
        metadata = {"Date": None} if fmt == "svg" else {"Software": "Vermilog"}
        fig.savefig(buffer, format=fmt, dpi=110, metadata=metadata)
    return buffer.getvalue()


def _style(ax, ylabel: str = "") -> None:
    ax.set_facecolor("white")
    ax.grid(True, color=GRID, linewidth=0.6)
    ax.set_axisbelow(True)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.tick_params(labelsize=8, colors=INK)
    if ylabel:
        ax.set_ylabel(ylabel, fontsize=8.5, color=INK)


def _date_axis(panels: list[tuple], start: datetime, end: datetime, *, minticks: int = 4, maxticks: int = 9) -> None:
    """The time axis of panels that share it, as (axes, show the dates under it) pairs, once all are drawn.

    Shared axes share one locator, which every panel would call again at each draw: the dates are
    found once (AutoDateLocator, as before) and then fixed, the same dates for every panel."""
    first = panels[0][0]
    first.set_xlim(start, end)
    locator = mdates.AutoDateLocator(minticks=minticks, maxticks=maxticks)
    first.xaxis.set_major_locator(locator)
    # No offset ("2026-Dec") under every panel: the period is written in the figure's footer.
    first.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator, show_offset=False))
    first.xaxis.set_major_locator(matplotlib.ticker.FixedLocator(first.xaxis.get_majorticklocs()))
    for ax, labels in panels:
        ax.tick_params(axis="x", labelbottom=labels)


def _note(ax, text: str) -> None:
    """A small note above a panel's right end. Its height is given (y=1.0) so matplotlib does not
    measure every tick label of the panel at each draw to see whether the note must move up (it
    never must: no panel has ticks on top); that search was a quarter of the tank figure's render."""
    ax.set_title(text, fontsize=7.5, loc="right", color="#5b6b6e", pad=2, y=1.0)


def _empty(ax, text: str) -> None:
    ax.text(0.5, 0.5, text, transform=ax.transAxes, ha="center", va="center", fontsize=9, color="#5b6b6e")


TANK_MARGINS = {"top": 0.6, "bottom": 0.62, "left": 0.95, "right": 0.2}  # inches
TANK_GAPS = {"rows": 0.42, "columns": 1.05}  # inches between panels: titles above, labels beside


@_without_collections
def tank_figure(frame: pd.DataFrame, *, title: str, start: datetime, end: datetime, fmt: str = "svg",
                subtitle: str = "", layout: str = "wide") -> bytes:
    """Multi-panel health figure of one tank over [start, end].

    Panels, sharing the time axis: population (estimates with interval bars, fitted curve, maximum
    stocking); husbandry events (feedings, water changes, splits); dead removed per day; then one
    panel per measured parameter with its care band shaded and out-of-target points marked
    (▲ above, ▼ below). Works with empty or short data (panels say "no data"). `layout` is one of
    LAYOUTS: "phone" stacks every panel in one column of a narrow figure, with fewer date ticks.
    """
    if layout not in LAYOUTS:
        raise ValueError(f"layout must be one of {', '.join(LAYOUTS)}, got {layout!r}")
    phone = layout == "phone"
    columns = 1 if phone else 2
    start, end = _naive_dt(start), _naive_dt(end)
    if end <= start:
        raise ValueError(f"end must be after start = {start:%Y-%m-%d %H:%M}, got {end:%Y-%m-%d %H:%M}")
    frame = frame.copy()
    frame["at"] = _naive(frame["at"])
    readings = frame[frame["series"] == "reading"]
    keys = [k for k in parameters.KEYS if k in set(readings["parameter"])]
    n_param_rows = math.ceil(len(keys) / columns)
    heights = [2.4, 0.75, 1.1] + [1.45] * n_param_rows
    # A fixed layout (margins and gaps in inches, sized for the labels these panels carry), not
    # constrained layout: that measured every text of every panel and was half of the first render.
    width = PHONE_WIDTH_IN if phone else 11
    margins = dict(TANK_MARGINS)
    if phone:  # the title and footer wrap to the narrow width; the margins grow by their extra lines
        title, subtitle = textwrap.fill(title, 36), textwrap.fill(subtitle, 56)
        margins["top"] += 0.2 * title.count("\n")
        margins["bottom"] += 0.14 * subtitle.count("\n")
    gap = TANK_GAPS["rows"] + (0.22 if phone else 0)  # date labels under every panel on a phone
    height = margins["top"] + margins["bottom"] + sum(heights) + gap * (len(heights) - 1)
    fig = Figure(figsize=(width, height))
    panel_width = (width - margins["left"] - margins["right"] - TANK_GAPS["columns"] * (columns - 1)) / columns
    grid = fig.add_gridspec(
        len(heights), columns, height_ratios=heights,
        left=margins["left"] / width, right=1 - margins["right"] / width,
        top=1 - margins["top"] / height, bottom=margins["bottom"] / height,
        hspace=gap / (sum(heights) / len(heights)), wspace=TANK_GAPS["columns"] / panel_width)
    ax_pop = fig.add_subplot(grid[0, :])
    ax_events = fig.add_subplot(grid[1, :], sharex=ax_pop)
    ax_dead = fig.add_subplot(grid[2, :], sharex=ax_pop)
    fig.suptitle(title, x=0.01, y=1 - 0.12 / height, ha="left", va="top", fontsize=12, fontweight="bold",
                 color=INK)
    if subtitle:
        fig.supxlabel(subtitle, x=0.01, y=0.08 / height, ha="left", va="bottom", fontsize=8, color="#5b6b6e")

    _population_panel(ax_pop, frame, legend_columns=columns)
    _events_panel(ax_events, frame)
    _deaths_panel(ax_dead, frame)
    param_axes = []
    for i, key in enumerate(keys):
        ax = fig.add_subplot(grid[3 + i // columns, i % columns], sharex=ax_pop)
        _parameter_panel(ax, readings[readings["parameter"] == key], parameters.BY_KEY[key])
        param_axes.append(ax)
    # Date labels under the population panel and the bottom panel of each column; on a phone, where
    # a screen shows a panel or two, under every parameter panel too, with fewer dates.
    last_row = set(range(len(keys))) if phone else {len(keys) - 1, len(keys) - 2}
    _date_axis([(ax_pop, True), (ax_events, False), (ax_dead, not keys or phone)]
               + [(ax, i in last_row) for i, ax in enumerate(param_axes)], start, end,
               **({"minticks": 3, "maxticks": 5} if phone else {}))
    return _render(fig, fmt)


def _population_panel(ax, frame: pd.DataFrame, legend_columns: int = 2) -> None:
    _style(ax, "Population (animals)")
    pop = frame[frame["series"] == "population"]
    census = pop[pop["note"] != "split"]
    split = pop[pop["note"] == "split"]
    fit = frame[frame["series"] == "fit"].sort_values("at")
    capacity = frame[frame["series"] == "capacity"]
    handles = []
    if not census.empty:
        low = (census["value"] - census["lower"]).clip(lower=0).fillna(0)
        high = (census["upper"] - census["value"]).clip(lower=0).fillna(0)
        ax.errorbar(census["at"], census["value"].to_numpy(), yerr=[low.to_numpy(), high.to_numpy()], fmt="o", color=OKABE_ITO["blue"],
                    ecolor=OKABE_ITO["blue"], elinewidth=1.2, capsize=3, markersize=5, zorder=3)
        handles.append(Line2D([], [], color=OKABE_ITO["blue"], marker="o", linestyle="",
                              label="Census estimate (95 % interval)"))
    if not split.empty:
        ax.plot(split["at"], split["value"], linestyle="", marker="D", markersize=6, color=OKABE_ITO["purple"],
                markeredgecolor=INK, zorder=4)
        handles.append(Line2D([], [], color=OKABE_ITO["purple"], marker="D", linestyle="",
                              markeredgecolor=INK, label="After a split (estimate)"))
    if not fit.empty:
        model = str(fit["note"].iloc[0] or "fitted")
        ax.plot(fit["at"], fit["value"], color=OKABE_ITO["orange"], linewidth=2, zorder=2)
        handles.append(Line2D([], [], color=OKABE_ITO["orange"], linewidth=2, label=f"Fitted {model} curve"))
    if not capacity.empty:
        value = float(capacity["value"].iloc[0])
        ax.axhline(value, color=OKABE_ITO["vermillion"], linestyle=(0, (5, 3)), linewidth=1.3)
        handles.append(Line2D([], [], color=OKABE_ITO["vermillion"], linestyle=(0, (5, 3)),
                              label=f"Maximum stocking ({value:,.0f})"))
    if census.empty and split.empty:
        _empty(ax, "No census in this period")
    else:
        tops = [pop["upper"].max(), pop["value"].max(), fit["value"].max() if not fit.empty else 0,
                capacity["value"].max() if not capacity.empty else 0]
        ax.set_ylim(0, 1.18 * max(float(v) for v in tops if pd.notna(v)))  # room for the legend
        ax.yaxis.set_major_formatter(matplotlib.ticker.StrMethodFormatter("{x:,.0f}"))
    if handles:
        ax.legend(handles=handles, loc="best", fontsize=7.5, framealpha=0.85, edgecolor=GRID, ncol=legend_columns)


EVENT_STYLE = {
    # series: (row, label, marker, colour)
    "feeding": (2, "Feeding", "|", OKABE_ITO["green"]),
    "water_change": (1, "Water change", "v", OKABE_ITO["sky"]),
    "split": (0, "Split", "D", OKABE_ITO["purple"]),
}


def _events_panel(ax, frame: pd.DataFrame) -> None:
    _style(ax)
    ax.grid(False, axis="y")
    for series, (row, label, marker, colour) in EVENT_STYLE.items():
        events = frame[frame["series"] == series]
        if not events.empty:
            ax.plot(events["at"], np.full(len(events), row), linestyle="", marker=marker, color=colour,
                    markersize=8 if marker == "|" else 5, markeredgewidth=1.4 if marker == "|" else 0.4,
                    markeredgecolor=colour if marker == "|" else INK)
    ax.set_ylim(-0.6, 2.6)
    ax.set_yticks([row for row, *_ in EVENT_STYLE.values()])
    ax.set_yticklabels([label for _, label, *_ in EVENT_STYLE.values()], fontsize=7.5)
    ax.tick_params(axis="y", length=0)


def _deaths_panel(ax, frame: pd.DataFrame) -> None:
    _style(ax, "Dead removed\n(animals/day)")
    dead = frame[frame["series"] == "deaths"]
    if dead.empty:
        _empty(ax, "No checks in this period")
        return
    total = int(dead["value"].sum())
    _note(ax, f"{total} dead removed in the period")
    dead = dead[dead["value"] > 0]
    ax.bar(dead["at"], dead["value"], width=0.8, color=OKABE_ITO["black"], edgecolor=OKABE_ITO["black"])
    top = float(dead["value"].max() or 0)
    ax.set_ylim(0, max(3.0, top * 1.15))
    ax.yaxis.set_major_locator(matplotlib.ticker.MaxNLocator(integer=True, nbins=4))


def _parameter_panel(ax, rows: pd.DataFrame, p: parameters.Parameter) -> None:
    _style(ax, _wrap(p.label_with_unit))
    rows = rows.sort_values("at")
    low = rows["target_low"].dropna()
    high = rows["target_high"].dropna()
    # The band in force at the end of the period (targets rarely change; the CSV has each row's).
    band_low = float(low.iloc[-1]) if not low.empty else None
    band_high = float(high.iloc[-1]) if not high.empty else None
    ax.plot(rows["at"], rows["value"], color=OKABE_ITO["blue"], linewidth=1, marker="o", markersize=2.2)
    for side, marker in (("high", "^"), ("low", "v")):
        hits = rows[rows["flagged"] == side]
        if not hits.empty:
            ax.plot(hits["at"], hits["value"], linestyle="", marker=marker, markersize=7, clip_on=False,
                    color=OKABE_ITO["vermillion"], markeredgecolor=INK, markeredgewidth=0.6, zorder=4)
    values = [v for v in rows["value"].dropna().tolist() + [band_low, band_high] if v is not None]
    if values:
        lo, hi = min(values), max(values)
        pad = (hi - lo) * 0.1 or max(abs(hi) * 0.05, 0.1)
        lo, hi = max(lo - pad, p.minimum), min(hi + pad, p.maximum)
        ax.set_ylim(lo, hi)
        if band_low is not None or band_high is not None:
            ax.axhspan(band_low if band_low is not None else lo, band_high if band_high is not None else hi,
                       color=BAND, alpha=0.13, linewidth=0)
            for limit in (band_low, band_high):
                if limit is not None:
                    ax.axhline(limit, color=BAND, linewidth=0.8, linestyle=(0, (2, 2)))
    target = _target_text(band_low, band_high, p.unit)
    n_out = int((rows["flagged"].isin(["high", "low"])).sum())
    note = f"target {target}" if target else "no target set"
    if n_out:
        note += f" · {n_out} outside (▲ above, ▼ below)"
    _note(ax, note)


def _wrap(text: str, width: int = 18) -> str:
    if len(text) <= width or " (" not in text:
        return text
    head, _, unit = text.partition(" (")
    return f"{head}\n({unit}"


def _target_text(low: float | None, high: float | None, unit: str) -> str:
    suffix = f" {unit}" if unit else ""
    if low is not None and high is not None:
        return f"{low:g}–{high:g}{suffix}"
    if low is not None:
        return f"≥ {low:g}{suffix}"
    if high is not None:
        return f"≤ {high:g}{suffix}"
    return ""
