"""``lacuna assess`` on a clinical-size volume: time and peak memory against pydicom.

A plain script, not collected by the default test run. From the project folder:
``python tests/benchmarks/run_all.py clinical`` (or run this file directly).

The script writes a Breast Tomosynthesis file of 70 planes of 2000 x 2200 voxels
(0.1 mm pixels, 1 mm planes, uint16: about 616 MB; the size of a clinical DBT
reconstruction, common practice) and then, each in a fresh Python process, best of
:data:`RUNS`:

* the reference, ``pydicom.dcmread(path).pixel_array``;
* the whole ``lacuna assess FILE --phantom phantoms/lacuna-dbt-demo.yaml --limits
  thresholds/demo.yaml --no-history --out DIR --json FILE`` through ``qa.cli.main``.

Each child times its call (after importing ``pydicom`` or ``qa.cli``) and reports its
peak resident memory (``VmHWM`` of ``/proc/self/status``; the file is generated in a
child too). For information it also times Lacuna's reader alone: ``read_volume`` and
every plane read once. Targets
(project brief): assess time at most :data:`TIME_RATIO` x the reference's, assess peak
at most :data:`MEMORY_RATIO` x the file's size. Exits 1 if either is missed or if a
family did not measure.

The volume is drawn, not simulated (projections at this size would take far longer
than the check): the demo phantom Tern's objects are voxelised in place
(:func:`qa.simulate.voxelise.voxelise`, each object on a small grid of its own),
blurred in-plane by a Gaussian of :data:`BLUR_PX`, spread through depth as
shift-and-add of parallel rays over +-12.5 deg in 15 views does (plane ``z`` holds the
mean over the views of each object plane ``z'`` shifted along x by ``(z - z') tan
theta``), added to the slab's attenuation and white Gaussian noise of
:data:`NOISE_SD_PER_MM`. So the locator and every metric family run on real structure:
beads with out-of-focus copies, an edge plate, low-contrast disks and a noisy uniform
region. ``LACUNA_BENCH_SHAPE=nz,ny,nx`` sets another size (the field grows about the
phantom, whose objects must fit).
"""

from __future__ import annotations

import dataclasses
import json
import math
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402
from scipy import ndimage  # noqa: E402

TIME_RATIO = 3.0
MEMORY_RATIO = 1.5
RUNS = 3
SHAPE = (70, 2000, 2200)
SPACING_MM = (1.0, 0.1, 0.1)
HALF_ARC_DEG, VIEWS = 12.5, 15       # the demo's mid arc (phantoms/geometries/dbt-mid-arc.yaml)
BLUR_PX = 0.8                         # in-plane Gaussian SD, pixels: MTF50 ~ 2.3 lp/mm
NOISE_SD_PER_MM = 0.0015              # white noise; the disks' contrast is 0.0033 /mm
PHANTOM = ROOT / "phantoms" / "lacuna-dbt-demo.yaml"
LIMITS = ROOT / "thresholds" / "demo.yaml"

_CHILD = r"""
import json, resource, sys, time
def peak():
    # VmHWM is this process's own high-water mark; ru_maxrss keeps the parent's across
    # fork and exec on Linux, so it is used only where /proc is missing
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
what, path, out = sys.argv[1], sys.argv[2], sys.argv[3]
rc = None
if what == "make":
    sys.path.insert(0, sys.argv[4])
    import bench_clinical_assess as bench
    t0 = time.perf_counter()
    bench.make_volume_file(bench.Path(path), tuple(int(v) for v in sys.argv[5].split(",")))
    seconds = time.perf_counter() - t0
elif what == "pydicom":
    import pydicom
    t0 = time.perf_counter()
    arr = pydicom.dcmread(path).pixel_array
    seconds = time.perf_counter() - t0
elif what == "read":
    from qa.io import read_volume
    t0 = time.perf_counter()
    volume = read_volume(path)
    for plane in volume.data:
        pass
    seconds = time.perf_counter() - t0
else:
    import contextlib, io
    import qa.cli
    argv = ["assess", path] + sys.argv[4:]
    t0 = time.perf_counter()
    with contextlib.redirect_stdout(io.StringIO()):
        rc = qa.cli.main(argv)
    seconds = time.perf_counter() - t0
with open(out, "w") as fh:
    json.dump({"seconds": seconds, "peak_bytes": peak(), "rc": rc}, fh)
"""


def _axis(n: int, step: float, centre: float) -> np.ndarray:
    return centre + step * (np.arange(n) - (n - 1) / 2.0)


def _object_block(phantom, obj, delta, axes, margin_mm):
    """One object voxelised on the voxels of ``axes`` near it: (slices, block)."""
    from qa.phantom.model import Phantom
    from qa.simulate.recon.grid import ReconGrid
    from qa.simulate.voxelise import voxelise

    centre = obj.shape.centre_xyz_mm[::-1]               # (z, y, x)
    reach = obj.shape.bounding_radius_mm
    slices = []
    for a, c, extra in zip(axes, centre, (SPACING_MM[0], margin_mm, margin_mm)):
        idx = np.flatnonzero(np.abs(a - c) <= reach + extra)
        slices.append(slice(int(idx[0]), int(idx[-1]) + 1))
    grid = ReconGrid(*(a[s] for a, s in zip(axes, slices)))
    alone = Phantom("one object", "", phantom.energy_keV,
                    (dataclasses.replace(obj, mu_per_mm=delta),))
    block = voxelise(alone, grid, supersample=3).data
    return slices, ndimage.gaussian_filter(block, (0.0, BLUR_PX, BLUR_PX))


def _spread(data, z_mm, slices, block) -> None:
    """Add ``block`` to ``data`` as shift-and-add over the arc renders it (module notes)."""
    tans = np.tan(np.radians(np.linspace(-HALF_ARC_DEG, HALF_ARC_DEG, VIEWS)))
    dx = SPACING_MM[2]
    zs, ys, xs = slices
    reach = int(math.ceil(np.ptp(z_mm) * tans.max() / dx)) + 2
    x0, x1 = max(0, xs.start - reach), min(data.shape[2], xs.stop + reach)
    width = xs.stop - xs.start
    acc = np.zeros((data.shape[0], block.shape[1], x1 - x0), np.float32)
    for j, zj in enumerate(z_mm[zs]):
        plane = block[j] / VIEWS
        if not plane.any():
            continue
        for k, zk in enumerate(z_mm):
            for t in tans:
                s = (zk - zj) * t / dx + (xs.start - x0)
                n = int(math.floor(s))
                f = s - n
                if n < 0 or n + 1 + width > acc.shape[2]:
                    continue  # a copy past the side of the volume
                acc[k, :, n:n + width] += (1.0 - f) * plane
                acc[k, :, n + 1:n + 1 + width] += f * plane
    data[:, ys, x0:x1] += acc


def make_volume_file(path: Path, shape=SHAPE, *, seed: int = 20240611) -> Path:
    """Write the benchmark's Breast Tomosynthesis file (module notes); returns ``path``."""
    from qa.io import write_dicom
    from qa.phantom.load import load_phantom
    from qa.volume import Volume

    phantom = load_phantom(PHANTOM)
    nz, ny, nx = shape
    # z planes from 0 mm up; y about the phantom's middle, x centred on it
    axes = (SPACING_MM[0] * (np.arange(nz) + 0.5), _axis(ny, SPACING_MM[1], 24.0),
            _axis(nx, SPACING_MM[2], 0.0))
    data = np.empty(shape, np.float32)
    rng = np.random.default_rng(seed)
    slab = phantom.background
    (cx, cy, cz), (hx, hy, hz) = slab.shape.centre_xyz_mm, slab.shape.half_xyz_mm
    inside_y = np.flatnonzero(np.abs(axes[1] - cy) <= hy)
    inside_x = np.flatnonzero(np.abs(axes[2] - cx) <= hx)
    sy = slice(int(inside_y[0]), int(inside_y[-1]) + 1)
    sx = slice(int(inside_x[0]), int(inside_x[-1]) + 1)
    for k in range(nz):
        data[k] = rng.standard_normal((ny, nx), dtype=np.float32)
        data[k] *= NOISE_SD_PER_MM
        if abs(axes[0][k] - cz) <= hz:
            data[k, sy, sx] += slab.mu_per_mm
    margin = 4 * BLUR_PX * SPACING_MM[2] + 1.0
    for obj, delta in phantom.attenuating():
        if obj is slab:
            continue
        slices, block = _object_block(phantom, obj, delta, axes, margin)
        _spread(data, axes[0], slices, block)
    origin = tuple(float(a[0]) for a in axes)
    volume = Volume(data, SPACING_MM, origin, {"phantom": phantom.name})
    del data
    return write_dicom(volume, path, unit={"serial": "BENCH-DBT-1",
                                           "model": "Lacuna clinical-size benchmark"})


def _run_child(what: str, path: Path, work: Path, extra=()) -> dict:
    out = work / f"{what}-{time.monotonic_ns()}.json"
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    subprocess.run([sys.executable, "-c", _CHILD, what, str(path), str(out), *extra],
                   check=True, env=env, cwd=ROOT)
    return json.loads(out.read_text())


def _measured(json_path: Path) -> tuple[int, list]:
    metrics = json.loads(json_path.read_text())["metrics"]
    missing = [f"{k}: {v['note']}" for k, v in metrics.items() if v["value"] is None]
    return len(metrics), missing


def main(argv=None) -> int:
    shape = tuple(int(v) for v in os.environ.get("LACUNA_BENCH_SHAPE", "").split(",") if v) \
        or SHAPE
    with tempfile.TemporaryDirectory(prefix="lacuna-bench-") as tmp:
        work = Path(tmp)
        path = work / "clinical.dcm"
        made = _run_child("make", path, work, [str(Path(__file__).parent),
                                                ",".join(map(str, shape))])
        size = path.stat().st_size
        print(f"volume {shape} written in {made['seconds']:.0f} s: {size / 1e6:.0f} MB",
              flush=True)
        ref = [_run_child("pydicom", path, work) for _ in range(RUNS)]
        reads = [_run_child("read", path, work) for _ in range(RUNS)]
        runs = []
        for i in range(RUNS):
            out = work / f"out{i}"
            runs.append(_run_child("assess", path, work, [
                "--phantom", str(PHANTOM), "--limits", str(LIMITS), "--no-history",
                "--out", str(out), "--json", str(out / "results.json")]))
        n_metrics, missing = _measured(work / "out0" / "results.json")
    t_ref = min(r["seconds"] for r in ref)
    t_lac = min(r["seconds"] for r in runs)
    m_ref = max(r["peak_bytes"] for r in ref)
    m_lac = max(r["peak_bytes"] for r in runs)
    print("pydicom.dcmread(path).pixel_array: "
          + ", ".join(f"{r['seconds']:.2f}" for r in ref)
          + f" s; peak {m_ref / 1e6:.0f} MB = {m_ref / size:.2f} x the file")
    m_read = max(r["peak_bytes"] for r in reads)
    print("lacuna read_volume + every plane once: "
          + ", ".join(f"{r['seconds']:.2f}" for r in reads)
          + f" s; peak {m_read / 1e6:.0f} MB = {m_read / size:.2f} x the file")
    print("lacuna assess: " + ", ".join(f"{r['seconds']:.2f}" for r in runs)
          + f" s (exit {runs[0]['rc']}); peak {m_lac / 1e6:.0f} MB; "
          f"{n_metrics - len(missing)} of {n_metrics} metrics measured")
    for line in missing:
        print(f"  not measured: {line}")
    time_ratio, memory_ratio = t_lac / t_ref, m_lac / size
    print(f"time ratio   assess / pydicom read = {time_ratio:.2f} (target <= {TIME_RATIO:g})")
    print(f"memory ratio assess peak / file    = {memory_ratio:.2f} (target <= {MEMORY_RATIO:g})")
    ok = (time_ratio <= TIME_RATIO and memory_ratio <= MEMORY_RATIO and not missing
          and runs[0]["rc"] in (0, 1))
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
