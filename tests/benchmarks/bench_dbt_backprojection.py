"""Speed and memory of DBT backprojection against scipy.ndimage.affine_transform.

A plain script, not collected by the default test run. From the project folder:
``PYTHONPATH=. python tests/benchmarks/bench_dbt_backprojection.py``.

Problem: 512 x 512 x 50 voxels (0.1 mm pixels, 1 mm planes) backprojected from the 15
views of ``phantoms/geometries/dbt-mid-arc.yaml`` (900 x 660 detector). Compared, in the
same run and interleaved (best of several repeats: the machine is shared and noisy):

- the plain scipy way: ``scipy.ndimage.affine_transform`` (order 1, constant 0
  outside) of each view onto each plane with the plane's scale-and-shift, summed
  over views, planes spread over ``ThreadPoolExecutor(2)``. The scale-and-shift is
  diagonal and is passed in the form scipy documents for a diagonal matrix (a 1-D
  array), its fastest path; one run with the same matrix as a full 2 x 2 array is
  timed for information;
- ``grid.sample`` per plane per view (the kernel of shift-and-add and FBP) in the same
  two-thread harness: the like-for-like comparison of the two kernels;
- the same ``grid.sample`` loop on one thread, exactly as ``saa.py`` and ``fbp.py`` run
  it today (they do not spread planes over threads), for information;
- ``DbtProjector.adjoint`` (Aᵀ of the iterative methods), two threads; the projector
  is built once, as the iterative methods build it, and its build time is printed.

Targets (project brief): grid.sample (two threads) and Aᵀ at least 2.5 x as fast as
scipy, and peak
memory under 1 GB, measured in a fresh subprocess that builds the inputs and runs one
backprojection: its resident high-water mark (``VmHWM``; ``resource.getrusage`` where
that is missing) and, for information, the peak of ``tracemalloc``. The script
prints every number and exits with status 1 if a target is missed.
"""

from __future__ import annotations

import os

os.environ["LACUNA_THREADS"] = "2"  # Aᵀ uses two threads, like the scipy baseline

import resource  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
import tracemalloc  # noqa: E402
from concurrent.futures import ThreadPoolExecutor  # noqa: E402

import numpy as np  # noqa: E402
from scipy import ndimage  # noqa: E402

from qa import PROJECT_ROOT  # noqa: E402
from qa.simulate.profiles import load_geometry  # noqa: E402
from qa.simulate.recon.grid import ReconGrid, plane_taps, sample  # noqa: E402
from qa.simulate.recon.projector import DbtProjector  # noqa: E402
from timing import best_of  # noqa: E402

REPEATS = 5
TARGET_RATIO = 2.5
TARGET_PEAK_MB = 1024.0


def setup():
    geometry = load_geometry(PROJECT_ROOT / "phantoms" / "geometries" / "dbt-mid-arc.yaml")
    grid = ReconGrid.from_field((-25.6, 25.6), (0.0, 51.2), (0.0, 50.0), pixel_mm=0.1,
                                plane_mm=1.0)
    rng = np.random.default_rng(7)
    data = rng.uniform(0.0, 1.0, (geometry.n_views,) + geometry.detector.shape)
    return geometry, grid, data.astype(np.float32)


def backproject_sample(geometry, grid, data, *, threads=1):
    """The backprojection loop of shift-and-add and FBP (qa/simulate/recon/saa.py),
    planes spread over ``threads`` threads (1: as saa.py and fbp.py run it)."""
    out = np.zeros(grid.shape, dtype=np.float32)
    sources = geometry.nominal_sources()

    def plane(k):
        acc = np.zeros(grid.shape[1:])
        for i, src in enumerate(sources):
            cols, rows = plane_taps(src, grid.z_mm[k], grid, geometry.detector)
            acc += sample(data[i], cols, rows)
        out[k] = acc

    if threads == 1:
        for k in range(grid.shape[0]):
            plane(k)
    else:
        with ThreadPoolExecutor(max_workers=threads) as pool:
            list(pool.map(plane, range(grid.shape[0])))
    return out


def backproject_scipy(geometry, grid, data, *, full_matrix=False):
    """Each view mapped onto each plane by affine_transform, two threads over planes."""
    det = geometry.detector
    u0, v0 = det.first_centre_xy_mm
    p = det.pitch_mm
    dy, dx = grid.spacing_mm[1:]
    sources = geometry.nominal_sources()
    out = np.zeros(grid.shape, dtype=np.float32)

    def plane(k):
        z = grid.z_mm[k]
        acc = np.zeros(grid.shape[1:])
        buf = np.empty(grid.shape[1:])
        for i, (sx, sy, sz) in enumerate(sources):
            m = sz / (sz - z)
            # Detector index = scale * voxel index + offset, per axis (grid.py's mapping).
            scale = np.array([m * dy / p, m * dx / p])
            offset = [(sy + (grid.y_mm[0] - sy) * m - v0) / p,
                      (sx + (grid.x_mm[0] - sx) * m - u0) / p]
            matrix = np.diag(scale) if full_matrix else scale
            ndimage.affine_transform(data[i], matrix, offset=offset, output=buf, order=1,
                                     mode="constant", cval=0.0, output_shape=grid.shape[1:])
            acc += buf
        out[k] = acc

    with ThreadPoolExecutor(max_workers=2) as pool:
        list(pool.map(plane, range(grid.shape[0])))
    return out


def peak_mb(method: str) -> tuple[float, float]:
    """Peak resident memory and peak traced allocations (MB) of a fresh process that
    builds the inputs and runs one backprojection."""
    done = subprocess.run([sys.executable, __file__, "--peak", method], check=True,
                          capture_output=True, text=True, env=dict(os.environ))
    rss, traced = done.stdout.strip().splitlines()[-1].split()
    return float(rss), float(traced)


def _peak_rss_mb() -> float:
    """VmHWM, the resident high-water mark of this process image (Linux). ru_maxrss is
    the fallback; on Linux it can carry the parent's size over from the fork."""
    try:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return float(line.split()[1]) / 1024.0
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # pragma: no cover


def run_for_peak(method: str) -> None:
    tracemalloc.start()
    geometry, grid, data = setup()
    if method == "sample":
        backproject_sample(geometry, grid, data, threads=2)
    elif method == "adjoint":
        DbtProjector(geometry, grid).adjoint(data)
    else:
        backproject_scipy(geometry, grid, data)
    traced = tracemalloc.get_traced_memory()[1] / 2 ** 20
    print(f"{_peak_rss_mb():.1f} {traced:.1f}")


def main() -> int:
    geometry, grid, data = setup()
    print(f"grid {grid.shape} voxels, {geometry.n_views} views, detector "
          f"{geometry.detector.shape}, {REPEATS} repeats (best of)")
    start = time.perf_counter()
    projector = DbtProjector(geometry, grid)
    build = time.perf_counter() - start

    ref = backproject_scipy(geometry, grid, data)
    ours = backproject_sample(geometry, grid, data)
    # The same operator: agreement inside the field (away from the detector's last
    # pixel, where the two treat "outside" differently) to float32 rounding.
    inner = (slice(None), slice(2, -2), slice(2, -2))
    diff = float(np.max(np.abs(ours[inner] - ref[inner])) / np.max(np.abs(ref)))
    print(f"grid.sample loop vs affine_transform: max relative difference {diff:.1e}")

    t_sample, t_single, t_adjoint, t_scipy = best_of(repeats=REPEATS, functions=[
        lambda: backproject_sample(geometry, grid, data, threads=2),
        lambda: backproject_sample(geometry, grid, data),
        lambda: projector.adjoint(data),
        lambda: backproject_scipy(geometry, grid, data)])
    start = time.perf_counter()
    backproject_scipy(geometry, grid, data, full_matrix=True)
    t_full = time.perf_counter() - start
    r_sample, r_adjoint = t_scipy / t_sample, t_scipy / t_adjoint
    print(f"scipy affine_transform, 2 threads: {t_scipy:.2f} s "
          f"(full 2 x 2 matrix, one run: {t_full:.2f} s)")
    print(f"grid.sample, 2 threads:            {t_sample:.2f} s, ratio {r_sample:.2f} "
          f"(target >= {TARGET_RATIO})")
    print(f"grid.sample, 1 thread (as saa/fbp): {t_single:.2f} s, ratio "
          f"{t_scipy / t_single:.2f} (for information)")
    print(f"DbtProjector.adjoint, 2 threads:   {t_adjoint:.2f} s, ratio {r_adjoint:.2f} "
          f"(target >= {TARGET_RATIO}); projector built once in {build:.2f} s, ratio "
          f"with the build {t_scipy / (t_adjoint + build):.2f}")
    ok = r_sample >= TARGET_RATIO and r_adjoint >= TARGET_RATIO and diff < 1e-5
    for method in ("sample", "adjoint", "scipy"):
        rss, traced = peak_mb(method)
        print(f"peak memory, {method}: resident {rss:.0f} MB, traced allocations "
              f"{traced:.0f} MB (target < {TARGET_PEAK_MB:.0f} MB resident)")
        ok &= rss < TARGET_PEAK_MB
    print("all targets met" if ok else "a target was missed")
    return 0 if ok else 1


if __name__ == "__main__":
    if len(sys.argv) == 3 and sys.argv[1] == "--peak":
        run_for_peak(sys.argv[2])
        sys.exit(0)
    sys.exit(main())
