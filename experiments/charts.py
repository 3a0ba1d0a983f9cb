"""Charts for the study page (pure: tables in, SVG or PNG bytes out; no Django).

matplotlib's object API (Figure + Agg canvas, no pyplot) so that charts are safe to draw from
several request threads at once and never open a window. Colours are the Okabe-Ito palette
(Okabe & Ito 2008, "Color Universal Design"), which stays distinguishable for the common forms
of colour-vision deficiency; each condition also gets its own line style so that the curves can
be told apart in greyscale print.
"""
from __future__ import annotations

import io
import math
import textwrap
from collections.abc import Sequence

import matplotlib

matplotlib.use("Agg")  # no display; must precede any pyplot import elsewhere in the process

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from matplotlib.backends.backend_agg import FigureCanvasAgg  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.ticker import FuncFormatter, NullFormatter  # noqa: E402

# Okabe-Ito, reordered so the first colours are the most distinct; yellow last (weak on white).
OKABE_ITO = ["#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#000000", "#F0E442"]
LINE_STYLES = ["-", "--", "-.", ":", (0, (5, 1, 1, 1)), (0, (3, 1, 1, 1, 1, 1))]
FORMATS = {"svg": "image/svg+xml", "png": "image/png"}
PNG_DPI = 160

KM_TABLE_COLUMNS = ("condition", "time", "at_risk", "events", "censored", "survival", "lower", "upper")


def _figure(width: float = 7.2, height: float = 4.4) -> tuple[Figure, object]:
    fig = Figure(figsize=(width, height), layout="constrained")
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    ax.spines[["top", "right"]].set_visible(False)
    ax.grid(True, color="#dddddd", linewidth=0.6)
    ax.set_axisbelow(True)
    return fig, ax


def _render(fig: Figure, fmt: str) -> bytes:
    if fmt not in FORMATS:
        raise ValueError(f"Unknown chart format {fmt!r}; use one of {', '.join(FORMATS)}.")
    buffer = io.BytesIO()
    # No creation date in the metadata: the same data give the same bytes.
    metadata = {"Date": None} if fmt == "svg" else {"Software": None}
    # A fixed salt for the SVG element ids, so that identical charts are identical files.
    with matplotlib.rc_context({"svg.hashsalt": "vermilog"}):
        fig.savefig(buffer, format=fmt, dpi=PNG_DPI, metadata=metadata)
    return buffer.getvalue()


def _style(i: int) -> dict:
    return {"color": OKABE_ITO[i % len(OKABE_ITO)], "linestyle": LINE_STYLES[i % len(LINE_STYLES)]}


def _empty(message: str, fmt: str) -> bytes:
    fig, ax = _figure(7.2, 2.0)
    ax.axis("off")
    ax.text(0.5, 0.5, message, ha="center", va="center", fontsize=11, color="#444444", transform=ax.transAxes)
    return _render(fig, fmt)


def _km_curve(ax, rows: pd.DataFrame, end: float, style: dict, label: str, band: bool = True,
              linewidth: float = 2.0) -> None:
    times = rows["time"].to_numpy(dtype=float)
    survival = rows["survival"].to_numpy(dtype=float)
    t_step = np.append(times, max(end, float(times.max())))
    s_step = np.append(survival, survival[-1])
    ax.step(t_step, s_step, where="post", linewidth=linewidth, label=label, **style)
    if band:
        lower = np.append(rows["lower"].to_numpy(dtype=float), rows["lower"].iloc[-1])
        upper = np.append(rows["upper"].to_numpy(dtype=float), rows["upper"].iloc[-1])
        ax.fill_between(t_step, np.nan_to_num(lower, nan=0.0), np.nan_to_num(upper, nan=1.0), step="post",
                        color=style["color"], alpha=0.16, linewidth=0)
    ticks = rows[rows["censored"] > 0]
    if not ticks.empty:
        ax.plot(ticks["time"], ticks["survival"], linestyle="none", marker="|", markersize=12,
                markeredgewidth=2, color=style["color"])


def _km_axes(ax, window_s: float | None, *, xlabel: bool = True, ylabel: bool = True) -> None:
    if window_s:
        ax.axvline(window_s, color="#777777", linewidth=0.8, linestyle=":")
    ax.set_xlim(left=0)
    ax.set_ylim(-0.03, 1.06)
    if xlabel:
        ax.set_xlabel("Time after stimulus (s)")
    if ylabel:
        ax.set_ylabel("Fraction still clumped")


KM_METHOD = ("Kaplan-Meier estimate (steps), pointwise 95 % band (Greenwood, log-log; shaded), "
             "censored trials (ticks: still clumped when the window ended, dotted line).")
OVERLAY_MAX = 3  # more curves than this with bands become unreadable: draw one panel per condition


def km_chart(table: pd.DataFrame, *, order: Sequence[str] | None = None, window_s: float | None = None,
             title: str = "", labels: dict[str, str] | None = None, reference: str | None = None,
             fmt: str = "svg") -> bytes:
    """Kaplan-Meier curves of the fraction of trials still clumped, by condition.

    `table` is the long form of analysis.kaplan_meier tables with a `condition` column
    (KM_TABLE_COLUMNS). Up to OVERLAY_MAX conditions share one panel; with more, each condition
    gets its own panel with the `reference` condition drawn in grey behind it, so that bands do
    not pile up (no grey line when the reference has no curve: never another condition instead).
    `labels` adds text to a condition's legend entry or panel title (e.g. its log-rank p against
    the reference).
    """
    if table.empty:
        return _empty("No scored trials yet.", fmt)
    conditions = [c for c in (list(order) if order else list(dict.fromkeys(table["condition"])))
                  if (table["condition"] == c).any()]
    labels = labels or {}
    end = float(window_s or table["time"].max())
    curves = {c: table[table["condition"] == c].sort_values("time") for c in conditions}

    def name(c: str) -> str:
        n = int(curves[c]["at_risk"].iloc[0])
        extra = labels.get(c, "")
        return f"{c} (n = {n}){', ' + extra if extra else ''}"

    if len(conditions) <= OVERLAY_MAX:
        fig, ax = _figure(7.6, 4.6)
        for i, c in enumerate(conditions):
            _km_curve(ax, curves[c], end, _style(i), name(c))
        _km_axes(ax, window_s)
        legend = ax.legend(loc="lower left", fontsize=8.5, frameon=True, framealpha=0.92, title="Condition",
                           title_fontsize=8.5)
        legend.get_frame().set_edgecolor("#cccccc")
        ax.set_title(KM_METHOD, loc="left", fontsize=7.5, color="#555555", wrap=True)
    else:
        columns = 3 if len(conditions) > 4 else 2
        rows_n = math.ceil(len(conditions) / columns)
        fig = Figure(figsize=(3.3 * columns, 2.7 * rows_n + 0.6), layout="constrained")
        FigureCanvasAgg(fig)
        axes = fig.subplots(rows_n, columns, sharex=True, sharey=True, squeeze=False).ravel()
        for i, c in enumerate(conditions):
            ax = axes[i]
            ax.spines[["top", "right"]].set_visible(False)
            ax.grid(True, color="#e3e3e3", linewidth=0.6)
            if reference in curves and c != reference:
                _km_curve(ax, curves[reference], end, {"color": "#9a9a9a", "linestyle": "-"}, "", band=False,
                          linewidth=1.2)
            _km_curve(ax, curves[c], end, _style(i), "")
            ax.set_title(name(c), loc="left", fontsize=9, color=OKABE_ITO[i % len(OKABE_ITO)], fontweight="bold")
            _km_axes(ax, window_s, xlabel=i >= len(conditions) - columns, ylabel=i % columns == 0)
        for ax in axes[len(conditions):]:
            ax.axis("off")
        spare = axes[len(conditions)] if len(conditions) < len(axes) else None
        if reference in curves:
            note = KM_METHOD + f" Grey line: the reference condition, {reference}."
        else:
            note = KM_METHOD + (f" The reference condition, {reference}, has no analysable trials yet." if reference
                                else "")
        if spare is not None:
            spare.text(0.0, 0.95, textwrap.fill(note, 42), fontsize=7.5, color="#444444", va="top",
                       transform=spare.transAxes)
        else:
            fig.supxlabel(textwrap.fill(note, 120), fontsize=7.5, color="#444444")
    if title:
        fig.suptitle(title, x=0.01, ha="left", fontsize=12, fontweight="bold")
    return _render(fig, fmt)


def dose_response_chart(groups: pd.DataFrame, *, curve: pd.DataFrame | None = None, ec50: float | None = None,
                        ec50_lower: float | None = None, ec50_upper: float | None = None,
                        control: tuple[int, int] | None = None, title: str = "", note: str = "",
                        curve_label: str = "", fmt: str = "svg") -> bytes:
    """Fraction dispersed within the window against light dose (log axis), with the fitted curve.

    `groups` has columns dose, n_responding, n_total (one row per dose); `curve` has dose and
    fitted (the fitted probability): pass none when there is no dose trend, and only the points
    are drawn. EC50 is a dashed line with its interval shaded. A zero-dose control, which a log
    axis cannot place, is drawn as a separate point at the left edge.
    """
    positive = groups[groups["dose"] > 0]
    if positive.empty:
        return _empty("No trials with a positive dose yet.", fmt)
    fig, ax = _figure()
    ax.set_xscale("log")
    blue, vermillion, green = OKABE_ITO[0], OKABE_ITO[1], OKABE_ITO[2]
    doses = positive["dose"].to_numpy(dtype=float)
    p = positive["n_responding"].to_numpy(dtype=float) / positive["n_total"].to_numpy(dtype=float)
    x_low, x_high = doses.min() / 2.5, doses.max() * 2.5
    if ec50_lower is not None and ec50_upper is not None and np.isfinite(ec50_lower) and np.isfinite(ec50_upper):
        x_low, x_high = min(x_low, ec50_lower / 1.5), max(x_high, ec50_upper * 1.5)
        ax.axvspan(ec50_lower, ec50_upper, color=vermillion, alpha=0.12, linewidth=0,
                   label=f"95 % interval {ec50_lower:.3g}–{ec50_upper:.3g}")
    if curve is not None and not curve.empty:
        ax.plot(curve["dose"], curve["fitted"], color=blue, linewidth=2, label=curve_label or "Fitted curve")
    if ec50 is not None and np.isfinite(ec50):
        ax.axvline(ec50, color=vermillion, linestyle="--", linewidth=1.5, label=f"EC50 = {ec50:.3g} mJ/cm²")
    sizes = 30 + 12 * positive["n_total"].to_numpy(dtype=float)
    ax.scatter(doses, p, s=sizes, color=green, edgecolor="black", linewidth=0.6, zorder=5,
               label="Observed fraction (area ∝ trials)")
    for d, frac, n_r, n_t in zip(doses, p, positive["n_responding"], positive["n_total"]):
        ax.annotate(f"{int(n_r)}/{int(n_t)}", (d, frac), textcoords="offset points", xytext=(0, 9), ha="center",
                    fontsize=8, color="#333333")
    if control is not None and control[1] > 0:
        ax.scatter([x_low * 1.15], [control[0] / control[1]], marker="D", s=50, color="white", edgecolor="black",
                   zorder=5, label=f"Sham, no light ({control[0]}/{control[1]})")
    ax.set_xlim(x_low, x_high)
    ax.set_ylim(-0.05, 1.08)
    ax.set_xticks(doses)
    ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:g}"))
    ax.xaxis.set_minor_formatter(NullFormatter())
    ax.set_xlabel("Light dose per exposure (mJ/cm², log scale)")
    ax.set_ylabel("Fraction of trials dispersed within the window")
    if title:
        fig.suptitle(title, x=0.01, ha="left", fontsize=12, fontweight="bold")
    if note:
        ax.set_title(textwrap.fill(note, 110), loc="left", fontsize=7.5, color="#555555")
    legend = ax.legend(loc="upper left", fontsize=8.5, frameon=True, framealpha=0.92)
    legend.get_frame().set_edgecolor("#cccccc")
    return _render(fig, fmt)
