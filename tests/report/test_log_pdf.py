"""The session log as a file: names that never overwrite, trend charts and flagged points
chosen headline first, the cautions kept with their heading, figures drawn as vectors."""

from __future__ import annotations

import io
import json
from datetime import date, timedelta

import pytest

from qa.history.db import History
from qa.history.records import MeasurementRecord, SessionRecord
from qa.history.trends import unit_trends
from qa.judge import judge, load_profile
from qa.locate.layout import Layout
from qa.measure.base import Measurement
from qa.phantom.model import Phantom
from qa.session import SessionResult

pypdf = pytest.importorskip("pypdf")

PROFILE = """\
profile: log-test
description: invented limits for the tests
limits:
  mtf50_x:
    unit: lp/mm
    acceptance: {warning: 1.8, action: 1.6}
    source: invented for the tests
  noise_sd:
    unit: value
    constancy: {warning: 0.2, action: 0.5, as: fraction}
    source: invented for the tests
"""


@pytest.fixture
def profile(tmp_path):
    path = tmp_path / "limits.yaml"
    path.write_text(PROFILE)
    return load_profile(path)


def _result(profile, figures=(("mtf50_x", 2.0, "lp/mm", 0.01),)) -> SessionResult:
    phantom = Phantom("tern", "test phantom", 20.0, ())
    judged = tuple(judge(Measurement(*f), profile.limit_for(f[0])) for f in figures)
    return SessionResult("FEN-DBT-1", "2024-12-02", "2024-12-02T10:00:00", phantom, profile,
                         (), judged, "pass", Layout(phantom, {}))


def test_later_logs_of_a_day_get_a_suffix_and_none_is_overwritten(tmp_path, profile):
    from qa.report.pdf import log_name, write_pdf

    result = _result(profile)
    first = write_pdf(result, tmp_path, pdf=b"%PDF first")
    assert first.name == "2024-12-02_FEN-DBT-1_log-test.pdf" == log_name(result)
    second = write_pdf(result, tmp_path, pdf=b"%PDF second")
    third = write_pdf(result, tmp_path, pdf=b"%PDF third")
    assert (second.name, third.name) == ("2024-12-02_FEN-DBT-1_log-test_2.pdf",
                                         "2024-12-02_FEN-DBT-1_log-test_3.pdf")
    assert [p.read_bytes() for p in (first, second, third)] == \
        [b"%PDF first", b"%PDF second", b"%PDF third"]
    assert sorted(p.name for p in tmp_path.iterdir()) == \
        sorted(["limits.yaml", first.name, second.name, third.name])  # no temporary left


def test_publish_names_the_suffixed_log_in_the_json(tmp_path, profile):
    from qa.publish import publish

    result = _result(profile)
    one = publish(result, None, out_dir=tmp_path / "out", json_path=tmp_path / "a.json")
    two = publish(result, None, out_dir=tmp_path / "out", json_path=tmp_path / "b.json")
    assert one.report != two.report and two.report.name.endswith("_log-test_2.pdf")
    assert json.loads((tmp_path / "b.json").read_text())["report"] == str(two.report)
    assert pypdf.PdfReader(one.report).pages and pypdf.PdfReader(two.report).pages


@pytest.fixture
def history(tmp_path):
    # mtf50_x (a headline figure) is outside its action limit (1.6) once, in the sixth
    # session; noise_sd rises 100 % over its baseline in the last two (beyond the 50 %
    # constancy action level). The baseline is the mean of the first five sessions.
    mtf = [2.0, 2.01, 1.99, 2.0, 2.0, 1.5, 2.0, 2.0, 2.0]
    noise = [1.0, 1.01, 0.99, 1.0, 1.0, 1.0, 1.0, 2.0, 2.0]
    path = tmp_path / "history.sqlite"
    with History.open(path) as h:
        ids = []
        for k, (a, b) in enumerate(zip(mtf, noise)):
            ms = (MeasurementRecord("mtf50_x", a, "lp/mm", 0.01, "pass"),
                  MeasurementRecord("noise_sd", b, "value", 0.01, "pass"),
                  MeasurementRecord("uniformity", 0.5, "%", 0.01, "pass"))
            ids.append(h.record(SessionRecord(
                "FEN-DBT-1", (date(2024, 1, 1) + timedelta(days=14 * k)).isoformat(),
                "2024-12-01T10:00", "tern", "log-test", "0.1", "pass", ms)))
        h.set_baseline("FEN-DBT-1", "tern", session_ids=ids[:5], reason="test")
    return path


def test_flagged_points_list_headline_figures_first(history, profile):
    from qa.report.trends import charted, flagged_points, headline

    with History.open(history) as h:
        trends = unit_trends(h, "FEN-DBT-1", profile=profile)
    listed = [(t.metric, p.acquired) for t, p in flagged_points(trends, 50)]
    metrics = [m for m, _ in listed]
    n = metrics.count("mtf50_x")
    # every flag of the headline figure first (the latest first, the action-limit point
    # of the sixth session among them), then the other metric's, the latest first
    assert metrics == ["mtf50_x"] * n + ["noise_sd"] * (len(listed) - n) and n < len(listed)
    assert ("mtf50_x", "2024-03-11") in listed
    assert [d for _, d in listed[:n]] == sorted((d for _, d in listed[:n]), reverse=True)
    assert listed[n] == ("noise_sd", "2024-04-22")
    # a short list keeps the headline flags and drops the others' later ones
    assert [m for m, _ in (
        (t.metric, p) for t, p in flagged_points(trends, n))] == ["mtf50_x"] * n
    assert [t.metric for t in trends.metrics if charted(t)] == ["mtf50_x", "noise_sd"]
    assert headline("mtf50_x") and not headline("noise_sd") and not headline("uniformity")


def test_cautions_stay_with_their_heading_and_figures_are_vectors(profile):
    from matplotlib.figure import Figure
    from reportlab.graphics.shapes import Drawing

    from qa.report.figures import figure_drawing
    from qa.report.pdf import closing_flowables, render_pdf
    from qa.report.style import styles

    closing = closing_flowables(styles())
    assert len(closing) == 1 and type(closing[0]).__name__ == "KeepTogether"
    assert styles()["h2"].keepWithNext
    fig = Figure(figsize=(4, 2))
    fig.add_subplot().plot([0, 1], [0, 1])
    drawing = figure_drawing(fig, 100)
    assert isinstance(drawing, Drawing)
    assert drawing.width == pytest.approx(100 / 25.4 * 72)
    # the log, read back: the cautions and the sign-off on the same page
    pdf = render_pdf(_result(profile), None)
    pages = [" ".join(p.extract_text().split()) for p in pypdf.PdfReader(io.BytesIO(pdf)).pages]
    last = pages[-1]
    assert "Cautions" in last and "qualified medical physicist" in last and "Sign-off" in last


def test_the_header_gives_time_of_acquisition_and_acquisition_facts(profile):
    from qa.report.summary import acquired_text, acquisition_facts

    meta = {"acquired": "2024-12-02", "acquisition_time": "093015.25", "views": 15,
            "half_arc_deg": 12.5, "motion": "continuous", "source_to_image_mm": 650.0}
    assert acquired_text(meta, "2024-12-02") == "2024-12-02 09:30:15"
    assert acquired_text({"acquired": "2024-12-02"}, "2024-12-02") == \
        "2024-12-02 (time of day not recorded)"
    assert acquisition_facts(meta) == ("15 views over ±12.5° (25° arc) · continuous source "
                                       "motion · source to image 650 mm")
    assert acquisition_facts({}) == ""


def test_images_inside_figures_are_image_objects_every_reader_parses():
    # Noise images drawn inline in a content stream broke pypdf's parser; as image
    # objects (XObjects) they are parsed like any other image.
    import numpy as np
    from matplotlib.figure import Figure
    from reportlab.platypus import SimpleDocTemplate

    from qa.report.figures import figure_drawing

    rng = np.random.default_rng(7)
    buf = io.BytesIO()
    doc = SimpleDocTemplate(buf)
    story = []
    for _ in range(3):
        fig = Figure(figsize=(3, 3))
        fig.add_subplot().imshow(rng.random((120, 120)), cmap="gray")
        story.append(figure_drawing(fig, 60))
    doc.build(story)
    pages = pypdf.PdfReader(io.BytesIO(buf.getvalue())).pages
    xobjects = [name for p in pages
                for name, obj in p["/Resources"].get("/XObject", {}).items()
                if obj.get_object()["/Subtype"] == "/Image"]
    assert len(xobjects) == 3 and sum(len(p.images) for p in pages) == 3
    for p in pages:
        p.extract_text()
