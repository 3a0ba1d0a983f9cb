"""The figure of one image measurement (pure: rows in, SVG or PNG bytes out; no Django).

Top: the largest-cluster fraction at each frame with the dispersal threshold (dashed) and the
measured dispersal time (dotted vertical line) or "still clumped" when censored. Bottom: the
cluster count. Sized and lettered to stay readable on a phone (text 9-11 pt on a 4.8 in wide figure, which a phone shows at about its size).
"""
from __future__ import annotations

from collections.abc import Sequence

from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from .charts import OKABE_ITO, _empty, _render

FRAME_CSV_COLUMNS = ("t_s", "clusters", "largest_fraction", "worm_area_px", "largest_area_px", "worm_area_mm2",
                     "contrast_threshold")


def fraction_chart(rows: Sequence[dict], *, threshold: float, window_s: float, dispersal_time_s: float | None,
                   censored: bool | None, title: str = "", fmt: str = "svg") -> bytes:
    measured = [r for r in rows if r.get("largest_fraction") is not None]
    if not measured:
        return _empty("No worm was found in any frame.", fmt)
    fig = Figure(figsize=(4.8, 4.0), layout="constrained")  # narrow: on a phone it is shrunk least
    FigureCanvasAgg(fig)
    top, bottom = fig.subplots(2, 1, sharex=True, height_ratios=[2.2, 1])
    blue, vermillion, green = OKABE_ITO[0], OKABE_ITO[1], OKABE_ITO[2]
    times = [r["t_s"] for r in measured]
    for ax in (top, bottom):
        ax.spines[["top", "right"]].set_visible(False)
        ax.grid(True, color="#dddddd", linewidth=0.6)
        ax.set_axisbelow(True)
        ax.axvline(window_s, color="#777777", linewidth=0.8, linestyle=":")
    top.plot(times, [r["largest_fraction"] for r in measured], color=blue, marker="o", markersize=4, linewidth=2,
             label="Largest-cluster fraction")
    top.axhline(threshold, color=vermillion, linestyle="--", linewidth=1.5, label=f"Threshold {threshold:g}")
    if dispersal_time_s is not None and not censored:
        top.axvline(dispersal_time_s, color=green, linestyle="-.", linewidth=1.8,
                    label=f"Dispersed at {dispersal_time_s:g} s")
        bottom.axvline(dispersal_time_s, color=green, linestyle="-.", linewidth=1.8)
    elif censored:
        top.plot([], [], linestyle="none", label=f"Still clumped at the last frame (censored at {window_s:g} s)")
    top.set_ylim(-0.03, 1.05)
    top.set_ylabel("Largest-cluster fraction", fontsize=10)
    top.tick_params(labelsize=10)
    legend = top.legend(loc="lower left", fontsize=9, frameon=True, framealpha=0.92)
    legend.get_frame().set_edgecolor("#cccccc")
    bottom.step(times, [r["clusters"] for r in measured], where="post", color=OKABE_ITO[3], linewidth=2)
    bottom.set_ylabel("Clusters", fontsize=10)
    bottom.set_xlabel("Time after stimulus (s)", fontsize=10)
    bottom.set_ylim(bottom=0)
    bottom.set_xlim(left=0, right=max(window_s, max(times)) * 1.02)
    bottom.tick_params(labelsize=10)
    if title:
        fig.suptitle(title, x=0.01, ha="left", fontsize=11, fontweight="bold")
    return _render(fig, fmt)
