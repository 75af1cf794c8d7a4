"""A profile's scope through the command line: phantoms and acquisition geometries.

A profile names the geometries it applies to (``applies_to.geometries``); a simulated
volume carries the name of its geometry in its metadata and is refused, with one line
and exit code 2, when the profile does not cover it. A volume that does not name its
geometry (a scanner's DICOM) is judged, with a note that the scope was not checked.
Measuring itself is tested elsewhere, so it is replaced here by a stand-in (what is
checked is the plumbing).
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from qa import PROJECT_ROOT, publish, session
from qa.cli import main
from qa.io import write_npz
from qa.locate.layout import Layout
from qa.measure.base import FamilyResult, Measurement
from qa.volume import Volume

PHANTOM = PROJECT_ROOT / "phantoms" / "lacuna-dbt-demo.yaml"
LIMITS = PROJECT_ROOT / "thresholds" / "demo.yaml"          # applies to dbt-mid-arc only
NOTE = "does not state its acquisition geometry, so the scope of profile 'demo'"


def _stand_in(volume, phantom, **_):
    return Layout(phantom, {}), (FamilyResult("asf", (Measurement("asf_fwhm", 5.8, "mm",
                                                                  0.1),)),)


def _refuse(*_, **__):
    raise AssertionError("measured a volume the profile does not cover")


@pytest.fixture
def volumes(tmp_path):
    """Three small volumes: of another arc, of the profile's arc, and of no stated arc."""
    data = np.full((2, 4, 4), 1.0, dtype=np.float32)
    out = {}
    for name, meta in (("wide", {"geometry": "dbt-wide-arc", "simulated": "yes"}),
                       ("mid", {"geometry": "dbt-mid-arc", "simulated": "yes"}),
                       ("unknown", {})):
        out[name] = str(write_npz(Volume(data, (1.0, 0.1, 0.1), meta=meta),
                                  tmp_path / f"{name}.npz"))
    return out


def _geometry_line() -> int:
    lines = LIMITS.read_text().splitlines()
    return next(i for i, text in enumerate(lines, 1) if text.strip().startswith("geometries:"))


def test_assess_refuses_a_volume_of_another_arc(volumes, tmp_path, capsys, monkeypatch):
    monkeypatch.setattr(session, "measure_volume", _refuse)
    out = tmp_path / "out"
    code = main(["assess", volumes["wide"], "--phantom", str(PHANTOM), "--limits",
                 str(LIMITS), "--unit", "FEN-DBT-1", "--out", str(out),
                 "--json", str(tmp_path / "r.json")])
    err = capsys.readouterr().err
    assert code == 2
    assert err.count("\n") == 1 and err.startswith("lacuna: error: "), err
    assert (f"{LIMITS}:{_geometry_line()}, field 'applies_to.geometries': profile 'demo' "
            "is for geometr(ies) dbt-mid-arc, not 'dbt-wide-arc'") in err, err
    assert not out.exists() and not (tmp_path / "r.json").exists()


@pytest.mark.parametrize("which,noted", [("mid", False), ("unknown", True)])
def test_assess_judges_the_profiles_arc_and_notes_an_unknown_one(volumes, tmp_path, capsys,
                                                                 monkeypatch, which, noted):
    monkeypatch.setattr(session, "measure_volume", _stand_in)
    monkeypatch.setattr(publish, "render_pdf", lambda *a, **k: b"%PDF-stand-in\n")
    js = tmp_path / "r.json"
    code = main(["assess", volumes[which], "--phantom", str(PHANTOM), "--limits",
                 str(LIMITS), "--unit", "FEN-DBT-1", "--out", str(tmp_path / "out"),
                 "--json", str(js), "--no-history"])
    out, err = capsys.readouterr()
    assert code == 0, err
    # asf_fwhm 5.8 mm is inside the demo's acceptance limits (warning 7 mm)
    assert json.loads(js.read_text())["metrics"]["asf_fwhm"]["verdict"] == "pass"
    assert (NOTE in out) == noted, out


def test_compare_volumes_checks_each_volumes_arc(volumes, tmp_path, capsys, monkeypatch):
    monkeypatch.setattr(session, "measure_volume", _refuse)
    out = tmp_path / "out"
    code = main(["compare", "--unit", "FEN-DBT-1", "--before-volumes", volumes["mid"],
                 "--after-volumes", volumes["wide"], "--phantom", str(PHANTOM),
                 "--limits", str(LIMITS), "--out", str(out)])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1, err
    assert "field 'applies_to.geometries'" in err and "not 'dbt-wide-arc'" in err, err
    assert not out.exists()
    monkeypatch.setattr(session, "measure_volume", _stand_in)
    code = main(["compare", "--unit", "FEN-DBT-1", "--before-volumes", volumes["mid"],
                 "--after-volumes", volumes["unknown"], "--phantom", str(PHANTOM),
                 "--limits", str(LIMITS), "--out", str(out)])
    text, err = capsys.readouterr()
    assert code == 0, err
    assert NOTE in text, text
