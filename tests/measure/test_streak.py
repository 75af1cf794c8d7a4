"""Streak artefact spread and ASF of a bead in simulated shift-and-add reconstructions."""

import dataclasses
import math

import numpy as np
import pytest

from qa import PROJECT_ROOT
from qa.locate.nominal import locate_nominal
from qa.measure.asf import measure_asf
from qa.measure.streak import extent, fit_half_angle, measure_streak
from qa.phantom.model import Phantom, PhantomObject, Shape
from qa.simulate.acquire import detect, expected_transmissions, simulate_projections
from qa.simulate.geometry import Detector
from qa.simulate.profiles import load_geometry
from qa.simulate.recon import reconstruct
from qa.simulate.recon.grid import ReconGrid

BEAD_Z = 20.5


def bead_phantom(radius=0.5):
    bead = PhantomObject("bead", "bead", Shape("ellipsoid", (0.0, 0.0, BEAD_Z), (radius,) * 3),
                         "aluminium", 0.9)
    return Phantom("bead-only", "", 20.0, (bead,))


def small_geometry(name):
    """A shipped profile on a detector just large enough for the bead's shadows."""
    g = load_geometry(PROJECT_ROOT / "phantoms" / "geometries" / f"{name}.yaml")
    det = Detector(0.1, 520, 100, (-25.95, -4.95))
    return dataclasses.replace(g, detector=det, photons_per_pixel=None, motion="step-and-shoot",
                               sweep_deg=0.0, motion_samples=1)


@pytest.fixture(scope="module")
def saa_volumes():
    out = {}
    grid = ReconGrid.from_field((-16, 16), (-4, 4), (0, 41), pixel_mm=0.1, plane_mm=1.0)
    for name in ("dbt-narrow-arc", "dbt-mid-arc", "dbt-wide-arc"):
        g = small_geometry(name)
        proj = simulate_projections(bead_phantom(), g, noise=False)
        out[name] = (g, reconstruct(proj, grid, method="saa"))
    return out


def ray_half_angle(g, z):
    """Half-angle of the extreme rays through a point at height z on the axis."""
    s = g.source_xyz(max(g.angles_deg))
    return math.degrees(math.atan(s[0] / (s[2] - z)))


@pytest.mark.parametrize("name", ["dbt-narrow-arc", "dbt-mid-arc", "dbt-wide-arc"])
def test_half_angle_of_shift_and_add(saa_volumes, name):
    # Geometry of shift-and-add (DEVELOPERS.md, streak spread): the copies of the bead
    # reach d + 2 |dz| tan(alpha), alpha the half-angle of the rays through the bead.
    # Required within 1.5 degrees of the arc's half-angle; we also hold it to 0.5
    # degrees of the exact ray half-angle at the bead's height.
    g, vol = saa_volumes[name]
    layout = locate_nominal(vol, bead_phantom())
    m = measure_streak(vol, layout).measurements[0]
    assert m.value == pytest.approx(g.half_arc_deg, abs=1.5)
    assert m.value == pytest.approx(ray_half_angle(g, BEAD_Z), abs=0.5)
    assert m.uncertainty is not None and m.uncertainty < 0.5


def test_asf_width_times_tan_half_arc_is_constant(saa_volumes):
    # Geometry of shift-and-add: a bead's contrast falls as its copies separate, i.e.
    # over |dz| ~ d / tan(alpha), so FWHM * tan(alpha) is the same for every arc
    # (issue 3: constant within 10 %).
    products = []
    for name, (g, vol) in saa_volumes.items():
        layout = locate_nominal(vol, bead_phantom())
        fwhm = {m.name: m for m in measure_asf(vol, layout).measurements}["asf_fwhm"].value
        products.append(fwhm * math.tan(math.radians(g.half_arc_deg)))
    assert max(products) / min(products) - 1 < 0.10


def test_extent_of_a_box_profile():
    # A box of width 4 mm sampled at 0.1 mm: the extent above half its height is 4 mm
    # (linear interpolation at the edges is exact for a step of one sample).
    x = np.arange(-100, 101) * 0.1
    y = (np.abs(x) <= 2.0).astype(float)
    assert extent(x, y, 0.5, 0.0) == pytest.approx(4.1, abs=0.11)
    # Reaching the end of the profile: unknown extent.
    assert extent(x, np.ones_like(x), 0.5, 0.0) is None


def test_fit_rejects_an_outlier():
    dz = np.arange(2, 20, dtype=float)
    e = 1.0 + 2 * np.tan(np.radians(12.0)) * dz
    e[3] = 0.1
    angle, sd, a, b, keep = fit_half_angle(dz, e)
    assert angle == pytest.approx(12.0, abs=1e-6)
    assert not keep[3] and keep.sum() == len(dz) - 1


@pytest.mark.slow
def test_half_angle_uncertainty_covers_the_ray_half_angle_in_noisy_repeats():
    # Project requirement: the stated uncertainty (k = 1), expanded to k = 2 (95 % for a
    # normal error, common practice), covers the error against the truth in at least 90 %
    # of 50 seeded noisy repeats of one case. Case: shift-and-add over the mid arc at 250
    # quanta per pixel (every repeat measured; noise raises some planes' threshold).
    # Truth: the half-angle of the extreme rays through the bead, from the source
    # positions (geometry, not the family). Without the method's bound in u, the fit's
    # SD alone (0.04 degree) covered 34 % of the repeats: a 0.1 degree bias dominated.
    g = dataclasses.replace(small_geometry("dbt-mid-arc"), photons_per_pixel=250.0)
    t = expected_transmissions(bead_phantom(), g)
    truth = ray_half_angle(g, BEAD_Z)
    grid = ReconGrid.from_field((-16, 16), (-4, 4), (0, 41), pixel_mm=0.1, plane_mm=1.0)
    values, stated = [], []
    for seed in range(50):
        vol = reconstruct(detect(t, g, seed=seed), grid, method="saa")
        m = measure_streak(vol, locate_nominal(vol, bead_phantom())).measurements[0]
        assert m.value is not None, (seed, m.note)
        values.append(m.value)
        stated.append(m.uncertainty)
    err, u = np.abs(np.array(values) - truth), np.array(stated)
    assert np.mean(err <= 2 * u) >= 0.90, (err.max(), u.min())
