"""Batch runs over a folder tree: pool, Dask and a single run give the same figures."""

import dataclasses
import json

import numpy as np
import pytest

from qa import PROJECT_ROOT
from qa.batch import assess_task, find_sessions, run_local
from qa.cli import main
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
    return {k: v for k, v in outcome.metrics.items()}


def test_pool_and_single_runs_agree(tree, limits, tmp_path):
    tasks = [t for t in find_sessions([tree], phantom=str(PHANTOM), limits=str(limits),
                                      out_dir=str(tmp_path / "a"), history=None)
             if "broken" not in t.source][:3]
    alone = [assess_task(t) for t in tasks]
    pooled = run_local([dataclasses.replace(t, out_dir=str(tmp_path / "b")) for t in tasks],
                       processes=2, progress=False)
    assert all(o.ok for o in alone + pooled)
    assert [_figures(o) for o in alone] == [_figures(o) for o in pooled]


def test_dask_cluster_gives_the_same_figures(tree, limits, tmp_path):
    distributed = pytest.importorskip("dask.distributed")
    from qa.batch import run_dask

    tasks = [t for t in find_sessions([tree], phantom=str(PHANTOM), limits=str(limits),
                                      out_dir=str(tmp_path / "a"), history=None)
             if "broken" not in t.source][:2]
    alone = [assess_task(t) for t in tasks]
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster:
        on_dask = run_dask([dataclasses.replace(t, out_dir=str(tmp_path / "d")) for t in tasks],
                           scheduler=cluster.scheduler_address, progress=False)
    assert [_figures(o) for o in alone] == [_figures(o) for o in on_dask]


def test_missing_folder_is_refused(limits, tmp_path, capsys):
    assert main(["batch", str(tmp_path / "nowhere"), "--phantom", str(PHANTOM),
                 "--limits", str(limits), "--out", str(tmp_path / "o")]) == 2
    assert "expected a folder of sessions" in capsys.readouterr().err
