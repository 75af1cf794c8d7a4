"""Trend charts: one metric against the date, drawn alone or as small multiples.

:func:`trend_figure` draws one metric (value with its uncertainty bar against the date,
baseline, warning and action limits, control limits, the EWMA statistic, flagged points);
:func:`chart_grid` sets several of them two to a row, with one shared key
(:func:`key_figure`) instead of a legend under each. Flagged points get a marker shape of
their own and a short code beside them, and limit kinds differ in line style, so colour
is never the only cue.
"""

from __future__ import annotations

import textwrap
from datetime import date, datetime, timedelta

from matplotlib.dates import AutoDateLocator, ConciseDateFormatter
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from reportlab.lib.units import mm
from reportlab.platypus import Table, TableStyle

from ..history.control import (BEYOND_3, EIGHT_ONE_SIDE, EWMA_BEYOND, FOUR_OF_FIVE,
                               TWO_OF_THREE)
from ..history.trends import FLAGS, OUTSIDE_ACTION, OUTSIDE_WARNING, MetricTrend
from .figures import PALETTE, figure_drawing, new_figure
from .numbers import UNIT_TEXT, compact

#: Short codes printed beside flagged points and in the tables.
FLAG_CODES = {OUTSIDE_ACTION: "A", OUTSIDE_WARNING: "W", BEYOND_3: "S3", TWO_OF_THREE: "R2",
              FOUR_OF_FIVE: "R4", EIGHT_ONE_SIDE: "R8", EWMA_BEYOND: "E"}
#: Marker of a flagged point by its most severe flag: cross, triangle, diamond.
_MARKS = ((OUTSIDE_ACTION, "X", PALETTE[1]), (OUTSIDE_WARNING, "^", "#8a5a12"),
          ("control rule", "D", PALETTE[2]))
_WARN = "#8a5a12"
_LEVEL_WORD = {"warning": "warn", "action": "act"}
#: Width of one small chart in the grid, in mm (two to a 174 mm row).
CELL_MM = 86.0


def codes(flags) -> str:
    """The flags of a point as short codes, e.g. ``"A S3 E"``."""
    return " ".join(FLAG_CODES[f] for f in FLAGS if f in flags)


def metric_title(metric: str, unit: str) -> str:
    """``name (unit)`` with a ratio's unit left out and grey values named."""
    u = UNIT_TEXT.get(unit, f"({unit})")
    return f"{metric} {u}".strip()


def _when(text: str) -> datetime:
    if len(text) == 10:
        d = date.fromisoformat(text)
        return datetime(d.year, d.month, d.day)
    return datetime.fromisoformat(text).replace(tzinfo=None)


def _core_range(trend: MetricTrend) -> tuple[float, float]:
    """The span of the values (with their bars), baselines, control limits and EWMA."""
    v = [p.value + s * (p.uncertainty or 0.0) for p in trend.points for s in (-1, 1)]
    for per in trend.periods:
        v += [] if per.value is None else [per.value]
        if per.control is not None:
            v += list(per.control.zone(3)) + [float(z) for z in per.ewma.z]
    return min(v), max(v)


def trend_figure(trend: MetricTrend, *, width_in: float = 6.8, height_in: float = 2.35,
                 legend: bool = True):
    """The chart of one metric's trend (a matplotlib Figure from :func:`new_figure`).

    With ``legend=False`` (small multiples) the lines are labelled all the same, for a
    shared key, and no legend is drawn under the chart.
    """
    fig, ax = new_figure(width_in, height_in)
    small = not legend
    if small:   # fixed margins, so the charts of a grid line up with each other
        fig.set_layout_engine("none")
        ax.set_position([0.15, 0.13, 0.82, 0.63])
    pts = trend.points
    x = [_when(p.acquired) for p in pts]
    y = [p.value for p in pts]
    title = metric_title(trend.metric, trend.unit)
    ax.set_title(title, fontsize=7.5 if small else 8, loc="left")
    if not small:
        ax.set_ylabel(UNIT_TEXT.get(trend.unit, trend.unit))
    if not pts:
        ax.text(0.5, 0.5, "no measured values", transform=ax.transAxes, ha="center")
        return fig
    span = (max(x) - min(x)) if len(x) > 1 else timedelta(days=1)
    pad = max(span * 0.02, timedelta(hours=12))
    lo, hi = _core_range(trend)
    reach = max(hi - lo, 0.05 * max(abs(lo), abs(hi)), 1e-12)
    drawn, off = [lo, hi], []

    def visible(line) -> bool:
        if lo - reach <= line.value <= hi + reach:
            drawn.append(line.value)
            return True
        off.append(f"{line.kind} {_LEVEL_WORD.get(line.level, line.level)} "
                   f"{compact(line.value)} "
                   f"({'below' if line.value < lo else 'above'})")
        return False

    for line in trend.acceptance:
        if visible(line):
            ax.axhline(line.value, ls="--" if line.level == "action" else ":", lw=0.9,
                       color=PALETTE[1] if line.level == "action" else _WARN,
                       label=f"{line.level} limit (acceptance)"
                       if line.side == trend.acceptance[0].side else None)
    shown = set()

    def once(label):
        if label in shown:
            return None
        shown.add(label)
        return label

    for k, per in enumerate(trend.periods):
        x0 = x[per.first] - pad
        x1 = x[trend.periods[k + 1].first] - pad if k + 1 < len(trend.periods) \
            else x[per.stop - 1] + pad
        if per.value is not None:
            ax.plot([x0, x1], [per.value] * 2, "-", color=PALETTE[4], lw=1.0,
                    label=once("baseline"))
        for line in per.constancy:
            if not visible(line):
                continue
            ax.plot([x0, x1], [line.value] * 2, "--" if line.level == "action" else ":",
                    lw=0.9, color=PALETTE[1] if line.level == "action" else _WARN,
                    label=once(f"{line.level} limit (constancy)"))
        if per.control is not None:
            for v in per.control.zone(3):
                ax.plot([x0, x1], [v] * 2, "-.", lw=0.8, color=PALETTE[2],
                        label=once("control limits (3 sigma)"))
            ax.plot(x[per.first:per.stop], per.ewma.z, "-", lw=0.8, color=PALETTE[0],
                    alpha=0.45, label=once("EWMA"))
    with_u = [(xi, p.value, p.uncertainty) for xi, p in zip(x, pts) if p.uncertainty]
    if with_u:
        ax.errorbar([w[0] for w in with_u], [w[1] for w in with_u],
                    yerr=[w[2] for w in with_u], fmt="none", ecolor=PALETTE[0], elinewidth=0.7,
                    capsize=1.5)
    ms = 2.6 if small else 3
    plain = [i for i, p in enumerate(pts) if not p.in_baseline and not p.current]
    base = [i for i, p in enumerate(pts) if p.in_baseline]
    now = [i for i, p in enumerate(pts) if p.current]
    ax.plot([x[i] for i in plain], [y[i] for i in plain], "o", ms=ms, color=PALETTE[0],
            label="value ± u (k = 1)")
    if base:
        ax.plot([x[i] for i in base], [y[i] for i in base], "o", ms=ms + 0.5, mfc="white",
                color=PALETTE[0], label="baseline session")
    if now:
        ax.plot([x[i] for i in now], [y[i] for i in now], "s", ms=ms + 0.6, color=PALETTE[0],
                label="this session")
    for name, marker, colour in _MARKS:
        if name == "control rule":
            idx = [i for i, p in enumerate(pts) if p.flags and not
                   ({OUTSIDE_ACTION, OUTSIDE_WARNING} & set(p.flags))]
        elif name == OUTSIDE_WARNING:
            idx = [i for i, p in enumerate(pts) if name in p.flags and
                   OUTSIDE_ACTION not in p.flags]
        else:
            idx = [i for i, p in enumerate(pts) if name in p.flags]
        if idx:
            ax.plot([x[i] for i in idx], [y[i] for i in idx], marker, ms=6 if not small else 5,
                    mfc="none", mew=1.1, color=colour, ls="none", label=f"flag: {name}")
    flagged = 0
    last = len(pts) - 1
    for i, p in enumerate(pts):
        if not p.flags:
            continue
        up = flagged % 2 == 0       # alternately above and below, against overlaps
        flagged += 1
        right = i == last           # the last point: label to its left, inside the frame
        ax.annotate(FLAG_CODES[p.flags[0]], (x[i], y[i]), fontsize=5.5, color="0.15",
                    xytext=(-4 if right else 3, 4 if up else -9), textcoords="offset points",
                    ha="right" if right else "left")
    if off:
        lines = textwrap.wrap("beyond the chart: " + "; ".join(dict.fromkeys(off)),
                              64 if small else 130)
        ax.set_title(title + "\n" * len(lines), fontsize=7.5 if small else 8, loc="left")
        ax.text(0.0, 1.02, "\n".join(lines), transform=ax.transAxes,
                fontsize=5 if small else 5.5, color="0.25", va="bottom", in_layout=False)
    margin = 0.08 * (max(drawn) - min(drawn) or reach)
    ax.set_ylim(min(drawn) - margin, max(drawn) + margin)
    loc = AutoDateLocator(minticks=3, maxticks=6 if small else 8)
    ax.xaxis.set_major_locator(loc)
    ax.xaxis.set_major_formatter(ConciseDateFormatter(loc))
    ax.set_xlim(min(x) - pad, max(x) + 2 * pad)
    ax.xaxis.get_offset_text().set_fontsize(6)
    ax.ticklabel_format(axis="y", style="plain", useOffset=False)
    if small:
        ax.tick_params(labelsize=6)
    else:
        fig.legend(*ax.get_legend_handles_labels(), loc="outside lower center", ncol=4,
                   fontsize=5.5, frameon=False, handlelength=2.2)
    return fig


def key_figure(width_in: float = 6.85):
    """The shared key of the small charts: every line and marker they may use."""
    entries = [("value ± u (k = 1)", dict(marker="o", ls="none", ms=3, color=PALETTE[0])),
               ("baseline session", dict(marker="o", ls="none", ms=3.5, mfc="white",
                                         color=PALETTE[0])),
               ("this session", dict(marker="s", ls="none", ms=3.6, color=PALETTE[0])),
               ("baseline", dict(ls="-", color=PALETTE[4], lw=1.0)),
               ("EWMA", dict(ls="-", color=PALETTE[0], alpha=0.45, lw=0.8)),
               ("control limits (3 sigma)", dict(ls="-.", color=PALETTE[2], lw=0.8)),
               ("warning limit", dict(ls=":", color=_WARN, lw=0.9)),
               ("action limit", dict(ls="--", color=PALETTE[1], lw=0.9)),
               ("flag: outside action limit", dict(marker="X", ls="none", ms=5, mfc="none",
                                                   mew=1.1, color=PALETTE[1])),
               ("flag: outside warning limit", dict(marker="^", ls="none", ms=5, mfc="none",
                                                    mew=1.1, color=_WARN)),
               ("flag: control rule", dict(marker="D", ls="none", ms=5, mfc="none", mew=1.1,
                                           color=PALETTE[2]))]
    fig = Figure(figsize=(width_in, 0.42))
    handles = [Line2D([], [], label=label, **style) for label, style in entries]
    fig.legend(handles=handles, loc="center", ncol=4, fontsize=6, frameon=False,
               handlelength=2.4, columnspacing=1.4)
    return fig


def chart_grid(trends, *, height_mm: float = 48.0) -> list:
    """Flowables: the shared key, then the charts of ``trends`` two to a row."""
    if not trends:
        return []
    cells = [figure_drawing(trend_figure(t, width_in=CELL_MM / 25.4,
                                         height_in=height_mm / 25.4, legend=False), CELL_MM)
             for t in trends]
    rows = [cells[i:i + 2] + [""] * (2 - len(cells[i:i + 2])) for i in range(0, len(cells), 2)]
    grid = Table(rows, colWidths=[87 * mm, 87 * mm])
    grid.setStyle(TableStyle([("LEFTPADDING", (0, 0), (-1, -1), 0),
                              ("RIGHTPADDING", (0, 0), (-1, -1), 0),
                              ("TOPPADDING", (0, 0), (-1, -1), 4),
                              ("BOTTOMPADDING", (0, 0), (-1, -1), 1),
                              ("VALIGN", (0, 0), (-1, -1), "TOP")]))
    return [figure_drawing(key_figure(), 174), grid]
