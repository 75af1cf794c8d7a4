"""The comparison page of the PDF log: a unit before and after a change (e.g. an update).

:func:`comparison_page` returns reportlab flowables (for a log's ``extra_pages`` or a
document of its own, :func:`render_comparison_pdf`): the two sides, the interval method,
a table per metric and a chart of the relative changes with their intervals and the
constancy limits. Verdicts carry a shape and a word, so colour is never the only cue.
"""

from __future__ import annotations

from reportlab.lib.units import mm
from reportlab.platypus import PageBreak, Paragraph, Spacer

from ..compare import Comparison, MetricComparison
from .figures import PALETTE, new_figure
from .numbers import UNIT_TEXT, fixed, relative_limit, significant
from .style import pdf_text, styles, verdict_mark
from .trends import data_table, figure_image, standalone_pdf

__all__ = ["comparison_page", "comparison_figure", "render_comparison_pdf"]

#: Marker and colour of a metric's change in the chart, by its mark.
_MARKS = {"pass": ("o", PALETTE[2]), "warning": ("^", "#8a5a12"), "fail": ("X", PALETTE[1])}


def _num(v) -> str:
    return significant(v)


def _mean_sd(values, mean, sd) -> str:
    if not values:
        return "—"
    return _num(mean) + ("" if sd is None else f" ± {significant(sd, 2)}")


def _difference(m: MetricComparison) -> str:
    """The difference with its interval, and in per cent of the mean before when the
    constancy limit is relative (the limit's own terms)."""
    text = _num(m.difference)
    if m.interval is not None:
        text += f" [{_num(m.interval[0])}, {_num(m.interval[1])}]"
    if relative_limit(m.limit) and m.difference is not None and m.mean_before:
        text += f" = {fixed(100.0 * m.difference / abs(m.mean_before), 1, sign=True)} %"
    return text


def _action_step(m: MetricComparison) -> float | None:
    """The constancy action change of ``m``'s limit in the metric's unit (or None)."""
    lim = m.limit
    if lim is None or lim.constancy is None or not m.before:
        return None
    step = float(lim.constancy.action)
    if lim.constancy_as == "fraction":
        step *= abs(m.mean_before)
    return step if step > 0 else None


def comparison_figure(comparison: Comparison):
    """Each metric's change with its interval, in units of its constancy action change.

    On this scale the action limit lies at 1 on the worse side (either side for band
    metrics), dashed, and the warning limit at warning/action, dotted. Metrics without a
    constancy limit or without an interval are left out (the table lists them).
    """
    rows = [(m, _action_step(m)) for m in comparison.metrics if m.interval is not None]
    rows = [(m, step) for m, step in rows if step is not None]
    fig, ax = new_figure(6.8, max(1.4, 0.3 * len(rows) + 0.9))
    ax.axvline(0.0, color="0.3", lw=0.8)
    labelled = set()
    for k, (m, step) in enumerate(rows):
        lo, hi = (v / step for v in m.interval)
        marker, colour = _MARKS[m.mark]
        ax.plot([lo, hi], [k, k], "-", color=colour, lw=1.2)
        ax.plot([m.difference / step], [k], marker, color=colour, ms=5, ls="none",
                label=None if m.mark in labelled else m.mark)
        labelled.add(m.mark)
        lim = m.limit
        sides = {"higher": (-1,), "lower": (1,), "band": (-1, 1)}[lim.better]
        ratio = float(lim.constancy.warning) / float(lim.constancy.action)
        for sgn in sides:
            for x, style, c in ((sgn, "--", PALETTE[1]), (sgn * ratio, ":", "#8a5a12")):
                ax.plot([x, x], [k - 0.35, k + 0.35], style, color=c, lw=0.9)
    ax.set_yticks(range(len(rows)), [m.metric for m, _ in rows], fontsize=6.5)
    ax.set_ylim(-0.6, len(rows) - 0.4)
    ax.invert_yaxis()
    ax.set_xlabel(f"after − before, in constancy action changes (1 = action limit; "
                  f"{100 * comparison.level:g} % interval)")
    if rows:
        ax.legend(fontsize=6, loc="best", frameon=False, title="constancy verdict",
                  title_fontsize=6)
    return fig


def _side_text(ids, dates, software) -> str:
    items = [f"{i} ({d[:10]})" if d else str(i) for i, d in
             zip(ids, list(dates) + [""] * (len(ids) - len(dates)))]
    soft = f"; software {', '.join(software)}" if software else ""
    return f"{len(ids)}: " + ", ".join(items) + soft


def comparison_page(comparison: Comparison, *, new_page: bool = True) -> list:
    """Flowables of the comparison: facts, the table per metric, the chart.

    Parameters
    ----------
    comparison : Comparison
        From :func:`qa.compare.compare_sessions` or :func:`qa.compare.compare_figures`.
    new_page : bool
        Start with a page break (default True).
    """
    st = styles()
    c = comparison
    out = [PageBreak()] if new_page else []
    out.append(Paragraph(pdf_text(f"Before and after — unit {c.unit_id}, phantom "
                                  f"{c.phantom}"), st["h2"]))
    methods = sorted({m.interval_method for m in c.metrics if m.interval is not None})
    facts = [("Side", "Acquisitions"),
             ("Before", _side_text(c.before_ids, c.before_dates, c.before_software)),
             ("After", _side_text(c.after_ids, c.after_dates, c.after_software)),
             ("Interval", "; ".join(methods) or "none computable"),
             ("Profile", c.profile or "(none given: no constancy verdicts)")]
    out.append(data_table(facts, (24, 150), st))
    out.append(Paragraph(pdf_text(
        "n: values before / after. Difference = mean after − mean before. Welch's t "
        "interval (B. L. Welch, Biometrika 1947; degrees of freedom after F. E. Satterthwaite, 1946) does not "
        "assume equal spread on both sides; a percentile bootstrap (Efron & Tibshirani, "
        "1993) is named where used. 'Beyond noise': the interval excludes 0. The "
        "constancy verdict compares the mean after with the mean before as baseline; "
        "where the constancy limit is relative, the difference is also given in per cent "
        "of the mean before. 'no limit': compared, but the profile sets no constancy "
        "limit to judge the change by (a grey ring; no pass)."),
        st["small"]))
    out.append(Spacer(1, 2 * mm))
    rows = [("Metric", "n", "Before mean ± sd", "After mean ± sd",
             "Difference [interval]", "Beyond noise", "Constancy limit", "", "Verdict")]
    for m in c.metrics:
        diff = _difference(m)
        noise = "—" if m.beyond_noise is None else ("yes" if m.beyond_noise else "no")
        unit = UNIT_TEXT.get(m.unit, f"({m.unit})")
        name = Paragraph(pdf_text(m.metric) + (f"<br/>{pdf_text(unit)}" if unit else ""),
                         st["cell"])
        rows.append((name, f"{len(m.before)} / {len(m.after)}",
                     _mean_sd(m.before, m.mean_before, m.sd_before),
                     _mean_sd(m.after, m.mean_after, m.sd_after), diff, noise,
                     m.limit_text or "—", verdict_mark(m.mark), m.verdict))
    out.append(data_table(rows, (33, 8, 20, 20, 30, 11, 24, 4.5, 23.5), st))
    for m in c.metrics:
        if m.note:
            out.append(Paragraph(pdf_text(f"{m.metric}: {m.note}"), st["small"]))
    if any(m.interval is not None and _action_step(m) for m in c.metrics):
        out.append(Spacer(1, 2 * mm))
        out.append(figure_image(comparison_figure(c)))
    out.append(Paragraph(pdf_text(f"Worst constancy verdict: {c.overall}."), st["body"]))
    return out


def render_comparison_pdf(comparison: Comparison, *, created: str) -> bytes:
    """The comparison page as a PDF of its own, dated ``created``."""
    c = comparison
    return standalone_pdf(
        comparison_page(c, new_page=False),
        title=f"Lacuna comparison {created} {c.unit_id}",
        subject=f"Before/after comparison of {c.unit_id} with phantom {c.phantom}: "
                f"{c.overall}",
        footer=f"Lacuna comparison · {c.unit_id} · {created}",
        heading=f"Lacuna comparison log · {c.unit_id} · {created}")
