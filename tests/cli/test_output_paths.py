"""Output places that cannot be written: one line, exit code 2, nothing written.

Every command with ``--out``/``--json``/``--history`` checks them before any work, so
the demo refuses a bad ``--out`` at once instead of after its simulation.
"""

import pytest

from qa import PROJECT_ROOT
from qa.cli import main

PHANTOM = str(PROJECT_ROOT / "phantoms" / "lacuna-dbt-demo.yaml")
LIMITS = str(PROJECT_ROOT / "thresholds" / "demo.yaml")


@pytest.fixture
def places(tmp_path):
    a_file = tmp_path / "a-file"
    a_file.write_text("not a folder")
    a_folder = tmp_path / "a-folder"
    a_folder.mkdir()
    volume = tmp_path / "volume.npz"
    volume.write_bytes(b"never read: the outputs are checked first")
    return a_file, a_folder, volume


def _snapshot(root):
    return sorted((p.relative_to(root), p.stat().st_size) for p in root.rglob("*"))


@pytest.mark.parametrize("case", ["out-is-a-file", "out-under-a-file", "json-is-a-folder",
                                  "history-is-a-folder", "demo-out-is-a-file"])
def test_bad_output_place_is_refused_before_any_work(tmp_path, places, capsys, case):
    a_file, a_folder, volume = places
    assess = ["assess", str(volume), "--phantom", PHANTOM, "--limits", LIMITS]
    argv, named, field = {
        "out-is-a-file": (assess + ["--out", str(a_file)], a_file, "--out"),
        "out-under-a-file": (assess + ["--out", str(a_file / "logs")], a_file, "--out"),
        "json-is-a-folder": (assess + ["--out", str(tmp_path / "o"), "--json", str(a_folder)],
                             a_folder, "--json"),
        "history-is-a-folder": (assess + ["--out", str(tmp_path / "o"), "--history",
                                          str(a_folder)], a_folder, "--history"),
        "demo-out-is-a-file": (["demo", "--out", str(a_file)], a_file, "--out"),
    }[case]
    before = _snapshot(tmp_path)
    assert main(argv) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and str(named) in err[0] and field in err[0], err
    assert _snapshot(tmp_path) == before          # nothing written, nothing made


def test_a_file_system_refusal_during_the_work_is_one_line(monkeypatch, capsys, tmp_path):
    # A refusal no check can foresee (a full disk, a file locked by another program)
    # still ends as one line naming the file, with exit code 2 and no traceback.
    from qa.cli import history_cmd

    def full_disk(args):
        raise OSError(28, "No space left on device", str(tmp_path / "history.csv"))

    monkeypatch.setattr(history_cmd, "run", full_disk)
    assert main(["history", "--db", str(tmp_path / "h.sqlite")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err == [f"lacuna: error: {tmp_path / 'history.csv'}: No space left on device"]
