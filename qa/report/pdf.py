"""The dated PDF log of a session (reportlab): header, summary, plots, cautions, sign-off.

The file is named ``<YYYY-MM-DD>_<unit>_<profile>.pdf`` (``_2``, ``_3``... for later logs
of the same unit, day and profile; an existing log is never overwritten) and written
atomically. Layout and wording are Lacuna's own. The header and the summary table are
built in :mod:`qa.report.summary`, numbers printed by :mod:`qa.report.numbers`.
"""

from __future__ import annotations

import io
import os
import tempfile
from pathlib import Path

from reportlab.lib.pagesizes import A4
from reportlab.lib.units import mm
from reportlab.pdfgen import canvas as rl_canvas
from reportlab.platypus import (CondPageBreak, KeepTogether, Paragraph, SimpleDocTemplate,
                                Table, TableStyle)

from ..measure.base import families as registered_families
from ..session import SessionResult
from .figures import figure_drawing
from .numbers import dedupe_words, format_value, with_unit
from .style import FONT, INK, RULE, pdf_text, styles
from .summary import CAUTION, header, summary

__all__ = ["CAUTION", "format_value", "log_name", "render_pdf", "write_pdf",
           "closing_flowables", "NumberedCanvas"]


def log_name(result: SessionResult, n: int = 1) -> str:
    """The log's file name: ``<date>_<unit>_<profile>.pdf``, then ``..._2.pdf``, ``_3``...
    for later logs of the same unit, day and profile."""
    suffix = "" if n == 1 else f"_{n}"
    return f"{result.date}_{result.unit_id}_{result.profile.name}{suffix}.pdf"


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


def _sections(result: SessionResult, volume, st) -> list:
    from .overview import overview_figure

    out = [CondPageBreak(120 * mm), Paragraph("Where the test objects were found", st["h2"])]
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
        note = pose.note.strip()
        text += f" {note[:1].upper()}{note[1:]}" + ("" if note.endswith(".") else ".")
    out.append(Paragraph(pdf_text(text), st["body"]))
    missing = [p for p in result.layout.placed.values() if not p.found]
    for p in missing:
        out.append(Paragraph(pdf_text(p.note or f"{p.id} not found"), st["small"]))
    if volume is not None:
        out.append(figure_drawing(overview_figure(volume, result.families, result.layout),
                                  174))
    by_name = {f.name: f for f in registered_families()}
    for fam in result.families:
        family = by_name.get(fam.family)
        title = family.title if family else fam.family
        block = [Paragraph(pdf_text(title), st["h2"])]
        for m in fam.measurements:
            block.append(Paragraph(pdf_text(_figure_line(m)), st["small"]))
        fig = family.plot(fam) if family and family.plot else None
        if fig is not None:
            block.append(figure_drawing(fig, 150))
        out.append(KeepTogether(block))
    return out


def _figure_line(m) -> str:
    """One figure of a family section: ``name = value ± u unit — note`` (spatial
    frequencies in lp/mm, as everywhere in the log)."""
    if m.value is None:
        text = f"{m.name}: " + (m.note or "not measured")
    else:
        text = f"{m.name} = {with_unit(format_value(m.value, m.uncertainty), m.unit)}" \
            + (f" — {m.note}" if m.note else "")
    return dedupe_words(text).replace("cycles/mm", "lp/mm")


def closing_flowables(st) -> list:
    sign = Table([["Checked by (name)", ""], ["Signature", ""], ["Date", ""],
                  ["Remarks", ""]], colWidths=[40 * mm, 134 * mm], rowHeights=[9 * mm] * 3 + [22 * mm])
    sign.setStyle(TableStyle([("FONT", (0, 0), (-1, -1), FONT, 8),
                              ("GRID", (0, 0), (-1, -1), 0.4, RULE),
                              ("VALIGN", (0, 0), (-1, -1), "TOP")]))
    return [KeepTogether([
        Paragraph("Cautions", st["h2"]), Paragraph(pdf_text(CAUTION), st["body"]),
        Paragraph("Patient identifiers found in image headers are never copied into this "
                  "log, the JSON results or the history database.", st["body"]),
        Paragraph("Sign-off", st["h2"]), sign])]


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
    story = header(result, st) + summary(result, st) + _sections(result, volume, st)
    story += list(extra_pages) + closing_flowables(st)
    canvas_class = type("LogCanvas", (NumberedCanvas,),
                        {"footer_left": f"Lacuna QA log · {result.unit_id} · {result.date}"})
    doc.build(story, canvasmaker=canvas_class)
    return buf.getvalue()


def write_pdf(result: SessionResult, out_dir, volume=None, *, extra_pages=(),
              pdf: bytes | None = None) -> Path:
    """Write the log into ``out_dir`` under the first free name of :func:`log_name`.

    The bytes go to a temporary file beside the target, which is then hard-linked to the
    target name: the link fails if the name is taken (by an earlier log, or by another
    process a moment before), so an existing log is never overwritten and the next
    suffix is tried. ``pdf`` are the bytes when already rendered.
    """
    data = render_pdf(result, volume, extra_pages=extra_pages) if pdf is None else pdf
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{log_name(result)}.", suffix=".part", dir=out_dir)
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
        n = 1
        while True:
            path = out_dir / log_name(result, n)
            try:
                _place_new(tmp, path)
                return path
            except FileExistsError:
                n += 1
    finally:
        Path(tmp).unlink(missing_ok=True)


def _place_new(tmp: str, path: Path) -> None:
    """Give the written file ``tmp`` the name ``path``; FileExistsError if it is taken."""
    try:
        os.link(tmp, path)
    except FileExistsError:
        raise
    except OSError:             # a file system without hard links: reserve, then replace
        os.close(os.open(path, os.O_CREAT | os.O_EXCL | os.O_WRONLY))
        os.replace(tmp, path)
