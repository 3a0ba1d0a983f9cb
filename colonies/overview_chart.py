"""The colony-health overview figure: small multiples, one per tank, worst first.

Pure: no Django import. The rows come from charts.overview_frame (the overview's CSV has the same
columns); the panel styling, time axis and rendering are charts.py's.
"""
from __future__ import annotations

import math
from collections.abc import Mapping
from datetime import datetime

import matplotlib
import pandas as pd
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

from .charts import (INK, OKABE_ITO, _date_axis, _empty, _naive, _naive_dt, _render, _style,
                     _without_collections)

__all__ = ["STATUS_STYLE", "overview_figure"]

STATUS_STYLE = {
    # status: (label, edge colour, line style of the panel frame)
    "attention": ("needs attention", OKABE_ITO["vermillion"], "solid"),
    "watch": ("watch", OKABE_ITO["orange"], "dashed"),
    "ok": ("ok", "#9aa5a3", "solid"),
}


@_without_collections
def overview_figure(frame: pd.DataFrame, *, title: str, start: datetime, end: datetime, fmt: str = "svg",
                    columns: int = 4) -> bytes:
    """Small multiples, one per tank in `rank` order (worst first): population trend with the
    maximum stocking line, and a two-line health summary under the tank code."""
    start, end = _naive_dt(start), _naive_dt(end)
    if end <= start:
        raise ValueError(f"end must be after start = {start:%Y-%m-%d %H:%M}, got {end:%Y-%m-%d %H:%M}")
    frame = frame.copy()
    frame["at"] = _naive(frame["at"])
    tanks = (frame.dropna(subset=["tank"]).sort_values(["rank", "tank"])
             .drop_duplicates("tank")[["tank", "room", "species"]].to_dict("records"))
    columns = max(1, min(columns, len(tanks) or 1))
    n_rows = max(1, math.ceil(len(tanks) / columns))
    # A fixed layout (margins in inches), not constrained layout: its cost grows steeply with the
    # number of panels, and these panels are all alike. The caller shows a page of tanks at a time.
    width, height = 2.9 * columns, 0.8 + 2.15 * n_rows + 0.45
    fig = Figure(figsize=(width, height))
    fig.suptitle(title, x=0.01, y=1 - 0.12 / height, ha="left", va="top", fontsize=12, fontweight="bold", color=INK)
    if not tanks:
        ax = fig.add_subplot(1, 1, 1)
        ax.set_axis_off()
        _empty(ax, "No tanks in use")
        return _render(fig, fmt)
    layout = {"left": 0.62 / width, "right": 1 - 0.12 / width, "top": 1 - 1.0 / height, "bottom": 0.75 / height,
              "wspace": 0.3, "hspace": 0.72 / 1.43}
    axes = fig.subplots(n_rows, columns, squeeze=False, sharex=True, gridspec_kw=layout)
    for ax in axes.flat[len(tanks):]:
        ax.set_axis_off()
    for ax, tank in zip(axes.flat, tanks):
        _overview_cell(ax, frame[frame["tank"] == tank["tank"]], tank)
    _date_axis([(ax, i + columns >= len(tanks)) for i, ax in enumerate(axes.flat[:len(tanks)])], start, end)
    for ax in axes[:, 0]:
        ax.set_ylabel("animals", fontsize=8)
    handles = [
        Line2D([], [], color=OKABE_ITO["blue"], marker="o", linestyle="-", markersize=3, label="Estimate"),
        Line2D([], [], color=OKABE_ITO["vermillion"], linestyle=(0, (5, 3)), label="Maximum stocking"),
    ] + [Line2D([], [], color=edge, linestyle=style, linewidth=2, label=f"Frame: {label}")
         for label, edge, style in STATUS_STYLE.values()]
    fig.legend(handles=handles, loc="lower center", bbox_to_anchor=(0.5, 0.05 / height), ncol=len(handles),
               fontsize=7.5, frameon=False)
    return _render(fig, fmt)


def _metric(rows: pd.DataFrame, name: str):
    hit = rows[rows["series"] == name]
    if hit.empty:
        return None
    value = hit["value"].iloc[0]
    return hit["note"].iloc[0] if name == "status" else (None if pd.isna(value) else float(value))


def _overview_cell(ax, rows: pd.DataFrame, tank: Mapping) -> None:
    _style(ax)
    pop = rows[rows["series"] == "population"].sort_values("at")
    if pop.empty:
        _empty(ax, "no census")
    else:
        ax.fill_between(pop["at"], pop["lower"], pop["upper"], color=OKABE_ITO["sky"], alpha=0.25, linewidth=0,
                        step=None)
        ax.plot(pop["at"], pop["value"], color=OKABE_ITO["blue"], marker="o", markersize=3, linewidth=1.2)
    cap = _metric(rows, "capacity")
    if cap:
        ax.axhline(cap, color=OKABE_ITO["vermillion"], linestyle=(0, (5, 3)), linewidth=1)
    ax.set_ylim(bottom=0, top=max(cap or 0, float(pop["upper"].max()) if not pop.empty else 0) * 1.12 or 1)
    ax.yaxis.set_major_locator(matplotlib.ticker.MaxNLocator(nbins=3))
    ax.yaxis.set_major_formatter(matplotlib.ticker.StrMethodFormatter("{x:,.0f}"))
    status = _metric(rows, "status") or "ok"
    label, edge, style = STATUS_STYLE.get(status, STATUS_STYLE["ok"])
    for spine in ax.spines.values():
        spine.set_visible(True)
        spine.set_edgecolor(edge)
        spine.set_linestyle(style)
        spine.set_linewidth(2 if status != "ok" else 0.8)
    pct = _metric(rows, "density_pct_of_max")
    mort = _metric(rows, "mortality_per_1000_animal_days")
    flagged = _metric(rows, "flagged_checks_pct")
    devs = _metric(rows, "open_deviations")
    line2 = " · ".join([f"{pct:.0f} % of max density" if pct is not None else "density unknown",
                        f"mortality {mort:.2f}/1000 a-d" if mort is not None else "mortality unknown"])
    line3 = " · ".join([f"{flagged:.0f} % of checks flagged" if flagged is not None else "no checks",
                        f"{devs:.0f} open deviation{'s' if devs != 1 else ''}" if devs else "no open deviation"])
    # y given: see _note.
    ax.set_title(f"{tank['tank']} · {label}\n{line2}\n{line3}", fontsize=7.2, loc="left", color=INK, pad=3, y=1.0,
                 linespacing=1.3)
