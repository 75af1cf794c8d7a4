"""Ghost spacing of a bead's out-of-focus copies (qa.measure.streak) in step-and-shoot
shift-and-add reconstructions.

Outside check: the geometry of the simulated acquisition. The copy from view i in plane
z_b + dz lies where the ray from source i through the bead crosses that plane,
x_i = x_b + dz (x_b - s_x,i) / (z_b - s_z,i), from the source positions alone.
"""

import dataclasses

import numpy as np
import pytest
from matplotlib.figure import Figure

from qa import PROJECT_ROOT
from qa.locate.nominal import locate_nominal
from qa.measure import find_spec, streak
from qa.phantom.model import Phantom, PhantomObject, Shape
from qa.simulate.acquire import simulate_projections
from qa.simulate.geometry import Detector
from qa.simulate.profiles import load_geometry
from qa.simulate.recon import reconstruct
from qa.simulate.recon.grid import ReconGrid
from qa.volume import Volume

BEAD_Z = 20.5
GRID = ReconGrid.from_field((-16, 16), (-4, 4), (0, 41), pixel_mm=0.1, plane_mm=1.0)
ARCS = ("dbt-narrow-arc", "dbt-mid-arc", "dbt-wide-arc")


def bead_phantom(radius):
    bead = PhantomObject("bead", "bead", Shape("ellipsoid", (0.0, 0.0, BEAD_Z), (radius,) * 3),
                         "aluminium", 0.9)
    return Phantom("bead-only", "", 20.0, (bead,))


def small_geometry(name, **changes):
    """A shipped profile on a small detector (as tests/measure/test_streak.py builds it)."""
    g = load_geometry(PROJECT_ROOT / "phantoms" / "geometries" / f"{name}.yaml")
    base = dict(detector=Detector(0.1, 520, 100, (-25.95, -4.95)), photons_per_pixel=None,
                motion="step-and-shoot", sweep_deg=0.0, motion_samples=1)
    base.update(changes)
    return dataclasses.replace(g, **base)


def ray_positions(g, dz, x_b=0.0, z_b=BEAD_Z):
    """Where the rays from each source through the bead cross the plane z_b + dz."""
    s = g.nominal_sources()
    return np.sort(x_b + dz * (x_b - s[:, 0]) / (z_b - s[:, 2]))


def run(g, radius):
    ph = bead_phantom(radius)
    vol = reconstruct(simulate_projections(ph, g, noise=False), GRID, method="saa")
    return vol, streak.measure_streak(vol, locate_nominal(vol, ph))


@pytest.fixture(scope="module")
def small_beads():
    # A 0.5 mm bead: its copies (0.5 mm wide) separate once they are 0.6-0.8 mm apart.
    return {name: (small_geometry(name), *run(small_geometry(name), 0.25)) for name in ARCS}


@pytest.mark.parametrize("name", ARCS)
def test_spacing_matches_the_rays_through_the_bead(small_beads, name):
    g, _, res = small_beads[name]
    m = {m.name: m for m in res.measurements}["streak_ghost_spacing"]
    assert m.unit == "mm" and m.value is not None, m.note
    ghosts = res.plot_data["ghosts"]
    dz = ghosts["offset_mm"]
    assert dz == pytest.approx(20.0)          # the largest offset inside the volume
    rays = ray_positions(g, dz)
    expected = (rays[-1] - rays[0]) / (len(rays) - 1)
    # Issue: within 10 % of the spacing of the rays through the bead.
    assert m.value == pytest.approx(expected, rel=0.10)
    # First-order form of the issue, dz (tan t_i+1 - tan t_i) with t the source angles,
    # as a coarser check (the rays' angles at the bead differ from the sources' by up
    # to 0.7 degree, about 4 % of the spacing here).
    t = np.tan(np.radians(sorted(g.angles_deg)))
    assert m.value == pytest.approx(dz * (t[-1] - t[0]) / (len(t) - 1), rel=0.10)
    # Every view's copy is found, each within 10 % of its local spacing of its ray.
    for sign in (-1.0, 1.0):
        pos = ghosts["peaks"].get(sign * dz)
        if pos is None:
            continue
        assert len(pos) == g.n_views
        local = np.diff(ray_positions(g, sign * dz)).min()
        assert np.max(np.abs(pos - ray_positions(g, sign * dz))) < 0.10 * local
    assert ghosts["copies"] == g.n_views and f"{g.n_views} copies" in m.note
    assert m.uncertainty is not None and m.uncertainty < 0.05 * m.value


def test_continuous_motion_blurs_the_copies_together():
    # Continuous motion sweeping the whole step between views (1.875 degrees) spreads
    # each copy over the gap to the next: no separate copies.
    g0 = small_geometry("dbt-narrow-arc")
    step = g0.angles_deg[1] - g0.angles_deg[0]
    g = dataclasses.replace(g0, motion="continuous", sweep_deg=step, motion_samples=8)
    _, res = run(g, 0.25)
    got = {m.name: m for m in res.measurements}
    m = got["streak_ghost_spacing"]
    assert m.value is None and "merge" in m.note
    assert got["streak_half_angle"].value is not None    # the spread itself is still measured


def test_too_few_offsets_is_not_measured(small_beads):
    _, vol, _ = small_beads["dbt-mid-arc"]
    thin = Volume(vol.data[15:27], vol.spacing_mm, vol.to_mm((15, 0, 0)))
    res = streak.measure_streak(thin, locate_nominal(thin, bead_phantom(0.25)))
    m = {m.name: m for m in res.measurements}["streak_ghost_spacing"]
    # Offsets of 2-6 mm only: copies 0.2 mm apart or less, narrower than the bead.
    assert m.value is None and "planes (needs 3)" in m.note


def test_ghost_peaks_of_a_comb():
    # Five Gaussian copies 1 mm apart on a 0.1 mm grid: found at their centres (closed
    # form; the parabola through three samples of a Gaussian of SD 0.15 mm is within
    # 0.01 mm of its peak).
    x = np.arange(-60, 61) * 0.1
    centres = np.array([-2.0, -1.0, 0.0, 1.0, 2.0]) + 0.03
    p = sum(0.05 * np.exp(-0.5 * ((x - c) / 0.15) ** 2) for c in centres)
    pos = streak.ghost_peaks(x, p, 0.01, 1e-4)
    assert pos is not None and np.allclose(pos, centres, atol=0.01)
    # One copy missing in the middle: one gap doubles, so not resolved.
    assert streak.ghost_peaks(x, p - 0.05 * np.exp(-0.5 * ((x - 0.03) / 0.15) ** 2),
                              0.01, 1e-4) is None
    # Copies merged into a plateau: no peaks.
    assert streak.ghost_peaks(x, 0.05 * (np.abs(x) < 2.0), 0.01, 1e-4) is None


def test_registered_and_drawn(small_beads):
    spec = find_spec("streak_ghost_spacing")
    assert spec.unit == "mm" and spec.better == "band"
    assert isinstance(streak.plot_streak(small_beads["dbt-wide-arc"][2]), Figure)
