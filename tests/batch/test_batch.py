"""Batch runs over a folder tree: pool, Dask and a single run give the same figures.

Also: a worker process that dies fails only its own session; a degenerate volume, a
series split over folders and a bad ``--processes`` give clear reasons.
"""

import dataclasses
import importlib
import shutil
from pathlib import Path

import numpy as np
import pytest

import qa.batch
from qa import PROJECT_ROOT
from qa.batch import assess_task, find_sessions, run_local
from qa.cli import main
from qa.errors import InputError
from qa.history import History
from qa.io import write_dicom, write_npz
from qa.phantom import load_phantom
from qa.simulate.acquire import detect, expected_transmissions
from qa.simulate.geometry import Detector
from qa.simulate.profiles import load_geometry
from qa.simulate.recon import reconstruct
from qa.simulate.recon.grid import ReconGrid

PHANTOM = PROJECT_ROOT / "phantoms" / "lacuna-dbt-demo.yaml"


@pytest.fixture(scope="module")
def limits(tmp_path_factory):
    """Wide limits (invented for this test) that the coarse test volumes all meet."""
    p = tmp_path_factory.mktemp("limits") / "wide.yaml"
    p.write_text("profile: wide\napplies_to: {phantoms: [lacuna-tern]}\nlimits:\n"
                 "  asf_fwhm: {unit: mm, acceptance: {warning: 20, action: 30}, "
                 "source: invented for this test}\n")
    return p


@pytest.fixture(scope="module")
def volumes():
    """Three noise realisations of the demo phantom on a coarse 0.2 mm grid (fast)."""
    ph = load_phantom(PHANTOM)
    g = load_geometry(PROJECT_ROOT / "phantoms" / "geometries" / "dbt-mid-arc.yaml")
    det = Detector(0.2, 450, 330, (-44.9, -7.9))
    g = dataclasses.replace(g, detector=det, aperture_samples=1)
    grid = ReconGrid.from_field(*ph.field_xyz_mm, pixel_mm=0.2, plane_mm=1.0)
    t = expected_transmissions(ph, g)
    return [reconstruct(detect(t, g, seed=s), grid, method="fbp") for s in range(3)]


@pytest.fixture(scope="module")
def tree(volumes, tmp_path_factory):
    root = tmp_path_factory.mktemp("sessions")
    for i in range(18):
        unit = f"FEN-DBT-{1 + i % 3}"
        day = f"2026-{1 + i // 3:02d}-15"
        vol = volumes[i % 3].with_meta(serial=unit, acquired=day, station=unit)
        sub = root / unit / day
        write_dicom(vol, sub / "volume.dcm")
    # Two broken sessions: a DICOM file cut short and a NumPy volume without spacing.
    broken = root / "broken"
    broken.mkdir()
    good = (root / "FEN-DBT-1" / "2026-01-15" / "volume.dcm").read_bytes()
    (broken / "cut.dcm").write_bytes(good[: len(good) // 2])
    np.savez(broken / "nospacing.npz", volume=np.zeros((4, 5, 6), np.float32))
    return root


def test_twenty_sessions_give_eighteen_logs_and_two_clear_failures(tree, limits, tmp_path, capsys):
    out = tmp_path / "out"
    code = main(["batch", str(tree), "--phantom", str(PHANTOM), "--limits", str(limits),
                 "--out", str(out), "--quiet", "--summary", str(tmp_path / "summary.csv")])
    printed = capsys.readouterr().out
    assert code == 2                       # bad input among the sessions, none failed a limit
    assert "18 assessed, 2 failed" in printed
    assert len(list(out.glob("*.pdf"))) == 18
    assert "cut.dcm" in printed and "nospacing.npz" in printed
    import pandas as pd
    table = pd.read_csv(tmp_path / "summary.csv")
    assert len(table) == 20 and (table["status"] == "failed").sum() == 2
    assert table.loc[table["status"] == "failed", "reason"].str.len().min() > 10
    with History.open(out / "history.sqlite") as h:
        sessions = h.sessions()
        assert len(sessions) == 18
        assert {s.unit_id for s in sessions} == {"FEN-DBT-1", "FEN-DBT-2", "FEN-DBT-3"}
        assert all(len(h.measurements(s.id)) == sessions[0].n_measurements for s in sessions)


def _figures(outcome):
    """Values, uncertainties and verdicts of every metric of a session."""
    return {k: (v, outcome.uncertainties[k], outcome.verdicts[k])
            for k, v in outcome.metrics.items()}


def test_pool_and_single_runs_agree(tree, limits, tmp_path):
    tasks = [t for t in find_sessions([tree], phantom=str(PHANTOM), limits=str(limits),
                                      out_dir=str(tmp_path / "a"), history=None)
             if "broken" not in t.source][:3]
    alone = [assess_task(t) for t in tasks]
    pooled = run_local([dataclasses.replace(t, out_dir=str(tmp_path / "b")) for t in tasks],
                       processes=2, progress=False)
    assert all(o.ok for o in alone + pooled)
    assert any(u is not None for _, u, _ in _figures(alone[0]).values())
    assert [_figures(o) for o in alone] == [_figures(o) for o in pooled]


@pytest.fixture
def dying_worker(monkeypatch):
    """Swap in a per-session function whose process ends on sessions named ``dies*``.

    It lives in a module beside this file, on ``sys.path`` for the spawned workers.
    """
    monkeypatch.syspath_prepend(str(Path(__file__).parent))
    module = importlib.import_module("dying_worker")
    monkeypatch.setattr(qa.batch, "assess_task", module.assess_or_die)
    return module


def _small_tree(tree, root, units=("FEN-DBT-1", "FEN-DBT-2")):
    """A few of the tree's good sessions copied under ``root``."""
    for unit in units:
        day = next((tree / unit).iterdir()).name
        (root / unit).mkdir(parents=True)
        shutil.copy(tree / unit / day / "volume.dcm", root / unit / "volume.dcm")
    return root


def test_a_dying_worker_fails_only_its_session(tree, limits, tmp_path, capsys, dying_worker):
    root = _small_tree(tree, tmp_path / "in")
    np.savez(root / "dies.npz", volume=np.zeros((4, 5, 6), np.float32))  # found first
    summary = tmp_path / "summary.csv"
    code = main(["batch", str(root), "--phantom", str(PHANTOM), "--limits", str(limits),
                 "--out", str(tmp_path / "out"), "--no-history", "--quiet",
                 "--processes", "2", "--summary", str(summary)])
    printed = capsys.readouterr().out
    assert code == 2
    assert "2 assessed, 1 failed" in printed
    import pandas as pd
    table = pd.read_csv(summary).set_index("source")
    died = table.loc[str(root / "dies.npz")]
    assert died["status"] == "failed"
    assert died["reason"] == ("worker process died: it exited with code "
                              f"{dying_worker.EXIT_CODE} while assessing this session")
    assert (table.drop(str(root / "dies.npz"))["status"] == "assessed").all()
    assert len(list((tmp_path / "out").glob("*.pdf"))) == 2


def _blank_npz(path):
    """A degenerate session: a 4 x 5 x 6 volume of zeros with a valid spacing."""
    np.savez(path, volume=np.zeros((4, 5, 6), np.float32), spacing_mm=np.array([1.0, 0.2, 0.2]))
    return path


def test_dask_cluster_gives_the_same_figures(tree, limits, tmp_path, dying_worker):
    distributed = pytest.importorskip("dask.distributed")
    import dask
    from qa.batch import run_dask

    tasks = [t for t in find_sessions([tree], phantom=str(PHANTOM), limits=str(limits),
                                      out_dir=str(tmp_path / "a"), history=None)
             if "broken" not in t.source][:2]
    alone = [assess_task(t) for t in tasks]
    np.savez(tmp_path / "dies.npz", volume=np.zeros((4, 5, 6), np.float32))
    dies = dataclasses.replace(tasks[0], source=str(tmp_path / "dies.npz"))
    blank = dataclasses.replace(tasks[0], source=str(_blank_npz(tmp_path / "blank.npz")))
    # No retry of a session whose worker died: it is given up at once. Two sessions on two
    # idle one-thread workers go one to each, so the dying one takes no other with it.
    with dask.config.set({"distributed.scheduler.allowed-failures": 0}), \
            distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                     dashboard_address=None) as cluster:
        on_dask = run_dask([dataclasses.replace(t, out_dir=str(tmp_path / "d")) for t in tasks],
                           scheduler=cluster.scheduler_address, progress=False)
        died, other = run_dask([dies, blank], scheduler=cluster.scheduler_address,
                               progress=False)
    assert [_figures(o) for o in alone] == [_figures(o) for o in on_dask]
    assert not died.ok and died.error == ("worker process died: every Dask worker that ran "
                                          "this session died")
    assert not other.ok and "no test object of phantom" in other.error


def test_scheduler_option_runs_the_batch_on_dask(tree, limits, tmp_path, capsys):
    distributed = pytest.importorskip("dask.distributed")
    root = _small_tree(tree, tmp_path / "in", units=("FEN-DBT-3",))
    _blank_npz(root / "blank.npz")
    summary = tmp_path / "summary.csv"
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=False,
                                  protocol="tcp", host="127.0.0.1",
                                  dashboard_address=None) as cluster:
        code = main(["batch", str(root), "--phantom", str(PHANTOM), "--limits", str(limits),
                     "--out", str(tmp_path / "out"), "--quiet", "--summary", str(summary),
                     "--scheduler", cluster.scheduler_address])
    printed = capsys.readouterr().out
    assert code == 2 and "1 assessed, 1 failed" in printed
    assert "blank.npz" in printed and "no test object of phantom 'lacuna-tern'" in printed
    with History.open(tmp_path / "out" / "history.sqlite") as h:
        assert [s.unit_id for s in h.sessions()] == ["FEN-DBT-3"]


def test_degenerate_volume_fails_with_a_clear_reason(limits, tmp_path):
    _blank_npz(tmp_path / "blank.npz")
    [task] = find_sessions([tmp_path], phantom=str(PHANTOM), limits=str(limits),
                           out_dir=str(tmp_path / "out"), history=None)
    outcome = assess_task(task)
    assert not outcome.ok
    assert outcome.error.startswith(f"{tmp_path / 'blank.npz'}: no test object of phantom "
                                    "'lacuna-tern' lies inside the volume (4 x 5 x 6 voxels;")
    assert not (tmp_path / "out").exists()


def test_a_series_split_over_folders_is_one_failed_session(tmp_path, limits):
    import pydicom
    from pydicom.data import get_testdata_file

    sample = get_testdata_file("CT_small.dcm", download=False)  # pydicom's bundled sample
    if sample is None:
        pytest.skip("pydicom's sample CT_small.dcm is not installed here")
    for folder, uid, n in (("a", "1.2.3.9.1", 2), ("b", "1.2.3.9.1", 2), ("c", "1.2.3.9.2", 3)):
        (tmp_path / folder).mkdir()
        for k in range(n):
            ds = pydicom.dcmread(sample)
            ds.SeriesInstanceUID = uid
            ds.save_as(tmp_path / folder / f"s{k}.dcm")
    tasks = find_sessions([tmp_path], phantom=str(PHANTOM), limits=str(limits),
                          out_dir=str(tmp_path / "out"), history=None)
    assert [(Path(t.source).name, t.series) for t in tasks] == [("a", "1.2.3.9.1"), ("c", None)]
    outcome = assess_task(tasks[0])
    assert not outcome.ok
    assert outcome.error == (f"series 1.2.3.9.1 is split over 2 folders ({tmp_path / 'a'}, "
                             f"{tmp_path / 'b'}); put its slices in one folder")


@pytest.mark.parametrize("given", ["0", "-3", "two"])
def test_processes_below_one_are_refused(given, limits, tmp_path, capsys):
    assert main(["batch", str(tmp_path), "--phantom", str(PHANTOM), "--limits", str(limits),
                 "--processes", given]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err == [f"lacuna: error: lacuna batch: argument --processes: expected a whole "
                   f"number of at least 1, got '{given}' (see 'lacuna batch --help')"]
    with pytest.raises(InputError, match="field '--processes': expected a whole number"):
        run_local([], processes=0)


def test_missing_folder_is_refused(limits, tmp_path, capsys):
    assert main(["batch", str(tmp_path / "nowhere"), "--phantom", str(PHANTOM),
                 "--limits", str(limits), "--out", str(tmp_path / "o")]) == 2
    assert "expected a folder of sessions" in capsys.readouterr().err
