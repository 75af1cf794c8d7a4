"""The first page of the session log: the header of facts and the summary of every figure.

The summary table has one row per metric: name, value ± standard uncertainty, unit,
verdict (a shape and a word), baseline, change from the baseline (in per cent when the
metric's constancy limit is relative) and the limits. Figures no level was applied to are
reported as ``no limit`` (or ``not judged``) with a grey ring, and are not counted as
passes.
"""

from __future__ import annotations

from reportlab.lib import colors
from reportlab.lib.units import mm
from reportlab.platypus import Paragraph, Spacer, Table, TableStyle

from ..session import SessionResult
from .numbers import (UNIT_NOTES, change_text, clock, date_time, decimals_for, fixed,
                      format_value, relative_limit, unit_cell)
from .style import ACCENT, RULE, SHADE, pdf_text, verdict_mark

CAUTION = ("These results support, and do not replace, the judgement of a qualified medical "
           "physicist. Limits and test frequencies must follow local regulations and national "
           "protocols. Lacuna checks equipment; it is not for diagnosis.")

#: Column titles and widths (mm) of the summary table; 174 mm in all.
COLUMNS = (("Metric", 32.5), ("Value ± u", 30), ("Unit", 14.5), ("", 4.5), ("Verdict", 15.5),
           ("Baseline", 16.5), ("Change", 17.5), ("Limits", 43))
_PAD = 2.5


def acquired_text(meta, date: str) -> str:
    """Date and time of the acquisition, as far as the metadata tells."""
    day = str(meta.get("acquired") or date)[:10]
    t = clock(meta.get("acquisition_time")) or clock(meta.get("acquisition_datetime"))
    return f"{day} {t}" if t else f"{day} (time of day not recorded)"


def acquisition_facts(meta) -> str:
    """Views, arc, motion and source-to-image distance, where the metadata has them."""
    bits = []
    views = meta.get("views", meta.get("number_of_source_images"))
    arc = meta.get("half_arc_deg")
    if views is not None and arc is not None:
        bits.append(f"{views} views over ±{float(arc):g}° ({2 * float(arc):g}° arc)")
    elif views is not None:
        bits.append(f"{views} views")
    elif arc is not None:
        bits.append(f"arc ±{float(arc):g}°")
    if meta.get("motion"):
        bits.append(f"{meta['motion']} source motion")
    if meta.get("source_to_image_mm") is not None:
        bits.append(f"source to image {float(meta['source_to_image_mm']):g} mm")
    return " · ".join(bits)


def _facts(result: SessionResult) -> list[tuple[str, str, bool]]:
    """(label, text, wide) rows of the header."""
    m = result.meta
    unit_bits = [result.unit_id] + [str(m[k]) for k in ("manufacturer", "model") if k in m]
    if "serial" in m:
        unit_bits.append(f"serial {m['serial']}")
    rows = [("Unit", " · ".join(unit_bits), True)]
    for key, label in (("site", "Site"), ("institution", "Institution")):
        if key in m:
            rows.append((label, str(m[key]), True))
    for key, label in (("station", "Station"), ("software", "Software version")):
        if key in m:
            rows.append((label, str(m[key]), False))
    rows += [("Acquired", acquired_text(m, result.date), False),
             ("Analysed", date_time(result.analysed), False)]
    acq = acquisition_facts(m)
    if acq:
        rows.append(("Acquisition", acq, True))
    recon = " · ".join(f"{label} {m[k]}" for k, label in
                       (("reconstruction", "method"), ("geometry", "geometry")) if k in m)
    if recon:
        rows.append(("Reconstruction", recon, True))
    rows += [("Phantom", f"{result.phantom.name} — {result.phantom.description}", True),
             ("Limit profile", f"{result.profile.name} — {result.profile.description}", True),
             ("Kind of check", result.kind, False),
             ("Lacuna version", result.tool_version, False)]
    if "source_file" in m:
        rows.append(("Volume", str(m["source_file"]) + (
            f" (sha256 {m['checksum']})" if "checksum" in m else ""), True))
    return rows


def facts_table(rows, st) -> Table:
    """Label/text pairs, two short ones side by side, long ones across the page."""
    data, spans, pending = [], [], []

    def cell(text, style):
        return Paragraph(pdf_text(text), st[style])

    def flush():
        if pending:
            (k, v), rest = pending[0], pending[1:]
            row = [cell(k, "small"), cell(v, "cell")]
            row += [cell(rest[0][0], "small"), cell(rest[0][1], "cell")] if rest else ["", ""]
            data.append(row)
            pending.clear()

    for label, text, wide in rows:
        if wide:
            flush()
            spans.append(len(data))
            data.append([cell(label, "small"), cell(text, "cell"), "", ""])
        else:
            pending.append((label, text))
            if len(pending) == 2:
                flush()
    flush()
    t = Table(data, colWidths=[26 * mm, 61 * mm, 26 * mm, 61 * mm])
    style = [("VALIGN", (0, 0), (-1, -1), "TOP"),
             ("LINEBELOW", (0, 0), (-1, -1), 0.25, RULE),
             ("TOPPADDING", (0, 0), (-1, -1), 1.5), ("BOTTOMPADDING", (0, 0), (-1, -1), 1.5),
             ("LEFTPADDING", (0, 0), (-1, -1), _PAD), ("RIGHTPADDING", (0, 0), (-1, -1), _PAD)]
    style += [("SPAN", (1, r), (3, r)) for r in spans]
    t.setStyle(TableStyle(style))
    return t


def header(result: SessionResult, st) -> list:
    return [Paragraph("Lacuna limited-angle QA log", st["title"]),
            Paragraph(pdf_text(f"{result.unit_id} · {result.date} · profile "
                               f"{result.profile.name}"), st["body"]), Spacer(1, 3 * mm),
            facts_table(_facts(result), st), Paragraph(pdf_text(CAUTION), st["caution"])]


def counts_text(judged) -> str:
    """How many figures got each verdict; figures without a verdict counted apart."""
    shown = [j.shown for j in judged]
    parts = [f"{shown.count(v)} {v}" for v in ("pass", "warning", "fail", "not measured")]
    free = sum(v in ("no limit", "not judged") for v in shown)
    if free:
        parts.append(f"{free} reported without a verdict")
    return ", ".join(parts)


def row_cells(j) -> tuple[str, ...]:
    """The printed text of one metric's row: value ± u, unit, verdict, baseline, change, limits."""
    m = j.measurement
    decimals = decimals_for(m.value if m.value is not None else j.baseline, m.uncertainty)
    base = "—" if j.baseline is None else fixed(j.baseline, decimals)
    change = change_text(m.value, j.baseline, decimals, relative=relative_limit(j.limit))
    limits = j.limit_text if j.limit is not None and j.limit_text else "—"
    return (format_value(m.value, m.uncertainty), unit_cell(m.unit), j.shown, base, change,
            limits)


def summary(result: SessionResult, st) -> list:
    verdict = result.overall
    head = Table([[verdict_mark(verdict, 10),
                   Paragraph(f"<b>Overall: {verdict.upper()}</b> — "
                             f"{pdf_text(counts_text(result.judged))}", st["body"])]],
                 colWidths=[8 * mm, 166 * mm])
    head.setStyle(TableStyle([("VALIGN", (0, 0), (-1, -1), "MIDDLE"),
                              ("BACKGROUND", (0, 0), (-1, -1), SHADE)]))
    rows = [[Paragraph(f"<b>{h}</b>", st["small"]) for h, _ in COLUMNS]]
    for j in result.judged:
        value, unit, word, base, change, limits = row_cells(j)
        rows.append([Paragraph(pdf_text(j.name), st["num"]), Paragraph(value, st["num"]),
                     Paragraph(pdf_text(unit), st["cell"]), verdict_mark(j.shown),
                     Paragraph(word, st["cell"]), Paragraph(base, st["num"]),
                     Paragraph(pdf_text(change), st["num"]),
                     Paragraph(pdf_text(limits), st["small"])])
    t = Table(rows, colWidths=[w * mm for _, w in COLUMNS], repeatRows=1)
    t.setStyle(TableStyle([("VALIGN", (0, 0), (-1, -1), "TOP"),
                           ("LEFTPADDING", (0, 0), (-1, -1), _PAD),
                           ("RIGHTPADDING", (0, 0), (-1, -1), _PAD),
                           ("TOPPADDING", (0, 0), (-1, -1), 2),
                           ("BOTTOMPADDING", (0, 0), (-1, -1), 2),
                           ("LEFTPADDING", (3, 0), (3, -1), 0.5),
                           ("RIGHTPADDING", (3, 0), (3, -1), 0),
                           ("TOPPADDING", (3, 1), (3, -1), 3),
                           ("LINEBELOW", (0, 0), (-1, 0), 0.8, ACCENT),
                           ("LINEBELOW", (0, 1), (-1, -1), 0.25, RULE),
                           ("ROWBACKGROUNDS", (0, 1), (-1, -1), [colors.white, SHADE])]))
    return [Paragraph("Summary", st["h2"]), head, Spacer(1, 2 * mm), t, Spacer(1, 1 * mm)] \
        + _notes(result, st)


def _notes(result: SessionResult, st) -> list:
    judged = result.judged
    lines = ["u: one standard uncertainty (k = 1). Change: from the baseline, in per cent "
             "where the constancy limit is relative, else in the metric's unit. Verdict "
             "'no limit': the profile sets no limit, so the figure is reported, not judged "
             "(a grey ring, not counted as a pass)."]
    units = {j.measurement.unit for j in judged}
    lines += [f"{UNIT_NOTES[u]}." for u in ("1", "value") if u in units]
    lines += [f"{j.name}: {j.measurement.note}" for j in judged if j.verdict == "not measured"]
    if any(j.limit is not None and j.limit.constancy is not None and j.baseline is None
           for j in judged):
        lines.append("No baseline is stored for this unit and phantom: constancy limits were "
                     "not judged.")
    return [Paragraph(pdf_text(t), st["small"]) for t in lines]
