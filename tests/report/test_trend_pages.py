"""Trend pages: flowables for the log, charts with distinct flag markers, a PDF of their own.

The PDFs are read back with pypdf (a reference reader), so what is checked is what a
reader of the file sees.
"""

from __future__ import annotations

import io
from datetime import date, timedelta

import pytest
from reportlab.graphics.shapes import Drawing
from reportlab.platypus import CondPageBreak, Paragraph, Table

from qa.history.db import History
from qa.history.records import MeasurementRecord, SessionRecord
from qa.history.trends import OUTSIDE_ACTION, OUTSIDE_WARNING, unit_trends
from qa.judge import judge_all, load_profile
from qa.measure.base import Measurement
from qa.report.trends import render_trend_pdf, trend_figure, trend_pages

pypdf = pytest.importorskip("pypdf")

PROFILE = """\
profile: pages-test
description: invented limits for the tests
limits:
  asf_fwhm:
    unit: mm
    constancy: {warning: 0.2, action: 0.5, as: fraction}
    source: invented for the tests
  bead_height_error:
    unit: mm
    acceptance: {warning: [-0.5, 0.5], action: [-1.0, 1.0]}
    source: invented for the tests
"""
#: asf_fwhm as in tests/history/test_trends.py: 14 is outside the warning line (13.2),
#: 17 outside the action line (16.5) and beyond 3 sigma (16.984); bead values in control.
ASF = [10.0, 12.0, 11.0, 13.0, 9.0, 12.0, 14.0, 17.0, 17.0]
BEAD = [0.1, -0.1, 0.0, 0.05, -0.05, 0.0, 0.1, -0.1, 0.0]
UNITS = {"asf_fwhm": "mm", "bead_height_error": "mm", "noise_sd": "value"}


@pytest.fixture
def setup(tmp_path):
    prof = tmp_path / "limits.yaml"
    prof.write_text(PROFILE)
    path = tmp_path / "history.sqlite"
    with History.open(path) as h:
        ids = []
        for k, (a, b) in enumerate(zip(ASF, BEAD)):
            values = {"asf_fwhm": a, "bead_height_error": b, "noise_sd": 2.0 + 0.01 * (k % 4)}
            ms = tuple(MeasurementRecord(n, v, UNITS[n], 0.1, "pass") for n, v in
                       values.items())
            ids.append(h.record(SessionRecord(
                "FEN-DBT-1", (date(2024, 1, 1) + timedelta(days=14 * k)).isoformat(),
                "2024-12-01T10:00", "tern", "pages-test", "0.1", "pass", ms)))
        h.set_baseline("FEN-DBT-1", "tern", session_ids=ids[:5], reason="acceptance test")
    return path, load_profile(prof)


def _text(pdf: bytes) -> tuple[str, list]:
    pages = pypdf.PdfReader(io.BytesIO(pdf)).pages
    return " ".join(" ".join(p.extract_text().split()) for p in pages), pages


def _charts(flow) -> list:
    """The charts of the trend flowables: drawings in the grid, two to a row."""
    grid = [f for f in flow if isinstance(f, Table) and f._ncols == 2
            and all(isinstance(c, (Drawing, str)) for row in f._cellvalues for c in row)]
    return [c for g in grid for row in g._cellvalues for c in row if isinstance(c, Drawing)]


def test_flowables_for_the_log(setup):
    path, profile = setup
    flow = trend_pages(path, "FEN-DBT-1", "tern", profile)
    assert isinstance(flow[0], CondPageBreak)
    assert isinstance(flow[1], Paragraph) and "Trends — unit FEN-DBT-1" in flow[1].text
    # flags per metric, flagged points, the grid of charts
    assert sum(isinstance(f, Table) for f in flow) == 3
    assert len(_charts(flow)) == 3                          # one chart per metric
    assert sum(isinstance(f, Drawing) for f in flow) == 1   # their shared key
    only = trend_pages(path, "FEN-DBT-1", None, profile, metrics=["asf_fwhm"], new_page=False)
    assert not isinstance(only[0], CondPageBreak)
    assert len(_charts(only)) == 1


def test_missing_history_gives_a_note_and_creates_nothing(tmp_path):
    path = tmp_path / "none.sqlite"
    flow = trend_pages(path, "FEN-DBT-1", "tern", None)
    assert not path.exists()
    assert "No earlier session of unit FEN-DBT-1 with phantom tern" in flow[-1].text


def test_chart_marks_flags_by_shape_and_label(setup):
    path, profile = setup
    with History.open(path) as h:
        t = unit_trends(h, "FEN-DBT-1", profile=profile).get("asf_fwhm")
    fig = trend_figure(t)
    ax = fig.axes[0]
    by_label = {ln.get_label(): ln for ln in ax.get_lines()}
    # one marker shape per kind of flag (matplotlib marker codes): cross, triangle, diamond
    marks = {k: by_label[f"flag: {k}"].get_marker() for k in
             (OUTSIDE_ACTION, OUTSIDE_WARNING, "control rule") if f"flag: {k}" in by_label}
    assert marks == {OUTSIDE_ACTION: "X", OUTSIDE_WARNING: "^"}
    # the two points at 17 are outside action, the one at 14 outside warning only
    assert list(by_label[f"flag: {OUTSIDE_ACTION}"].get_ydata()) == [17.0, 17.0]
    assert list(by_label[f"flag: {OUTSIDE_WARNING}"].get_ydata()) == [14.0]
    labels = sorted(a.get_text() for a in ax.texts)
    assert labels == ["A", "A", "W"]                   # the most severe code beside each
    styles = {ln.get_label(): ln.get_linestyle() for ln in ax.get_lines()}
    assert (styles["action limit (constancy)"], styles["warning limit (constancy)"],
            styles["control limits (3 sigma)"], styles["baseline"]) == ("--", ":", "-.", "-")
    # drawn lines sit at 11 (baseline), 13.2 / 16.5 (constancy) and 11 -+ 5.984043
    ys = sorted({round(float(v), 4) for ln in ax.get_lines()
                 if ln.get_linestyle() != "None" and ln.get_label() != "EWMA"
                 for v in ln.get_ydata()})
    assert ys == [5.016, 11.0, 13.2, 16.5, 16.984]


def test_standalone_pdf_with_the_current_session(setup):
    path, profile = setup
    from qa.locate.layout import Layout
    from qa.phantom.model import Phantom
    from qa.session import SessionResult

    phantom = Phantom("tern", "test", 20.0, ())
    judged = judge_all([Measurement("asf_fwhm", 11.5, "mm", 0.1)], profile)
    current = SessionResult("FEN-DBT-1", "2024-12-02", "2024-12-02T10:00:00", phantom,
                            profile, (), judged, "pass", Layout(phantom, {}))
    with History.open(path) as h:
        trends = unit_trends(h, "FEN-DBT-1", profile=profile, current=current)
    assert trends.get("asf_fwhm").latest.current
    text, pages = _text(render_trend_pdf(trends, created="2024-12-03"))
    for words in ("Lacuna trend log · FEN-DBT-1 · 2024-12-03", "phantom tern",
                  "limits from profile pages-test", "Baseline 1", "reason: acceptance test",
                  "Flagged points (up to 12: headline figures first", "qualified medical physicist", "Sign-off"):
        assert words in text, words
    assert len(pages) <= 3, len(pages)   # tables and three small charts share pages
    # the trend pages also go into the session log as extra pages
    from qa.report.pdf import render_pdf

    flow = trend_pages(path, "FEN-DBT-1", "tern", profile, current=current)
    log_text, _ = _text(render_pdf(current, None, extra_pages=flow))
    assert "Trends — unit FEN-DBT-1, phantom tern" in log_text
