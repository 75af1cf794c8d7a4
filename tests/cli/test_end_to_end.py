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
        assert set(m) >= {"value", "unit", "uncertainty", "verdict", "note"}
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


def test_pdf_numbers_match_the_json(demo):
    pypdf = pytest.importorskip("pypdf")
    _, _, logs, js, _ = demo
    d = json.loads(js[0].read_text())
    text = "\n".join(page.extract_text() for page in pypdf.PdfReader(logs[0]).pages)
    from qa.report.pdf import format_value
    for name, m in d["metrics"].items():
        shown = format_value(m["value"], m["uncertainty"])
        if m["value"] is None:
            continue
        # The summary row: metric name, then its value ± uncertainty as printed (a cell
        # may wrap, so any white space stands for a space).
        pattern = r"\s+".join(re.escape(part) for part in shown.split(" "))
        assert re.search(re.escape(name) + r"\s+" + pattern, text), (name, shown)
        printed = float(shown.split(" ± ")[0])
        decimals = len(shown.split(" ± ")[0].partition(".")[2])
        assert printed == pytest.approx(m["value"], abs=0.5 * 10 ** -decimals + 1e-12)
    for word in ("do not replace", "qualified medical physicist", "national protocols",
                 "not for diagnosis", "Sign-off"):
        assert word in text


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
