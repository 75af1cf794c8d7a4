"""Fonts, colours, paragraph styles and verdict marks of the PDF log."""

from __future__ import annotations

import os

import reportlab
from reportlab.graphics.shapes import Drawing, Line, Polygon, Circle, Rect
from reportlab.lib import colors
from reportlab.lib.styles import ParagraphStyle
from reportlab.pdfbase import pdfmetrics
from reportlab.pdfbase.ttfonts import TTFont

_FONT_DIR = os.path.join(os.path.dirname(reportlab.__file__), "fonts")
FONT, FONT_BOLD, FONT_ITALIC = "LacunaSans", "LacunaSans-Bold", "LacunaSans-Italic"
_registered = False


def register_fonts() -> None:
    """Embed Bitstream Vera (shipped with reportlab), so text extracts as written."""
    global _registered
    if _registered:
        return
    pdfmetrics.registerFont(TTFont(FONT, os.path.join(_FONT_DIR, "Vera.ttf")))
    pdfmetrics.registerFont(TTFont(FONT_BOLD, os.path.join(_FONT_DIR, "VeraBd.ttf")))
    pdfmetrics.registerFont(TTFont(FONT_ITALIC, os.path.join(_FONT_DIR, "VeraIt.ttf")))
    pdfmetrics.registerFontFamily(FONT, normal=FONT, bold=FONT_BOLD, italic=FONT_ITALIC,
                                  boldItalic=FONT_BOLD)
    _registered = True


#: Characters the embedded font lacks, spelt out.
_SPELL = {"Δ": "d", "α": "alpha", "σ": "sigma", "′": "'", "→": "->", "λ": "lambda"}


def pdf_text(text: str) -> str:
    """``text`` made safe for the log: markup characters escaped, missing glyphs spelt."""
    for k, v in _SPELL.items():
        text = text.replace(k, v)
    return text.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")


INK = colors.HexColor("#1d2731")
ACCENT = colors.HexColor("#1b4965")
RULE = colors.HexColor("#9aa5b1")
SHADE = colors.HexColor("#eef1f4")
VERDICT_COLOURS = {"pass": colors.HexColor("#588157"), "warning": colors.HexColor("#b7791f"),
                   "fail": colors.HexColor("#b23a2a"), "not measured": colors.HexColor("#5c677d")}
#: The neutral grey of figures reported without a verdict ("no limit", "not judged").
NEUTRAL = colors.HexColor("#8d99ae")


def styles() -> dict[str, ParagraphStyle]:
    register_fonts()
    base = ParagraphStyle("body", fontName=FONT, fontSize=8.5, leading=11, textColor=INK)
    return {
        "body": base,
        "small": ParagraphStyle("small", parent=base, fontSize=7, leading=9),
        "cell": ParagraphStyle("cell", parent=base, fontSize=7.2, leading=8.8),
        # numbers and names: broken at spaces only, never inside a number
        "num": ParagraphStyle("num", parent=base, fontSize=7.2, leading=8.8,
                              splitLongWords=0),
        "title": ParagraphStyle("title", parent=base, fontName=FONT_BOLD, fontSize=15,
                                leading=18, textColor=ACCENT),
        "h2": ParagraphStyle("h2", parent=base, fontName=FONT_BOLD, fontSize=10.5, leading=13,
                             spaceBefore=8, spaceAfter=4, textColor=ACCENT, keepWithNext=1),
        "h3": ParagraphStyle("h3", parent=base, fontName=FONT_BOLD, fontSize=8.5, leading=11,
                             spaceBefore=4, spaceAfter=2, keepWithNext=1),
        "caution": ParagraphStyle("caution", parent=base, fontSize=8, leading=10.5,
                                  borderColor=RULE, borderWidth=0.6, borderPadding=5,
                                  backColor=SHADE, spaceBefore=4, spaceAfter=8),
    }


def verdict_mark(verdict: str, size: float = 7.0) -> Drawing:
    """A small shape for each verdict, so colour is never the only cue: a disc (pass),
    a triangle (warning), a cross (fail), a short bar (not measured), a grey ring (a
    figure reported without a verdict: "no limit", "not judged")."""
    d = Drawing(size, size)
    c = VERDICT_COLOURS.get(verdict, NEUTRAL)
    s = size
    if verdict not in VERDICT_COLOURS:
        d.add(Circle(s / 2, s / 2, s * 0.32, fillColor=None, strokeColor=c, strokeWidth=1.1))
    elif verdict == "pass":
        d.add(Circle(s / 2, s / 2, s * 0.38, fillColor=c, strokeColor=c))
    elif verdict == "warning":
        d.add(Polygon([s * 0.1, s * 0.12, s * 0.9, s * 0.12, s * 0.5, s * 0.92],
                      fillColor=c, strokeColor=c))
    elif verdict == "fail":
        d.add(Line(s * 0.15, s * 0.15, s * 0.85, s * 0.85, strokeColor=c, strokeWidth=1.6))
        d.add(Line(s * 0.15, s * 0.85, s * 0.85, s * 0.15, strokeColor=c, strokeWidth=1.6))
    else:
        d.add(Rect(s * 0.15, s * 0.42, s * 0.7, s * 0.16, fillColor=c, strokeColor=c))
    return d
