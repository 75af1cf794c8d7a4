"""Trend pages of the PDF log: a table of flags per metric and one chart per metric.

:func:`trend_pages` reads the history and returns reportlab flowables for the log's
``extra_pages``; :func:`trend_figure` draws one metric (value with its uncertainty bar
against the date, baseline, warning and action limits, control limits, the EWMA
statistic, flagged points); :func:`render_trend_pdf` writes the pages as a document of
their own (``lacuna trend``). Flagged points get a marker shape of their own and a short
code beside them, and limit kinds differ in line style, so colour is never the only cue.
"""

from __future__ import annotations

import io
from datetime import date, datetime, timedelta
from pathlib import Path

from matplotlib.dates import AutoDateLocator, ConciseDateFormatter
from reportlab.lib import colors
from reportlab.lib.pagesizes import A4
from reportlab.lib.units import mm
from reportlab.platypus import (Image, PageBreak, Paragraph, SimpleDocTemplate, Spacer,
                                Table, TableStyle)

from ..history import History
from ..history.control import (BEYOND_3, EIGHT_ONE_SIDE, EWMA_BEYOND, EWMA_L, EWMA_LAMBDA,
                               FOUR_OF_FIVE, TWO_OF_THREE)
from ..history.trends import (FLAGS, OUTSIDE_ACTION, OUTSIDE_WARNING, MetricTrend,
                              UnitTrends, unit_trends)
from .figures import PALETTE, new_figure
from .style import ACCENT, RULE, SHADE, pdf_text, styles, verdict_mark

#: Short codes printed beside flagged points and in the tables.
FLAG_CODES = {OUTSIDE_ACTION: "A", OUTSIDE_WARNING: "W", BEYOND_3: "S3", TWO_OF_THREE: "R2",
              FOUR_OF_FIVE: "R4", EIGHT_ONE_SIDE: "R8", EWMA_BEYOND: "E"}
#: Marker of a flagged point by its most severe flag: cross, triangle, diamond.
_MARKS = ((OUTSIDE_ACTION, "X", PALETTE[1]), (OUTSIDE_WARNING, "^", "#8a5a12"),
          ("control rule", "D", PALETTE[2]))
_WIDTH_MM = 174.0

__all__ = ["FLAG_CODES", "trend_figure", "trend_flowables", "trend_pages",
           "render_trend_pdf", "standalone_pdf", "figure_image", "codes", "data_table"]


def codes(flags) -> str:
    """The flags of a point as short codes, e.g. ``"A S3 E"``."""
    return " ".join(FLAG_CODES[f] for f in FLAGS if f in flags)


def _when(text: str) -> datetime:
    if len(text) == 10:
        d = date.fromisoformat(text)
        return datetime(d.year, d.month, d.day)
    return datetime.fromisoformat(text).replace(tzinfo=None)


def _fmt(v) -> str:
    return "—" if v is None else f"{v:.4g}"


def _core_range(trend: MetricTrend) -> tuple[float, float]:
    """The span of the values (with their bars), baselines, control limits and EWMA."""
    v = [p.value + s * (p.uncertainty or 0.0) for p in trend.points for s in (-1, 1)]
    for per in trend.periods:
        v += [] if per.value is None else [per.value]
        if per.control is not None:
            v += list(per.control.zone(3)) + [float(z) for z in per.ewma.z]
    return min(v), max(v)


def trend_figure(trend: MetricTrend, *, width_in: float = 6.8, height_in: float = 2.35):
    """The chart of one metric's trend (a matplotlib Figure from :func:`new_figure`)."""
    fig, ax = new_figure(width_in, height_in)
    pts = trend.points
    x = [_when(p.acquired) for p in pts]
    y = [p.value for p in pts]
    ax.set_title(f"{trend.metric} ({trend.unit})", fontsize=8, loc="left")
    ax.set_ylabel(trend.unit)
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
        off.append(f"{line.level} {line.value:.4g} ({line.kind}, "
                   f"{'below' if line.value < lo else 'above'})")
        return False

    for line in trend.acceptance:
        if visible(line):
            ax.axhline(line.value, ls="--" if line.level == "action" else ":", lw=0.9,
                       color=PALETTE[1] if line.level == "action" else "#8a5a12",
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
                    lw=0.9, color=PALETTE[1] if line.level == "action" else "#8a5a12",
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
    plain = [i for i, p in enumerate(pts) if not p.in_baseline]
    base = [i for i, p in enumerate(pts) if p.in_baseline]
    ax.plot([x[i] for i in plain], [y[i] for i in plain], "o", ms=3, color=PALETTE[0],
            label="value ± u (k = 1)")
    if base:
        ax.plot([x[i] for i in base], [y[i] for i in base], "o", ms=3.5, mfc="white",
                color=PALETTE[0], label="baseline session")
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
            ax.plot([x[i] for i in idx], [y[i] for i in idx], marker, ms=6, mfc="none",
                    mew=1.2, color=colour, ls="none", label=f"flag: {name}")
    flagged = 0
    for i, p in enumerate(pts):
        text = (FLAG_CODES[p.flags[0]] if p.flags else "") + (" now" if p.current else "")
        if text:  # the most severe code; alternately above and below, against overlaps
            up = flagged % 2 == 0
            flagged += bool(p.flags)
            ax.annotate(text.strip(), (x[i], y[i]), xytext=(3, 4 if up else -9),
                        textcoords="offset points", fontsize=5.5, color="0.15")
    if off:
        ax.set_title(f"{trend.metric} ({trend.unit})\n", fontsize=8, loc="left")
        ax.text(0.0, 1.02, "off the chart: " + "; ".join(dict.fromkeys(off)),
                transform=ax.transAxes, fontsize=5.5, color="0.25", va="bottom")
    margin = 0.08 * (max(drawn) - min(drawn) or reach)
    ax.set_ylim(min(drawn) - margin, max(drawn) + margin)
    loc = AutoDateLocator(minticks=3, maxticks=8)
    ax.xaxis.set_major_locator(loc)
    ax.xaxis.set_major_formatter(ConciseDateFormatter(loc))
    ax.set_xlim(min(x) - pad, max(x) + pad)
    ax.xaxis.get_offset_text().set_fontsize(6.5)
    fig.legend(*ax.get_legend_handles_labels(), loc="outside lower center", ncol=4,
               fontsize=5.5, frameon=False, handlelength=2.2)
    return fig


def figure_image(fig, width_mm: float = _WIDTH_MM) -> Image:
    """A matplotlib Figure as a reportlab Image of the given width."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=130)
    w_in, h_in = fig.get_size_inches()
    buf.seek(0)
    return Image(buf, width=width_mm * mm, height=width_mm * mm * h_in / w_in)


def data_table(rows, widths, st) -> Table:
    """A table of text cells (or flowables) with a bold header row, widths in mm."""
    data = [[Paragraph(f"<b>{pdf_text(h)}</b>", st["small"]) for h in rows[0]]]
    for r in rows[1:]:
        data.append([c if not isinstance(c, str) else Paragraph(pdf_text(c), st["cell"])
                     for c in r])
    t = Table(data, colWidths=[w * mm for w in widths], repeatRows=1)
    t.setStyle(TableStyle([("VALIGN", (0, 0), (-1, -1), "MIDDLE"),
                           ("LINEBELOW", (0, 0), (-1, 0), 0.8, ACCENT),
                           ("LINEBELOW", (0, 1), (-1, -1), 0.25, RULE),
                           ("ROWBACKGROUNDS", (0, 1), (-1, -1), [colors.white, SHADE])]))
    return t


def _latest_state(trend: MetricTrend) -> str:
    p = trend.latest
    if p is None:
        return "not measured"
    if OUTSIDE_ACTION in p.flags:
        return "fail"
    return "warning" if p.flags else "pass"


def _summary_rows(trends: UnitTrends) -> list:
    rows = [("Metric", "Points", "Baseline (sd, n)", "Control limits", "A", "W", "Rules",
             "E", "", "Latest")]
    for t in trends.metrics:
        per = t.periods[t.latest.period] if t.latest and t.latest.period is not None \
            else None
        base = "none" if per is None or per.value is None else \
            f"{per.value:.4g} ({_fmt(per.sd)}, {per.n})"
        ctl = "—" if per is None or per.control is None else \
            "{:.4g} – {:.4g}".format(*per.control.zone(3))
        rules = sum(any(f in p.flags for f in (BEYOND_3, TWO_OF_THREE, FOUR_OF_FIVE,
                                               EIGHT_ONE_SIDE)) for p in t.points)
        last = t.latest
        latest = "—" if last is None else (f"{last.acquired[:10]}: {last.value:.4g} "
                                           f"{codes(last.flags) or 'in control'}")
        n = f"{len(t.points)}" + (f" (+{t.not_measured} n.m.)" if t.not_measured else "")
        rows.append((f"{t.metric} ({t.unit})", n, base, ctl, str(t.count(OUTSIDE_ACTION)),
                     str(t.count(OUTSIDE_WARNING)), str(rules), str(t.count(EWMA_BEYOND)),
                     verdict_mark(_latest_state(t)), latest))
    return rows


def _flagged_rows(trends: UnitTrends, most: int) -> list:
    found = [(p.acquired, t, p) for t in trends.metrics for p in t.flagged()]
    found.sort(key=lambda r: r[0])
    rows = [("Date", "Session", "Metric", "Value ± u", "Flags (codes above)")]
    for acquired, t, p in found[-most:]:
        u = "" if p.uncertainty is None else f" ± {p.uncertainty:.3g}"
        rows.append((acquired[:16], "now" if p.current else str(p.session_id), t.metric,
                     f"{p.value:.4g}{u} {t.unit}", codes(p.flags)))
    return rows if len(rows) > 1 else []


def _method_text() -> str:
    return ("Control limits: Shewhart individuals chart from the sessions the baseline was "
            "set from, centre ± 3 sigma with sigma = mean moving range / 1.128; run rules "
            "of the Western Electric Statistical Quality Control Handbook (1956); EWMA "
            f"with lambda = {EWMA_LAMBDA:g}, L = {EWMA_L:g} (D. C. Montgomery, Introduction "
            "to Statistical Quality Control, Wiley). Codes: A outside an action limit, W "
            "outside a warning limit, S3 beyond 3 sigma, R2 2 of 3 beyond 2 sigma, R4 4 of "
            "5 beyond 1 sigma, R8 8 on one side, E EWMA beyond its limit. Points are "
            "judged against the profile named above; limits drawn dashed (action) and "
            "dotted (warning), control limits dash-dotted.")


def trend_flowables(trends: UnitTrends, *, new_page: bool = True,
                    most_flagged: int = 10, charts: str = "all") -> list:
    """The trend pages of :func:`trend_pages` from trends already computed."""
    st = styles()
    out = [PageBreak()] if new_page else []
    out.append(Paragraph(pdf_text(f"Trends — unit {trends.unit_id}, phantom "
                                  f"{trends.phantom}"), st["h2"]))
    pts = [p for t in trends.metrics for p in t.points]
    dates = sorted(p.acquired for p in pts)
    span = f"{dates[0][:10]} to {dates[-1][:10]}" if dates else "no dates"
    out.append(Paragraph(pdf_text(
        f"{trends.n_sessions} stored sessions, {span}; limits from profile "
        f"{trends.profile or '(none given)'}."), st["body"]))
    seen = {}
    for t in trends.metrics:
        for per in t.periods:
            seen.setdefault(per.baseline_id, per)
    for per in seen.values():
        out.append(Paragraph(pdf_text(
            f"Baseline {per.baseline_id}: set {per.set_at[:16]} from sessions "
            f"{', '.join(map(str, per.session_ids))} (from {per.starts[:10]}); reason: "
            f"{per.reason}."), st["small"]))
    if not seen:
        out.append(Paragraph("No baseline is set: no constancy or control limits.",
                             st["small"]))
    out.append(Paragraph(pdf_text(_method_text()), st["small"]))
    out.append(Spacer(1, 2 * mm))
    out.append(data_table(_summary_rows(trends), (36, 14, 26, 26, 7, 7, 10, 8, 5, 35), st))
    notes = [f"{t.metric}: {per.control_note}" for t in trends.metrics for per in t.periods
             if per.control_note] + [f"{t.metric}: {t.note}" for t in trends.metrics if t.note]
    for text in dict.fromkeys(notes):
        out.append(Paragraph(pdf_text(text), st["small"]))
    flagged = _flagged_rows(trends, most_flagged)
    if flagged:
        out += [Spacer(1, 2 * mm), Paragraph(f"Latest flagged points (up to {most_flagged})",
                                             st["body"]),
                data_table(flagged, (28, 16, 44, 40, 46), st)]
    charted = [t for t in trends.metrics if charts == "all" or _charted(t)]
    if len(charted) < len(trends.metrics):
        out.append(Paragraph("Charts follow for the headline figures and for every metric "
                             "whose latest point is outside a warning or action limit; the "
                             "table above lists them all.", st["small"]))
    for t in charted:
        out.append(Spacer(1, 2 * mm))
        out.append(figure_image(trend_figure(t)))
    return out


#: Figures always charted on trend pages (the JSON contract's headline names).
HEADLINE = ("mtf50_x", "mtf50_y", "asf_fwhm", "streak_half_angle", "noise_sd")


def _charted(trend: MetricTrend) -> bool:
    last = trend.latest
    outside = last is not None and (OUTSIDE_ACTION in last.flags or OUTSIDE_WARNING in last.flags)
    return trend.metric in HEADLINE or outside


def trend_pages(history_path, unit_id: str, phantom: str | None, profile, *, current=None,
                metrics=None, new_page: bool = True, charts: str = "all") -> list:
    """Trend pages for the PDF log's ``extra_pages``.

    Parameters
    ----------
    history_path : str or Path
        The history database. It is not created when missing.
    unit_id : str
        The unit.
    phantom : str or None
        The phantom's name (``None``: the only phantom the unit was checked with).
    profile : Profile or None
        The limits to draw and judge against.
    current : SessionResult, optional
        The session being logged, not yet recorded; drawn as the last point.
    metrics : sequence of str, optional
        Metrics to chart (default: all measured).
    new_page : bool
        Start with a page break (default True).
    charts : {"all", "headline"}
        Chart every metric, or only the headline figures and the metrics whose latest
        point is outside a limit (the session log's choice; the table lists them all).

    Returns
    -------
    list of flowables
        A heading, a table of flags per metric, the latest flagged points and one chart
        per metric. When the history holds no session of the unit and phantom yet, a
        heading and one line saying so.

    Raises
    ------
    InputError
        As :func:`qa.history.trends.unit_trends` (several phantoms and none chosen, a
        metric stored in a unit other than the profile's, ...).
    """
    path = Path(history_path)
    no_history = not path.is_file()
    if not no_history:
        with History.open(path) as h:
            stored = h.sessions(unit_id=unit_id, phantom=phantom)
            if stored:
                trends = unit_trends(h, unit_id, phantom=phantom, metrics=metrics,
                                     profile=profile, current=current)
                return trend_flowables(trends, new_page=new_page, charts=charts)
    st = styles()
    out = [PageBreak()] if new_page else []
    return out + [Paragraph(pdf_text(f"Trends — unit {unit_id}"), st["h2"]),
                  Paragraph(pdf_text(f"No earlier session of unit {unit_id}"
                                     + (f" with phantom {phantom}" if phantom else "")
                                     + " in the history; trends begin with the next "
                                       "session."), st["body"])]


def standalone_pdf(story: list, *, title: str, subject: str, footer: str,
                   heading: str) -> bytes:
    """A document of its own: heading, the log's caution, ``story``, cautions, sign-off."""
    from .. import __version__
    from .pdf import CAUTION, NumberedCanvas, closing_flowables

    st = styles()
    buf = io.BytesIO()
    doc = SimpleDocTemplate(buf, pagesize=A4, leftMargin=18 * mm, rightMargin=18 * mm,
                            topMargin=15 * mm, bottomMargin=18 * mm, title=title,
                            subject=subject, creator=f"Lacuna {__version__}", author="Lacuna")
    head = [Paragraph(pdf_text(heading), st["title"]),
            Paragraph(pdf_text(CAUTION), st["caution"])]
    canvas_class = type("StandaloneCanvas", (NumberedCanvas,), {"footer_left": footer})
    doc.build(head + list(story) + closing_flowables(st), canvasmaker=canvas_class)
    return buf.getvalue()


def render_trend_pdf(trends: UnitTrends, *, created: str) -> bytes:
    """The trend pages of ``trends`` as a PDF of their own, dated ``created``."""
    return standalone_pdf(
        trend_flowables(trends, new_page=False),
        title=f"Lacuna trends {created} {trends.unit_id}",
        subject=f"Trends of {trends.unit_id} with phantom {trends.phantom}",
        footer=f"Lacuna trends · {trends.unit_id} · {created}",
        heading=f"Lacuna trend log · {trends.unit_id} · {created}")
