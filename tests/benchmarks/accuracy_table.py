"""Accuracy table: each metric over its sweep against a truth Lacuna did not compute.

Usage::

    python tests/benchmarks/accuracy_table.py

Not part of the default test run (a few minutes on two cores). One row per metric:
the source of its truth, the number of cases, and the median and worst error (relative
in %, or absolute in the metric's unit, as the row says). Cases that come out "not
measured" are counted apart; a sweep is chosen inside each metric's valid range.
Builders come from the tests (tests/measure/test_robustness.py, test_coverage.py,
test_streak_ghosts.py), so the table and the tests measure the same things.
"""

from __future__ import annotations

import dataclasses
import importlib.util
import math
import sys
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]
sys.path.insert(0, str(ROOT))


def _load(name):
    path = ROOT / "tests" / "measure" / f"{name}.py"
    spec = importlib.util.spec_from_file_location(f"_acc_{name}", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def mtf_rows(rob):
    from qa.measure import mtf  # noqa: F401  (registers the family)
    rows = {key: ([], 0) for key in ("50 noiseless", "10 noiseless", "noisy")}
    for sigma_px in (0.7, 1.0, 1.5, 2.0):
        for angle in (2.0, 4.0, 8.0):
            for noise in (0.0, 1.0):
                clean = rob.plate_plane(angle, sigma_px=sigma_px)
                plane = clean + np.random.default_rng(7).normal(0, noise, clean.shape)
                got = rob.mtf_of(plane, rob.plate_phantom(angle))
                for level in (50, 10):
                    truth = rob.mtf50_truth(sigma_px, level / 100)
                    key = "noisy" if noise else f"{level} noiseless"
                    for d in ("x", "y"):
                        m = got[f"mtf{level}_{d}"]
                        errors, missing = rows[key]
                        if m.value is None:
                            rows[key] = (errors, missing + 1)
                        else:
                            errors.append((100 * (m.value / truth - 1),
                                           100 * m.uncertainty / truth if noise else None))
    truth = "closed form: Gaussian-blurred pixel-integrated edge"
    return [("MTF50 (x, y)", truth, *rows["50 noiseless"], "relative %"),
            ("MTF10 (x, y)", truth, *rows["10 noiseless"], "relative %"),
            ("MTF50, MTF10 in noise", truth, *rows["noisy"], "relative %")]


def asf_rows(rob):
    errors, missing = [], 0
    for fwhm in (3.0, 4.5, 6.0, 8.0, 10.0, 12.0):
        for noise, seed in ((0.0, 0), (0.1, 1), (0.1, 2)):
            m = rob.asf_fwhm(noise, seed, fwhm_mm=fwhm)
            if m.value is None:
                missing += 1
            else:
                errors.append((100 * (m.value / fwhm - 1),
                               100 * m.uncertainty / fwhm if noise else None))
    return ("ASF FWHM", "closed form: Gaussian depth profile", errors, missing, "relative %")


def streak_and_coverage_rows(cov):
    from qa.locate.nominal import locate_nominal
    from qa.measure import coverage, streak
    from qa.simulate.acquire import detect, expected_transmissions
    from qa.simulate.recon import reconstruct

    half, arc, missing_s, missing_c = [], [], 0, 0
    for name in cov.ARCS:
        for n0 in (None, 400.0):
            g = cov.small_geometry(name, photons_per_pixel=n0)
            t = expected_transmissions(cov.bead_phantom(), g)
            proj = detect(t, g, seed=11, noise=n0 is not None)
            for recon in ("saa", "fbp"):
                vol = reconstruct(proj, cov.GRID, method=recon)
                layout = locate_nominal(vol, cov.bead_phantom())
                s = streak.measure_streak(vol, layout).measurements[0]
                c = coverage.measure(vol, layout).measurements[0]
                ray = cov.ray_half_angle(g, cov.BEAD_Z)
                if s.value is None:
                    missing_s += 1
                else:
                    half.append((s.value - ray, s.uncertainty if n0 else None))
                if c.value is None:
                    missing_c += 1
                else:
                    arc.append((c.value - g.half_arc_deg, c.uncertainty if n0 else None))
    return [("streak half-angle", "geometry: half-angle of the rays through the bead",
             half, missing_s, "absolute deg"),
            ("coverage half-arc", "geometry: the arc's half-angle (nominal views)",
             arc, missing_c, "absolute deg")]


def ghost_rows(gho):
    from qa.measure import streak

    errors, missing = [], 0
    for name in gho.ARCS:
        g = gho.small_geometry(name)
        for radius in (0.15, 0.25):
            _, res = gho.run(g, radius)
            m = {m.name: m for m in res.measurements}["streak_ghost_spacing"]
            if m.value is None:
                missing += 1
                continue
            rays = gho.ray_positions(g, res.plot_data["ghosts"]["offset_mm"])
            truth = (rays[-1] - rays[0]) / (len(rays) - 1)
            errors.append((100 * (m.value / truth - 1), None))       # noiseless
    del streak
    return ("streak ghost spacing", "geometry: spacing of the rays through the bead",
            errors, missing, "relative %")


def nps_rows():
    from qa.locate.layout import Layout, Placed
    from qa.measure import noise
    from qa.phantom.model import Phantom, PhantomObject, Shape
    from qa.volume import Volume

    errors = []
    flat = PhantomObject("flat", "uniform", Shape("box", (15.0, 15.0, 5.0), (12.0, 12.0, 2.0)),
                         None, None)
    layout = Layout(Phantom("w", "", 20.0, (flat,), "w.yaml"), {"flat": Placed(flat, flat.shape)})
    for sigma in (0.5, 1.0, 2.5, 10.0):
        for seed in range(3):
            data = 100.0 + np.random.default_rng(seed).normal(0, sigma, (1, 300, 300))
            vol = Volume(data, (1.0, 0.1, 0.1), (5.0, 0.0, 0.0))
            m = {m.name: m for m in noise.measure(vol, layout, None).measurements}["noise_sd"]
            errors.append((100 * (m.value ** 2 / sigma ** 2 - 1), 200 * m.uncertainty * m.value / sigma ** 2))
    return ("NPS integral", "closed form: variance of the white noise drawn", errors, 0,
            "relative %")


def dprime_rows(rob):
    from qa.locate import locate
    from qa.measure import detectability

    d_err, s_err = [], []
    for sigma in (0.5, 1.0, 2.0):
        for shift in ((0.0, 0.0), (2.0, -2.0)):
            vol, ph = rob.disk_scene(shift=shift, sigma=sigma, seed=int(10 * sigma) + 1)
            got = {m.name: m for m in detectability.measure(vol, locate(vol, ph), None).measurements}
            for did, _, _, d in rob.DISKS:
                truth = math.sqrt(rob.pixels_in_disk(d)) / sigma
                m = got[f"dprime_npw_{did}"]
                d_err.append((100 * (m.value / truth - 1), 100 * m.uncertainty / truth))
                m = got[f"sdnr_{did}"]
                s_err.append((100 * (m.value * sigma - 1), 100 * m.uncertainty * sigma))
    return [("NPW d'", "closed form: ΔC √N / σ (white noise)", d_err, 0, "relative %"),
            ("SDNR", "closed form: ΔC / σ (white noise)", s_err, 0, "relative %")]


def main(argv=None) -> int:
    rob, cov, gho = _load("test_robustness"), _load("test_coverage"), _load("test_streak_ghosts")
    rows = [*mtf_rows(rob), asf_rows(rob), *streak_and_coverage_rows(cov), ghost_rows(gho),
            nps_rows(), *dprime_rows(rob)]
    head = (f"{'metric':<22} {'truth':<52} {'cases':>5} {'n.m.':>4} {'median':>8} {'worst':>8} "
            f"{'worst/u':>7}  error")
    print(head)
    print("-" * len(head))
    for name, truth, errors, missing, kind in rows:
        e = np.asarray([v[0] for v in errors], float)
        u = np.asarray([np.nan if v[1] is None else v[1] for v in errors], float)
        med = float(np.median(np.abs(e))) if e.size else float("nan")
        worst = float(e[np.argmax(np.abs(e))]) if e.size else float("nan")
        z = np.abs(e) / np.where(u > 0, u, np.nan)
        zmax = float(np.nanmax(z)) if np.isfinite(z).any() else float("nan")
        print(f"{name:<22} {truth:<52} {e.size:>5} {e.size and missing:>4} {med:>8.3f} "
              f"{worst:>+8.3f} {zmax:>7.1f}  {kind}".replace("    nan", "    n/a"))
    print("\nmedian: of |error|; worst: the signed error of largest size; worst/u: the "
          "largest |error| over its stated uncertainty (k = 1) among the noisy cases (none: "
          "noiseless only); n.m.: not measured.")
    return 0


if __name__ == "__main__":
    sys.exit(main())
