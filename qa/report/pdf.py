"""The dated PDF log of a session (reportlab): header, summary, plots, cautions, sign-off.

The file is named ``<YYYY-MM-DD>_<unit>_<profile>.pdf`` and written atomically. Layout and
wording are Lacuna's own.
"""

from __future__ import annotations

import io
import math
from pathlib import Path

from reportlab.lib import colors
from reportlab.lib.pagesizes import A4
from reportlab.lib.units import mm
from reportlab.pdfgen import canvas as rl_canvas
from reportlab.platypus import (Image, KeepTogether, PageBreak, Paragraph, SimpleDocTemplate,
                                Spacer, Table, TableStyle)

from ..fileio import write_bytes_atomic
from ..measure.base import families as registered_families
from ..session import SessionResult
from .style import ACCENT, FONT, FONT_BOLD, INK, RULE, SHADE, pdf_text, styles, verdict_mark

CAUTION = ("These results support, and do not replace, the judgement of a qualified medical "
           "physicist. Limits and test frequencies must follow local regulations and national "
           "protocols. Lacuna checks equipment; it is not for diagnosis.")


def log_name(result: SessionResult) -> str:
    return f"{result.date}_{result.unit_id}_{result.profile.name}.pdf"


def format_value(value, uncertainty=None) -> str:
    """A value and its uncertainty rounded alike.

    With an uncertainty, both are given to the decimal place of the uncertainty's second
    significant digit (the usual way of quoting a result with its standard uncertainty);
    without one, the value has three significant digits.

    Examples
    --------
    >>> format_value(3.14159, 0.0123)
    '3.142 ± 0.012'
    >>> format_value(0.000123456, 0.0000045)
    '0.0001235 ± 0.0000045'
    >>> format_value(1234.5)
    '1234'
    """
    if value is None:
        return "—"
    if uncertainty is not None and uncertainty > 0:
        decimals = 1 - math.floor(math.log10(uncertainty))
    elif value != 0:
        decimals = 2 - math.floor(math.log10(abs(value)))
    else:
        decimals = 3
    decimals = int(min(10, max(0, decimals)))
    text = f"{value:.{decimals}f}"
    if uncertainty is not None:
        text += f" ± {uncertainty:.{decimals}f}"
    return text


class NumberedCanvas(rl_canvas.Canvas):
    """Draws 'page N of M' and the running footer once the page count is known."""

    footer_left = ""

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self._pages = []

    def showPage(self):
        self._pages.append(dict(self.__dict__))
        self._startPage()

    def save(self):
        total = len(self._pages)
        for state in self._pages:
            self.__dict__.update(state)
            self.setFont(FONT, 7)
            self.setFillColor(INK)
            self.drawString(18 * mm, 10 * mm, self.footer_left)
            self.drawRightString(A4[0] - 18 * mm, 10 * mm, f"page {self._pageNumber} of {total}")
            self.setStrokeColor(RULE)
            self.line(18 * mm, 13 * mm, A4[0] - 18 * mm, 13 * mm)
            super().showPage()
        super().save()


def _figure_image(fig, width_mm: float) -> Image:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=130)
    w_in, h_in = fig.get_size_inches()
    buf.seek(0)
    width = width_mm * mm
    return Image(buf, width=width, height=width * h_in / w_in)


def _facts_table(rows, st) -> Table:
    data = [[Paragraph(pdf_text(k), st["small"]), Paragraph(pdf_text(str(v)), st["cell"])]
            for k, v in rows]
    t = Table(data, colWidths=[38 * mm, 136 * mm])
    t.setStyle(TableStyle([("VALIGN", (0, 0), (-1, -1), "TOP"),
                           ("LINEBELOW", (0, 0), (-1, -1), 0.25, RULE),
                           ("TOPPADDING", (0, 0), (-1, -1), 1.5),
                           ("BOTTOMPADDING", (0, 0), (-1, -1), 1.5)]))
    return t


def _header(result: SessionResult, st) -> list:
    m = result.meta
    unit_bits = [result.unit_id] + [str(m[k]) for k in ("manufacturer", "model") if k in m]
    if "serial" in m:
        unit_bits.append(f"serial {m['serial']}")
    rows = [("Unit", " · ".join(unit_bits))]
    for key, label in (("site", "Site"), ("institution", "Institution"), ("station", "Station"),
                       ("software", "Software version")):
        if key in m:
            rows.append((label, m[key]))
    rows += [("Acquired", m.get("acquired", result.date)), ("Analysed", result.analysed),
             ("Phantom", f"{result.phantom.name} — {result.phantom.description}"),
             ("Limit profile", f"{result.profile.name} — {result.profile.description}"),
             ("Kind of check", result.kind), ("Lacuna version", result.tool_version)]
    if "source_file" in m:
        rows.append(("Volume", m["source_file"] + (f" (sha256 {m['checksum']})" if "checksum" in m else "")))
    for key, label in (("reconstruction", "Reconstruction"), ("geometry", "Geometry")):
        if key in m:
            rows.append((label, m[key]))
    return [Paragraph("Lacuna limited-angle QA log", st["title"]),
            Paragraph(pdf_text(f"{result.unit_id} · {result.date} · profile {result.profile.name}"),
                      st["body"]), Spacer(1, 3 * mm), _facts_table(rows, st),
            Paragraph(pdf_text(CAUTION), st["caution"])]


def _summary(result: SessionResult, st) -> list:
    verdict = result.overall
    head = Table([[verdict_mark(verdict, 10),
                   Paragraph(f"<b>Overall: {verdict.upper()}</b> — "
                             f"{sum(j.verdict == 'pass' for j in result.judged)} pass, "
                             f"{sum(j.verdict == 'warning' for j in result.judged)} warning, "
                             f"{sum(j.verdict == 'fail' for j in result.judged)} fail, "
                             f"{sum(j.verdict == 'not measured' for j in result.judged)} not measured",
                             st["body"])]], colWidths=[8 * mm, 166 * mm])
    head.setStyle(TableStyle([("VALIGN", (0, 0), (-1, -1), "MIDDLE"),
                              ("BACKGROUND", (0, 0), (-1, -1), SHADE)]))
    rows = [[Paragraph(f"<b>{h}</b>", st["small"]) for h in
             ("Metric", "Value ± u", "Unit", "Limit", "Baseline (change)", "", "Verdict")]]
    for j in result.judged:
        m = j.measurement
        base = "—" if j.baseline is None else format_value(j.baseline, None)
        if j.change is not None:
            base += f" ({j.change:+.3g})"
        rows.append([Paragraph(pdf_text(m.name), st["cell"]),
                     Paragraph(format_value(m.value, m.uncertainty), st["cell"]),
                     Paragraph(pdf_text(m.unit), st["cell"]),
                     Paragraph(pdf_text(j.limit_text or "—"), st["cell"]),
                     Paragraph(pdf_text(base), st["cell"]), verdict_mark(j.verdict),
                     Paragraph(j.verdict, st["cell"])])
    t = Table(rows, colWidths=[38 * mm, 35 * mm, 12 * mm, 45 * mm, 22 * mm, 5 * mm, 17 * mm],
              repeatRows=1)
    t.setStyle(TableStyle([("VALIGN", (0, 0), (-1, -1), "MIDDLE"),
                           ("LINEBELOW", (0, 0), (-1, 0), 0.8, ACCENT),
                           ("LINEBELOW", (0, 1), (-1, -1), 0.25, RULE),
                           ("ROWBACKGROUNDS", (0, 1), (-1, -1), [colors.white, SHADE])]))
    notes = [Paragraph(pdf_text(f"{j.name}: {j.measurement.note}"), st["small"])
             for j in result.judged if j.verdict == "not measured"]
    if any(j.limit is not None and j.limit.constancy is not None and j.baseline is None
           for j in result.judged):
        notes.append(Paragraph("No baseline is stored for this unit and phantom: constancy "
                               "limits were not judged.", st["small"]))
    unlimited = [j.name for j in result.judged if j.limit is None]
    if unlimited:
        notes.append(Paragraph(pdf_text("Reported without a limit in this profile: "
                                        + ", ".join(unlimited) + "."), st["small"]))
    return [Paragraph("Summary", st["h2"]), head, Spacer(1, 2 * mm), t, Spacer(1, 1 * mm)] + notes


def _sections(result: SessionResult, volume, st) -> list:
    from .overview import overview_figure

    out = [PageBreak(), Paragraph("Where the test objects were found", st["h2"])]
    pose = result.layout.pose
    if pose.fitted_from:
        text = (f"Pose fitted from {', '.join(pose.fitted_from)}: shift "
                f"({pose.shift_xy_mm[0]:.2f}, {pose.shift_xy_mm[1]:.2f}) mm in-plane, "
                f"{pose.shift_z_mm:.2f} mm in height, rotation {pose.rotation_deg:.2f}°, "
                f"{'mirrored' if pose.mirrored else 'not mirrored'}; residual "
                f"{pose.residual_mm:.2f} mm.")
    else:
        text = "Pose not fitted: objects placed at their nominal positions."
    if pose.note:
        text += f" {pose.note}"
    out.append(Paragraph(pdf_text(text), st["body"]))
    missing = [p for p in result.layout.placed.values() if not p.found]
    for p in missing:
        out.append(Paragraph(pdf_text(p.note or f"{p.id} not found"), st["small"]))
    if volume is not None:
        out.append(_figure_image(overview_figure(volume, result.families, result.layout), 150))
    by_name = {f.name: f for f in registered_families()}
    for fam in result.families:
        family = by_name.get(fam.family)
        title = family.title if family else fam.family
        block = [Paragraph(pdf_text(title), st["h2"])]
        for m in fam.measurements:
            block.append(Paragraph(pdf_text(
                f"{m.name} = {format_value(m.value, m.uncertainty)} {m.unit}"
                + (f" — {m.note}" if m.note else "")), st["small"]))
        fig = family.plot(fam) if family and family.plot else None
        if fig is not None:
            block.append(_figure_image(fig, 160))
        out.append(KeepTogether(block))
    return out


def closing_flowables(st) -> list:
    sign = Table([["Checked by (name)", ""], ["Signature", ""], ["Date", ""],
                  ["Remarks", ""]], colWidths=[40 * mm, 134 * mm], rowHeights=[9 * mm] * 3 + [22 * mm])
    sign.setStyle(TableStyle([("FONT", (0, 0), (-1, -1), FONT, 8),
                              ("GRID", (0, 0), (-1, -1), 0.4, RULE),
                              ("VALIGN", (0, 0), (-1, -1), "TOP")]))
    return [Paragraph("Cautions", st["h2"]), Paragraph(pdf_text(CAUTION), st["body"]),
            Paragraph("Patient identifiers found in image headers are never copied into this "
                      "log, the JSON results or the history database.", st["body"]),
            Paragraph("Sign-off", st["h2"]), sign]


def render_pdf(result: SessionResult, volume=None, *, extra_pages=()) -> bytes:
    """The log as PDF bytes. ``extra_pages`` are flowables (trend or comparison pages)."""
    st = styles()
    buf = io.BytesIO()
    doc = SimpleDocTemplate(buf, pagesize=A4, leftMargin=18 * mm, rightMargin=18 * mm,
                            topMargin=15 * mm, bottomMargin=18 * mm,
                            title=f"Lacuna QA log {result.date} {result.unit_id}",
                            subject=f"{result.profile.name} check of {result.unit_id} with "
                                    f"phantom {result.phantom.name}: {result.overall}",
                            creator=f"Lacuna {result.tool_version}", author="Lacuna")
    story = _header(result, st) + _summary(result, st) + _sections(result, volume, st)
    story += list(extra_pages) + closing_flowables(st)
    canvas_class = type("LogCanvas", (NumberedCanvas,),
                        {"footer_left": f"Lacuna QA log · {result.unit_id} · {result.date}"})
    doc.build(story, canvasmaker=canvas_class)
    return buf.getvalue()


def write_pdf(result: SessionResult, out_dir, volume=None, *, extra_pages=()) -> Path:
    path = Path(out_dir) / log_name(result)
    write_bytes_atomic(path, render_pdf(result, volume, extra_pages=extra_pages))
    return path
