"""The whole chain through the command line: demo, then assess on the demo's own volume."""

import json
import math
import re
import shutil
import subprocess

import numpy as np
import pytest

from qa import PROJECT_ROOT
from qa.cli import main
from qa.io import read_volume, write_npz

PHANTOM = str(PROJECT_ROOT / "phantoms" / "lacuna-dbt-demo.yaml")
LIMITS = str(PROJECT_ROOT / "thresholds" / "demo.yaml")
HEADLINE = ("mtf50_x", "mtf10_x", "mtf50_y", "mtf10_y", "asf_fwhm", "streak_half_angle")


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo")
    code = main(["demo", "--out", str(out), "--seed", "7"])
    logs = sorted(out.glob("*.pdf"))
    js = sorted(out.glob("*_demo.json"))
    vol = sorted(out.glob("*_volume.dcm"))
    return code, out, logs, js, vol


def test_demo_writes_log_json_volume_and_history(demo):
    code, out, logs, js, vol = demo
    assert code in (0, 1)
    assert len(logs) == 1 and re.fullmatch(r"\d{4}-\d{2}-\d{2}_FEN-DBT-1_demo\.pdf", logs[0].name)
    assert len(js) == 1 and len(vol) == 1
    assert (out / "history.sqlite").exists()
    assert not list(out.glob("*.part"))


def test_json_follows_the_contract(demo):
    _, _, logs, js, _ = demo
    d = json.loads(js[0].read_text())
    assert {"unit", "date", "profile", "overall", "report", "metrics"} <= set(d)
    assert d["unit"] == "FEN-DBT-1" and d["profile"] == "demo"
    assert re.fullmatch(r"\d{4}-\d{2}-\d{2}", d["date"])
    assert d["overall"] in ("pass", "warning", "fail")
    assert d["report"] == str(logs[0])
    for name in HEADLINE:
        assert name in d["metrics"], name
    assert any(k.startswith("sdnr_") for k in d["metrics"])
    assert any(k.startswith("dprime_npw_") for k in d["metrics"])
    for name, m in d["metrics"].items():
        assert set(m) >= {"value", "unit", "uncertainty", "verdict", "note", "limit", "judged"}
        assert m["limit"] is None or isinstance(m["limit"], str)
        assert isinstance(m["judged"], bool)
        if m["limit"] is None or m["verdict"] == "not measured":
            assert m["judged"] is False, name    # nothing to judge by, or nothing measured
        assert m["verdict"] in ("pass", "warning", "fail", "not measured")
        assert m["value"] is None or math.isfinite(m["value"])
        assert (m["value"] is None) == (m["verdict"] == "not measured"), name
    # Every headline figure of the demo is measured (the phantom is made for it).
    for name in HEADLINE:
        assert d["metrics"][name]["value"] is not None, (name, d["metrics"][name]["note"])


def _assess(volume_path, out, extra=()):
    js = out / "assess.json"
    code = main(["assess", str(volume_path), "--phantom", PHANTOM, "--limits", LIMITS,
                 "--unit", "FEN-DBT-1", "--out", str(out), "--json", str(js), "--no-history",
                 *extra])
    return code, json.loads(js.read_text())


def test_assess_on_the_demo_volume_gives_the_demo_numbers(demo, tmp_path):
    _, _, _, js, vol = demo
    want = json.loads(js[0].read_text())["metrics"]
    # Through DICOM the voxels are quantised to 16 bits (within half a quantum), so the
    # figures agree to a small fraction of their uncertainty.
    code, got = _assess(vol[0], tmp_path)
    assert code in (0, 1)
    for name, m in want.items():
        g = got["metrics"][name]
        if m["value"] is None:
            assert g["value"] is None
            continue
        tol = max(1e-6 * abs(m["value"]), 0.05 * (m["uncertainty"] or 0.0))
        assert g["value"] == pytest.approx(m["value"], abs=tol), name
    # Through NumPy the voxels are bit-exact, and so is every figure.
    npz = tmp_path / "v.npz"
    write_npz(read_volume(vol[0]), npz)
    _, again = _assess(npz, tmp_path / "npz")
    assert {k: v["value"] for k, v in again["metrics"].items()} == \
        {k: v["value"] for k, v in got["metrics"].items()}


def _summary_check():
    """``check_summary`` of tests/report/test_summary_text.py: an independent parser of the
    log's printed summary table (tests are not a package, so it is loaded by path)."""
    import importlib.util
    from pathlib import Path

    path = Path(__file__).parents[1] / "report" / "test_summary_text.py"
    spec = importlib.util.spec_from_file_location("summary_text_check", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_pdf_numbers_match_the_json(demo):
    pypdf = pytest.importorskip("pypdf")
    _, _, logs, js, _ = demo
    d = json.loads(js[0].read_text())
    check = _summary_check()
    text = check.pdf_text(logs[0].read_bytes())
    # every row: value, uncertainty, baseline and change to the printed precision, unit
    # and verdict word, read from the printed text alone
    assert check.check_summary(text, d) == len(d["metrics"])
    flat = " ".join(text.split())
    for word in ("do not replace", "qualified medical physicist", "national protocols",
                 "not for diagnosis", "Sign-off"):
        assert word in flat
    assert len(pypdf.PdfReader(logs[0]).pages) >= 4


@pytest.mark.skipif(shutil.which("pdftoppm") is None, reason="poppler-utils (pdftoppm) not installed")
def test_every_page_renders(demo, tmp_path):
    _, _, logs, _, _ = demo
    run = subprocess.run(["pdftoppm", "-r", "30", "-png", str(logs[0]), str(tmp_path / "p")],
                         capture_output=True, text=True)
    assert run.returncode == 0 and run.stderr == ""
    from pypdf import PdfReader
    assert len(list(tmp_path.glob("p-*.png"))) == len(PdfReader(logs[0]).pages)


@pytest.mark.parametrize("argv,match", [
    (["assess", "nothere.npz", "--phantom", PHANTOM, "--limits", LIMITS], r"nothere.npz: volume not found"),
    (["assess", "x.npz", "--phantom", "nothere.yaml", "--limits", LIMITS], r"nothere.yaml: phantom definition not found"),
    (["assess", "x.npz", "--limits", LIMITS], r"required: --phantom"),
    (["bogus"], r"invalid choice: 'bogus'"),
    (["simulate", PHANTOM, "--geometry", "g.yaml", "--out", "o"], r"g.yaml: geometry profile not found"),
])
def test_bad_usage_gives_one_line_and_exit_2(argv, match, capsys, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    assert main(argv) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and err.startswith("lacuna: error:")
    assert re.search(match, err), err
    assert not (tmp_path / "output").exists()


def test_malformed_limits_give_exit_2_and_write_nothing(tmp_path, capsys):
    bad = tmp_path / "limits.yaml"
    bad.write_text((PROJECT_ROOT / "thresholds" / "demo.yaml").read_text()
                   .replace("asf_fwhm:", "asf_fwhm_typo:"))
    vol = tmp_path / "v.npz"
    np.savez(vol, volume=np.zeros((3, 4, 5), np.float32), spacing_mm=np.array([1.0, 0.1, 0.1]))
    out = tmp_path / "out"
    assert main(["assess", str(vol), "--phantom", PHANTOM, "--limits", str(bad),
                 "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert "limits.yaml:" in err and "asf_fwhm_typo" in err and "unknown metric" in err
    assert not out.exists()


@pytest.mark.slow
def test_demo_trend_flags_the_drift_before_any_action_limit(demo):
    # The demo's own year of monthly checks (qa.scenario: stable for BASELINE_MONTHS,
    # then a slowly blurring and noisier detector), judged with the demo's profile. It
    # reuses the history the module's demo run wrote, so it simulates nothing more.
    from qa.history import History
    from qa.history.control import RULES
    from qa.history.trends import OUTSIDE_ACTION, unit_trends
    from qa.judge import load_profile
    from qa.scenario import BASELINE_MONTHS, MONTHS, UNIT

    _, out, _, _, _ = demo
    with History.open(out / "history.sqlite") as h:
        trends = unit_trends(h, UNIT["serial"], profile=load_profile(LIMITS))
        overall = {s.acquired: s.overall for s in h.sessions(unit_id=UNIT["serial"])}
    months = sorted(overall)
    assert len(months) == MONTHS

    def first(metrics, wanted):
        """Index of the first month where a point of ``metrics`` has a flag in ``wanted``."""
        hits = [months.index(p.acquired) for t in trends.metrics if t.metric in metrics
                for p in t.points if set(p.flags) & wanted]
        return min(hits, default=None)

    every = {t.metric for t in trends.metrics}
    rule = first(every, set(RULES))
    action = first(every, {OUTSIDE_ACTION})
    # no control rule fires on the stable baseline months (no false alarm) ...
    assert rule is not None and rule >= BASELINE_MONTHS, rule
    # ... one fires once the detector drifts, before any metric is outside an action
    # limit, and before any session of the year fails
    assert action is None or rule < action, (rule, action)
    fails = [k for k, day in enumerate(months) if overall[day] == "fail"]
    assert not fails or rule < fails[0], (rule, fails)
    # the scenario's growing electronic noise shows in the noise figure itself, flagged
    # while it is still inside its action limit
    noise_rule = first({"noise_sd"}, set(RULES))
    noise_action = first({"noise_sd"}, {OUTSIDE_ACTION})
    assert noise_rule is not None and (noise_action is None or noise_rule < noise_action)


def test_a_second_demo_the_same_day_overwrites_nothing(demo, tmp_path):
    # A later run into the same folder (its history already filled, so one session) gets
    # its own log, JSON and volume (_2) and leaves the first run's files byte for byte.
    from qa.fileio import sha256_of

    _, out, logs, js, vol = demo
    again = tmp_path / "again"
    shutil.copytree(out, again)
    before = {p.name: sha256_of(p) for p in again.iterdir() if p.suffix in (".pdf", ".json", ".dcm")}
    assert main(["demo", "--out", str(again), "--seed", "8"]) in (0, 1)
    after = {p.name: sha256_of(p) for p in again.iterdir() if p.suffix in (".pdf", ".json", ".dcm")}
    assert {k: after[k] for k in before} == before
    added = sorted(set(after) - set(before))
    stem = logs[0].stem
    assert added == sorted([f"{stem}_2.json", f"{stem}_2.pdf", f"{vol[0].stem}_2.dcm"]), added
    result = json.loads((again / f"{stem}_2.json").read_text(encoding="utf-8"))
    assert result["report"].endswith(f"{stem}_2.pdf")
    assert result["volume"]["source_file"].endswith(f"{vol[0].stem}_2.dcm")
