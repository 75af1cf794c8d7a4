"""Trend pages of the PDF log: a table of flags per metric, the latest flagged points and
the charts (:mod:`qa.report.trend_chart`).

:func:`trend_pages` reads the history and returns reportlab flowables for the log's
``extra_pages``; :func:`render_trend_pdf` writes the pages as a document of their own
(``lacuna trend``). In the session log the charts are the headline figures (the JSON
contract's names) and every metric whose latest point is flagged; on their own, every
metric. They are drawn as small multiples, two to a row, with one shared key.
"""

from __future__ import annotations

import io
from pathlib import Path

from reportlab.lib import colors
from reportlab.lib.pagesizes import A4
from reportlab.lib.units import mm
from reportlab.platypus import (CondPageBreak, Paragraph, SimpleDocTemplate, Spacer, Table,
                                TableStyle)

from ..history import History
from ..history.control import (BEYOND_3, EIGHT_ONE_SIDE, EWMA_BEYOND, EWMA_L, EWMA_LAMBDA,
                               FOUR_OF_FIVE, TWO_OF_THREE)
from ..history.trends import OUTSIDE_ACTION, OUTSIDE_WARNING, MetricTrend, UnitTrends, unit_trends
from .figures import figure_drawing
from .numbers import format_value, significant, with_unit
from .style import ACCENT, RULE, SHADE, pdf_text, styles, verdict_mark
from .trend_chart import FLAG_CODES, chart_grid, codes, metric_title, trend_figure

_WIDTH_MM = 174.0

__all__ = ["FLAG_CODES", "trend_figure", "trend_flowables", "trend_pages",
           "render_trend_pdf", "standalone_pdf", "figure_image", "codes", "data_table",
           "headline", "charted"]

#: Headline figures of the JSON contract (README, "Results as JSON"), in its order; per
#: disk ``sdnr_<id>`` and ``dprime_npw_<id>`` follow.
HEADLINE = ("mtf50_x", "mtf10_x", "mtf50_y", "mtf10_y", "asf_fwhm", "streak_half_angle")
_PER_DISK = ("sdnr_", "dprime_npw_")


def headline(metric: str) -> bool:
    """True for the JSON contract's headline figures.

    Examples
    --------
    >>> [headline(m) for m in ("mtf10_y", "sdnr_d3", "dprime_npw_d3", "dprime_npwe_d3")]
    [True, True, True, False]
    """
    return metric in HEADLINE or metric.startswith(_PER_DISK)


def _headline_rank(metric: str) -> int:
    if metric in HEADLINE:
        return HEADLINE.index(metric)
    return len(HEADLINE) + (0 if metric.startswith(_PER_DISK[0]) else 1) \
        if headline(metric) else 99


def charted(trend: MetricTrend) -> bool:
    """A chart in the session log: a headline figure, or a latest point that is flagged
    (outside a limit, or a control rule)."""
    last = trend.latest
    return headline(trend.metric) or (last is not None and bool(last.flags))


def figure_image(fig, width_mm: float = _WIDTH_MM):
    """A matplotlib Figure as a reportlab flowable of the given width (vector drawing)."""
    return figure_drawing(fig, width_mm)


def data_table(rows, widths, st, *, pad: float = 2.5) -> Table:
    """A table of text cells (or flowables) with a bold header row, widths in mm."""
    data = [[Paragraph(f"<b>{pdf_text(h)}</b>", st["small"]) for h in rows[0]]]
    for r in rows[1:]:
        data.append([c if not isinstance(c, str) else Paragraph(pdf_text(c), st["cell"])
                     for c in r])
    t = Table(data, colWidths=[w * mm for w in widths], repeatRows=1)
    t.setStyle(TableStyle([("VALIGN", (0, 0), (-1, -1), "MIDDLE"),
                           ("LEFTPADDING", (0, 0), (-1, -1), pad),
                           ("RIGHTPADDING", (0, 0), (-1, -1), pad),
                           ("TOPPADDING", (0, 0), (-1, -1), 2),
                           ("BOTTOMPADDING", (0, 0), (-1, -1), 2),
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
    newest = max((t.latest.acquired[:10] for t in trends.metrics if t.latest), default="")
    rows = [("Metric", "Points", "Baseline (sd, n)", "Control limits", "A", "W", "Rules",
             "E", "", f"Latest ({newest or 'none'})")]
    for t in trends.metrics:
        per = t.periods[t.latest.period] if t.latest and t.latest.period is not None \
            else None
        base = "none" if per is None or per.value is None else \
            f"{significant(per.value)} ({significant(per.sd, 2)}, {per.n})"
        ctl = "—" if per is None or per.control is None else \
            " – ".join(significant(v) for v in per.control.zone(3))
        rules = sum(any(f in p.flags for f in (BEYOND_3, TWO_OF_THREE, FOUR_OF_FIVE,
                                               EIGHT_ONE_SIDE)) for p in t.points)
        last = t.latest
        latest = "—" if last is None else (
            ("" if last.acquired[:10] == newest else f"{last.acquired[:10]}: ")
            + f"{significant(last.value)} {codes(last.flags) or 'in control'}")
        n = f"{len(t.points)}" + (f" (+{t.not_measured} n.m.)" if t.not_measured else "")
        rows.append((metric_title(t.metric, t.unit), n, base, ctl,
                     str(t.count(OUTSIDE_ACTION)), str(t.count(OUTSIDE_WARNING)), str(rules),
                     str(t.count(EWMA_BEYOND)), verdict_mark(_latest_state(t)), latest))
    return rows


def flagged_points(trends: UnitTrends, most: int) -> list:
    """Up to ``most`` flagged points ``(trend, point)``: those of headline figures first,
    the latest first (on one date in the contract's order), then the latest others."""
    found = [(t, p) for t in trends.metrics for p in t.flagged()]
    order = {t.metric: k for k, t in enumerate(trends.metrics)}
    found.sort(key=lambda r: order[r[0].metric])
    found.sort(key=lambda r: _headline_rank(r[0].metric))
    found.sort(key=lambda r: r[1].acquired, reverse=True)
    found.sort(key=lambda r: not headline(r[0].metric))
    return found[:most]


def _flagged_rows(trends: UnitTrends, most: int) -> tuple[list, int]:
    rows = [("Date", "Session", "Metric", "Value ± u", "Flags (codes above)")]
    shown = flagged_points(trends, most)
    for t, p in shown:
        rows.append((p.acquired[:16], "this" if p.current else str(p.session_id),
                     t.metric, with_unit(format_value(p.value, p.uncertainty), t.unit),
                     codes(p.flags)))
    total = sum(len(t.flagged()) for t in trends.metrics)
    return (rows if len(rows) > 1 else []), total - len(shown)


def _method_text() -> str:
    return ("Control limits: Shewhart individuals chart from the sessions the baseline was "
            "set from, centre ± 3 sigma with sigma = mean moving range / 1.128; run rules "
            "of the Western Electric Statistical Quality Control Handbook (1956); EWMA "
            f"with lambda = {EWMA_LAMBDA:g}, L = {EWMA_L:g} (D. C. Montgomery, Introduction "
            "to Statistical Quality Control, Wiley). Codes: A outside an action limit, W "
            "outside a warning limit, S3 beyond 3 sigma, R2 2 of 3 beyond 2 sigma, R4 4 of "
            "5 beyond 1 sigma, R8 8 on one side, E EWMA beyond its limit; n.m.: sessions "
            "in which the metric was not measured. Points are judged against the profile "
            "named above; limits drawn dashed (action) and dotted (warning), control limits "
            "dash-dotted. Table values to four significant digits.")


def trend_flowables(trends: UnitTrends, *, new_page: bool = True,
                    most_flagged: int = 12, charts: str = "all") -> list:
    """The trend pages of :func:`trend_pages` from trends already computed."""
    st = styles()
    out = [CondPageBreak(90 * mm)] if new_page else []
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
    out.append(data_table(_summary_rows(trends), (37, 13, 27, 28, 5.5, 5.5, 10, 5.5, 4.5, 38), st))
    notes = [f"{t.metric}: {per.control_note}" for t in trends.metrics for per in t.periods
             if per.control_note] + [f"{t.metric}: {t.note}" for t in trends.metrics if t.note]
    for text in dict.fromkeys(notes):
        out.append(Paragraph(pdf_text(text), st["small"]))
    flagged, more = _flagged_rows(trends, most_flagged)
    if flagged:
        title = f"Flagged points (up to {most_flagged}: headline figures first, then the " \
                "latest of the others" + (f"; {more} more are counted in the table above)"
                                          if more else ")")
        out += [Spacer(1, 2 * mm), Paragraph(pdf_text(title), st["h3"]),
                data_table(flagged, (28, 16, 44, 46, 40), st)]
    chosen = [t for t in trends.metrics if charts == "all" or charted(t)]
    chosen.sort(key=lambda t: _headline_rank(t.metric) if headline(t.metric) else 99)
    text = ("Charts of every metric follow." if len(chosen) == len(trends.metrics) else
            "Charts follow for the headline figures and for every metric whose latest "
            "point is flagged; the table above lists them all.")
    out.append(Paragraph(text + " Dates along the bottom; the square is this session.",
                         st["small"]))
    grid = chart_grid(chosen)
    if grid:
        out.append(Spacer(1, 1 * mm))
        out += grid
    return out


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
        Start on a new page unless most of a page is left (default True).
    charts : {"all", "headline"}
        Chart every metric, or only the headline figures and the metrics whose latest
        point is flagged (the session log's choice; the table lists them all).

    Returns
    -------
    list of flowables
        A heading, a table of flags per metric, the flagged points and the charts
        (small multiples under one shared key). When the history holds no session of the unit and phantom yet, a
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
    out = [CondPageBreak(90 * mm)] if new_page else []
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
