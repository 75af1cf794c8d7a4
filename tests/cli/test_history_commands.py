"""The history commands through qa.cli.main: history, baseline, trend, compare.

Exit codes (README, "Commands"): 0 when every limit holds, 1 when an action limit is
crossed, 2 for bad input with one line on standard error.
"""

from __future__ import annotations

import json
from datetime import date

import numpy as np
import pandas as pd
import pytest

from qa.cli import main
from qa.history.db import History
from qa.history.records import MeasurementRecord, SessionRecord

PROFILE = """\
profile: cli-test
description: invented limits for the tests
limits:
  asf_fwhm:
    unit: mm
    constancy: {warning: 0.2, action: 0.5, as: fraction}
    source: invented for the tests
"""
#: Sessions 1-6 of FEN-DBT-1 (asf_fwhm in mm), session 7 of another unit.
ASF = [10.0, 12.0, 11.0, 10.5, 11.5, 17.0]


@pytest.fixture
def files(tmp_path):
    db = tmp_path / "history.sqlite"
    with History.open(db) as h:
        for k, v in enumerate(ASF):
            ms = (MeasurementRecord("asf_fwhm", v, "mm", 0.1, "pass"),
                  MeasurementRecord("noise_sd", 2.0 + 0.1 * (k % 2), "value", 0.01, "pass"))
            h.record(SessionRecord("FEN-DBT-1", date(2024, 3, 1 + k).isoformat(),
                                   "2024-12-01T10:00", "tern", "cli-test", "0.1", "pass", ms,
                                   {"software": "2.1" if k < 3 else "3.0"}))
        h.record(SessionRecord("OTHER-1", "2024-03-09", "2024-12-01T10:00", "tern",
                               "cli-test", "0.1", "pass",
                               (MeasurementRecord("asf_fwhm", 9.0, "mm", 0.1, "pass"),)))
    limits = tmp_path / "limits.yaml"
    limits.write_text(PROFILE)
    return {"db": str(db), "limits": str(limits), "out": str(tmp_path / "out"),
            "tmp": tmp_path}


def run(capsys, *argv):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def one_line_error(err: str, *needles):
    assert err.startswith("lacuna: error: ") and err.count("\n") == 1, err
    for needle in needles:
        assert needle in err, (needle, err)


def test_history_lists_and_exports(files, capsys):
    code, out, err = run(capsys, "history", "--db", files["db"])
    assert code == 0 and err == ""
    assert out.splitlines()[0].split() == ["id", "acquired", "unit", "phantom", "kind",
                                           "profile", "overall", "software", "figures",
                                           "baseline"]
    assert "7 session(s) of 2 unit(s)" in out
    csv = files["tmp"] / "export" / "fen.csv"
    code, out, _ = run(capsys, "history", "--db", files["db"], "--unit", "FEN-DBT-1",
                       "--csv", csv)
    assert code == 0 and "6 session(s) of 1 unit(s)" in out and f"csv: {csv}" in out
    frame = pd.read_csv(csv)
    assert len(frame) == 12 and set(frame["unit_id"]) == {"FEN-DBT-1"}  # 6 x 2 figures


def test_bad_input_exits_2_with_one_line(files, capsys, tmp_path):
    missing = tmp_path / "nowhere" / "h.sqlite"
    cases = [
        (("history", "--db", missing), ("h.sqlite", "history database not found")),
        (("history", "--db", files["db"], "--unit", "NOPE"),
         ("no sessions of unit 'NOPE' in the history (units: FEN-DBT-1, OTHER-1)",)),
        (("baseline", "--db", files["db"], "--unit", "FEN-DBT-1", "--phantom", "tern",
          "--sessions", "1,x", "--reason", "r"),
         ("--sessions", "expected session ids separated by commas, like 3,4,5; got '1,x'")),
        (("baseline", "--db", files["db"], "--unit", "FEN-DBT-1", "--phantom", "tern",
          "--sessions", "1,99", "--reason", "r"), ("no session with id 99",)),
        (("baseline", "--db", files["db"], "--unit", "FEN-DBT-1", "--phantom", "tern",
          "--sessions", "1,7", "--reason", "r"), ("session 7 is of unit 'OTHER-1'",)),
        (("baseline", "--db", files["db"], "--unit", "FEN-DBT-1", "--phantom", "tern",
          "--first", "3"), ("a baseline change needs a reason",)),
        (("baseline", "--db", files["db"], "--unit", "FEN-DBT-1", "--phantom", "tern",
          "--first", "9", "--reason", "r"), ("has only 6 session(s)",)),
        (("baseline", "--db", files["db"], "--unit", "FEN-DBT-1", "--phantom", "slab",
          "--first", "2", "--reason", "r"), ("no sessions with phantom 'slab'",)),
        (("baseline", "--db", files["db"], "--unit", "FEN-DBT-1", "--phantom", "tern",
          "--first", "2", "--sessions", "1,2", "--reason", "r"), ("not allowed with",)),
        (("trend", "--db", files["db"], "--unit", "NOPE", "--out", files["out"]),
         ("no sessions of unit 'NOPE'",)),
        (("trend", "--db", files["db"], "--unit", "FEN-DBT-1", "--metric", "mtf50_x",
          "--out", files["out"]), ("never measured", "(measured: asf_fwhm, noise_sd)")),
        (("trend", "--db", missing, "--unit", "FEN-DBT-1", "--out", files["out"]),
         ("history database not found",)),
        (("compare", "--db", files["db"], "--unit", "FEN-DBT-1", "--before", "1,2",
          "--after", "4,99", "--out", files["out"]), ("no session with id 99",)),
        (("compare", "--db", files["db"], "--unit", "FEN-DBT-1", "--before", "1;2",
          "--after", "4,5", "--out", files["out"]), ("--before", "got '1;2'")),
        (("compare", "--db", files["db"], "--unit", "FEN-DBT-1", "--out", files["out"]),
         ("give --before and --after",)),
        (("compare", "--db", files["db"], "--unit", "OTHER-1", "--before", "1,2",
          "--after", "4,5", "--out", files["out"]), ("session 1 is of unit 'FEN-DBT-1'",)),
    ]
    for argv, needles in cases:
        code, out, err = run(capsys, *argv)
        assert code == 2, (argv, out, err)
        one_line_error(err, *needles)
    assert not missing.exists() and not missing.parent.exists()
    with History.open(files["db"]) as h:
        assert h.baseline_history("FEN-DBT-1", "tern") == []  # nothing was set


def test_baseline_set_and_show(files, capsys):
    code, out, _ = run(capsys, "baseline", "--db", files["db"], "--unit", "FEN-DBT-1",
                       "--phantom", "tern", "--sessions", "1,2,3", "--reason", "acceptance")
    assert code == 0
    # mean of 10, 12, 11 = 11; sample SD sqrt(((-1)^2 + 1^2 + 0^2) / 2) = 1
    row = next(line.split() for line in out.splitlines() if line.startswith("asf_fwhm"))
    assert row == ["asf_fwhm", "11", "1", "3", "mm"]
    assert "baseline 1 of unit FEN-DBT-1, phantom tern" in out and "in force" in out
    code, out, _ = run(capsys, "baseline", "--db", files["db"], "--unit", "FEN-DBT-1",
                       "--phantom", "tern", "--first", "2", "--reason", "re-set", "--by", "MP")
    # the first two sessions by date: 10 and 12, mean 11, SD sqrt(2) = 1.414
    row = next(line.split() for line in out.splitlines() if line.startswith("asf_fwhm"))
    assert row == ["asf_fwhm", "11", "1.41", "2", "mm"] and "by MP" in out
    code, out, _ = run(capsys, "baseline", "--db", files["db"], "--unit", "FEN-DBT-1",
                       "--phantom", "tern")
    assert code == 0 and "superseded" in out and out.count("baseline ") >= 2
    code, out, _ = run(capsys, "history", "--db", files["db"])
    assert "1 (old), 2" in out  # sessions 1 and 2 are in both baselines


def test_trend_writes_a_dated_pdf_and_flags(files, capsys):
    run(capsys, "baseline", "--db", files["db"], "--unit", "FEN-DBT-1", "--phantom", "tern",
        "--first", "5", "--reason", "acceptance")
    code, out, err = run(capsys, "trend", "--db", files["db"], "--unit", "FEN-DBT-1",
                         "--limits", files["limits"], "--out", files["out"])
    # baseline mean of 10, 12, 11, 10.5, 11.5 = 11; the constancy action line is
    # 11 * 1.5 = 16.5, and the latest value 17 is above it: exit code 1
    assert code == 1, err
    pdf = files["tmp"] / "out" / f"{date.today().isoformat()}_FEN-DBT-1_trend.pdf"
    assert pdf.is_file() and pdf.read_bytes()[:5] == b"%PDF-"
    assert "asf_fwhm (mm): 6 points, baseline 11" in out
    assert "outside action limit" in out and "latest value outside an action limit: " \
        "asf_fwhm" in out
    code, out, _ = run(capsys, "trend", "--db", files["db"], "--unit", "FEN-DBT-1",
                       "--metric", "noise_sd", "--limits", files["limits"], "--out",
                       files["out"])
    assert code == 0 and "asf_fwhm" not in out.split("log:")[0]


def test_compare_sessions_prints_and_writes(files, capsys):
    js = files["tmp"] / "cmp.json"
    code, out, err = run(capsys, "compare", "--db", files["db"], "--unit", "FEN-DBT-1",
                         "--before", "1,2,3", "--after", "4,5,6", "--limits",
                         files["limits"], "--json", js, "--out", files["out"])
    # before 10, 12, 11 (mean 11); after 10.5, 11.5, 17 (mean 13): +18 %, below the 20 %
    # warning: exit 0; Welch interval wide (after SD 3.5), so no change beyond noise
    assert code == 0, err
    data = json.loads(js.read_text())
    m = data["metrics"]["asf_fwhm"]
    # 13 - 11 = 2 (default rel 1e-6: float rounding of the means)
    assert m["difference"] == pytest.approx(2.0) and m["beyond_noise"] is False
    assert m["constancy"] == "pass" and m["interval"] == "Welch t, 95 %"
    assert data["before"]["software"] == ["2.1"] and data["after"]["software"] == ["3.0"]
    assert data["report"].endswith("_FEN-DBT-1_compare.pdf")
    assert "no change beyond noise" in out and "Welch t, 95 %" in out
    # sessions 5 and 6 after: mean 14.25 = +29.5 %, between the 20 % warning and the 50 %
    # action change: exit 0, and the bootstrap named as the interval used
    code, out, _ = run(capsys, "compare", "--db", files["db"], "--unit", "FEN-DBT-1",
                       "--before", "1,2,3", "--after", "5,6", "--limits", files["limits"],
                       "--method", "bootstrap", "--out", files["out"])
    assert code == 0 and "beyond constancy warning" in out
    assert "percentile bootstrap" in out
    # session 6 alone: 17 = +54.5 % beyond the 50 % action change (exit 1); one value
    # after gives no interval, and the table says so
    code, out, _ = run(capsys, "compare", "--db", files["db"], "--unit", "FEN-DBT-1",
                       "--before", "1,2,3", "--after", "6", "--limits", files["limits"],
                       "--out", files["out"])
    assert code == 1 and "interval not computable; beyond constancy action limit" in out
    assert "interval: none computable" in out


def test_compare_volumes(files, capsys, monkeypatch):
    # The volume route: files are read with qa.io and measured with the phantom; the
    # measuring itself is tested elsewhere, so here it is replaced by a stand-in that
    # reports the volume's mean as asf_fwhm (what is checked is the plumbing).
    from qa import PROJECT_ROOT, session
    from qa.io import write_npz
    from qa.measure.base import FamilyResult, Measurement
    from qa.volume import Volume

    def stand_in(volume, phantom, **_):
        return None, (FamilyResult("asf", (Measurement("asf_fwhm", float(
            volume.data.mean()), "mm", 0.1),)),)

    monkeypatch.setattr(session, "measure_volume", stand_in)
    names = []
    for k, level in enumerate([10.0, 10.2, 9.8, 13.0, 13.2, 12.8]):
        data = np.full((2, 4, 4), level, dtype=np.float32)
        names.append(str(write_npz(Volume(data, (1.0, 0.1, 0.1)), files["tmp"] / f"v{k}.npz")))
    js = files["tmp"] / "vol.json"
    code, out, err = run(capsys, "compare", "--unit", "FEN-DBT-1", "--before-volumes",
                         ",".join(names[:3]), "--after-volumes", ",".join(names[3:]),
                         "--phantom", PROJECT_ROOT / "phantoms" / "lacuna-dbt-demo.yaml",
                         "--limits", files["limits"], "--json", js, "--out", files["out"])
    # means 10 and 13: +30 %, between the 20 % warning and the 50 % action change of the
    # profile -> warning, exit 0
    assert code == 0, err
    m = json.loads(js.read_text())["metrics"]["asf_fwhm"]
    # 13 - 10 = 3; 1e-5 covers the float32 volumes' means
    assert m["difference"] == pytest.approx(3.0, abs=1e-5) and m["constancy"] == "warning"
    code, _, err = run(capsys, "compare", "--unit", "FEN-DBT-1", "--before-volumes",
                       names[0], "--after-volumes", names[1], "--out", files["out"])
    assert code == 2
    one_line_error(err, "--phantom")


def test_outputs_that_cannot_be_written_exit_2_and_leave_nothing(files, capsys):
    # A regular file where a folder should be, and a folder where a file should be.
    blocker = files["tmp"] / "a-file"
    blocker.write_text("not a folder\n")
    folder = files["tmp"] / "a-folder"
    folder.mkdir()
    out = files["tmp"] / "fresh-out"
    compare = ("compare", "--db", files["db"], "--unit", "FEN-DBT-1", "--before", "1,2,3",
               "--after", "4,5,6", "--limits", files["limits"])
    cases = [
        (("trend", "--db", files["db"], "--unit", "FEN-DBT-1", "--out", blocker / "sub"),
         ("field '--out'", "a-file is a file, not a folder")),
        (compare + ("--out", out, "--json", blocker / "c.json"),
         ("c.json", "field '--json'", "a-file is a file, not a folder")),
        (compare + ("--out", out, "--json", folder),
         ("a-folder", "field '--json'", "is a folder; expected the name of a file")),
        (compare + ("--out", blocker, "--json", files["tmp"] / "c.json"),
         ("field '--out'", "a-file is a file, not a folder")),
        (("history", "--db", files["db"], "--csv", blocker / "h.csv"),
         ("h.csv", "field '--csv'", "a-file is a file, not a folder")),
        (("history", "--db", files["db"], "--csv", folder),
         ("field '--csv'", "is a folder")),
    ]
    for argv, needles in cases:
        code, text, err = run(capsys, *argv)
        assert code == 2, (argv, text, err)
        assert text == "", (argv, text)   # nothing printed before the error
        one_line_error(err, *needles)
    # nothing half-written: no PDF without its JSON, no output folder, no temporary file
    assert not out.exists() and not (files["tmp"] / "c.json").exists()
    assert list(folder.iterdir()) == [] and blocker.read_text() == "not a folder\n"
    assert not list(files["tmp"].glob(".*.part"))
