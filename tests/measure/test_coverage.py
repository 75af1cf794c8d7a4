"""Angular coverage (qa.measure.coverage) on small simulated DBT reconstructions of a bead.

Outside checks: the Fourier slice theorem (a line in the x–z plane puts its energy on
the orientation of its normal) and the geometry of the simulated acquisitions (the arc's
half-angle, and the half-angle of the rays through the bead computed from the source
positions), neither of them computed by the family.
"""

import dataclasses
import math

import numpy as np
import pytest
from matplotlib.figure import Figure

from qa import PROJECT_ROOT
from qa.locate.layout import Layout, Placed
from qa.locate.nominal import locate_nominal
from qa.measure import coverage, families, find_spec
from qa.phantom.model import Phantom, PhantomObject, Shape
from qa.simulate.acquire import detect, expected_transmissions, simulate_projections
from qa.simulate.geometry import Detector
from qa.simulate.profiles import load_geometry
from qa.simulate.recon import reconstruct
from qa.simulate.recon.grid import ReconGrid
from qa.volume import Volume

BEAD_Z = 20.5
ARCS = ("dbt-narrow-arc", "dbt-mid-arc", "dbt-wide-arc")
GRID = ReconGrid.from_field((-16, 16), (-4, 4), (0, 41), pixel_mm=0.1, plane_mm=1.0)


def bead_phantom(radius=0.5, analysis=None):
    bead = PhantomObject("bead", "bead", Shape("ellipsoid", (0.0, 0.0, BEAD_Z), (radius,) * 3),
                         "aluminium", 0.9)
    return Phantom("bead-only", "", 20.0, (bead,), "bead.yaml", analysis or {})


def small_geometry(name, **changes):
    """A shipped profile on a detector just large enough for the bead's shadows
    (as tests/measure/test_streak.py builds it), step-and-shoot unless changed."""
    g = load_geometry(PROJECT_ROOT / "phantoms" / "geometries" / f"{name}.yaml")
    det = Detector(0.1, 520, 100, (-25.95, -4.95))
    base = dict(detector=det, photons_per_pixel=None, motion="step-and-shoot", sweep_deg=0.0,
                motion_samples=1)
    base.update(changes)
    return dataclasses.replace(g, **base)


def ray_half_angle(g, z, x=0.0):
    """Mean of the two extreme ray angles from z through a point (x, z): the half-range
    of the rays through it, from the source positions."""
    s = g.nominal_sources()
    angles = np.degrees(np.arctan2(s[:, 0] - x, s[:, 2] - z))
    return 0.5 * (angles.max() - angles.min())


def measure(volume, phantom=None):
    phantom = phantom or bead_phantom()
    return coverage.measure(volume, locate_nominal(volume, phantom)).measurements[0]


@pytest.fixture(scope="module")
def volumes():
    out = {}
    for name in ARCS:
        g = small_geometry(name)
        proj = simulate_projections(bead_phantom(), g, noise=False)
        for recon in ("saa", "fbp"):
            out[name, recon] = (g, reconstruct(proj, GRID, method=recon))
    return out


@pytest.mark.parametrize("recon", ["saa", "fbp"])
def test_estimate_follows_the_arc(volumes, recon):
    got = []
    for name in ARCS:
        g, vol = volumes[name, recon]
        m = measure(vol)
        assert m.unit == "deg" and m.value is not None, m.note
        # Required accuracy (issue): within 3 degrees of the arc's half-angle.
        assert m.value == pytest.approx(g.half_arc_deg, abs=3.0), name
        # Tighter, against the rays through the bead (source positions): the half-maximum
        # edge of a fan of views lies between the outermost ray and that plus half the
        # view step (0.9-1.0 degrees here, module notes), plus 0.5 degree for the fit.
        step = g.angles_deg[1] - g.angles_deg[0]
        ray = ray_half_angle(g, BEAD_Z)
        assert ray - 0.5 <= m.value <= ray + step / 2 + 0.5, name
        # The jackknife part stays under 0.5 degree; u adds the method's bound (module notes).
        bound = coverage.METHOD_BOUND_DEG / math.sqrt(3)
        assert m.uncertainty is not None and bound < m.uncertainty < math.hypot(0.5, bound)
        got.append(m.value)
    assert got[0] < got[1] < got[2]          # increases with the true arc


def test_visible_edges_have_their_normal_near_x(volumes):
    # Microlocal visibility (Quinto 1993) in our axes: rays within a of z see boundaries
    # whose normal is within a of x. With the widest observable band (85 degrees) the
    # energy sits around phi = 0 (normal along x, source travel) and is absent near
    # phi = 90 degrees (normal along z, the bead's top and bottom).
    g, vol = volumes["dbt-mid-arc", "fbp"]
    res = coverage.measure(vol, locate_nominal(vol, bead_phantom(
        analysis={"coverage": {"max_orientation_deg": 85.0}})))
    phi, e = res.plot_data["angles_deg"], res.plot_data["energy"]
    plateau = res.plot_data["fit"][0]
    assert np.all(e[np.abs(phi) <= 5.0] > 0.5 * plateau)
    # Beyond the rays' half-angle plus 5 degrees (a few times the fitted blur of ~0.8
    # degree) less than 2 % of the plateau is left.
    beyond = np.abs(phi) >= ray_half_angle(g, BEAD_Z) + 5.0
    assert np.all(e[beyond] < 0.02 * plateau)
    assert np.all(e[np.abs(phi) >= 80.0] < 0.01 * plateau)


def test_directional_energy_of_a_tilted_line_peaks_at_its_normal():
    # Fourier slice theorem: f(z, x) = g(x - z tan b) has all its energy on
    # k_z = -k_x tan b, i.e. at orientation phi = -b from the k_x axis, whatever the
    # sampling. Sampled here like DBT planes: dz = 1 mm, dx = 0.1 mm.
    z = np.arange(61.0)[:, None] - 30.0
    x = np.arange(-300, 301)[None, :] * 0.1
    for b in (-20.0, 4.0, 12.0):
        d = x - z * math.tan(math.radians(b))
        section = np.exp(-0.5 * (d / 0.3) ** 2) * np.hanning(61)[:, None]
        angles = np.arange(-60.0, 60.01, 0.25)
        e = coverage.directional_energy(section, (1.0, 0.1), bands_cycles_per_mm=[(0.3, 0.6)],
                                        angles_deg=angles, angle_sd_deg=0.5)[0]
        # One filter step (0.25 degree) of tolerance.
        assert angles[np.argmax(e)] == pytest.approx(-b, abs=0.25)


@pytest.mark.slow
def test_uncertainty_matches_the_scatter_and_covers_the_truth_in_noisy_repeats():
    # 50 seeded exposures of one mid-arc acquisition at a low dose (50 quanta per pixel;
    # at 20, one repeat in 50 fell 2.9 degrees low, an outlier that inflates the SD).
    # (1) The jackknife part of u (u without the method's bound) must match the SD of the
    # values: the SD of 50 values is uncertain by ~10 % (1/sqrt(2 (n-1))); 0.5-2 allows
    # for that and the jackknife's own scatter (0.7-0.9 in development).
    # (2) Project requirement: u (k = 1) expanded to k = 2 (95 % for a normal error,
    # common practice) covers the error against the truth in at least 90 % of the
    # repeats. Truth: the half-range of the rays through the bead, from the source
    # positions (geometry).
    g = small_geometry("dbt-mid-arc", photons_per_pixel=50.0)
    t = expected_transmissions(bead_phantom(), g)
    values, stated = [], []
    for seed in range(50):
        m = measure(reconstruct(detect(t, g, seed=seed), GRID, method="saa"))
        assert m.value is not None, m.note
        # Within the required 3 degrees of the arc while measured.
        assert m.value == pytest.approx(g.half_arc_deg, abs=3.0)
        values.append(m.value)
        stated.append(m.uncertainty)
    values, stated = np.array(values), np.array(stated)
    jackknife = np.sqrt(stated ** 2 - (coverage.METHOD_BOUND_DEG / math.sqrt(3)) ** 2)
    assert 0.5 < np.mean(jackknife) / np.std(values, ddof=1) < 2.0
    truth = ray_half_angle(g, BEAD_Z)
    assert np.mean(np.abs(values - truth) <= 2 * stated) >= 0.90


def test_noise_past_validity_gives_not_measured():
    g = small_geometry("dbt-mid-arc")
    t = expected_transmissions(bead_phantom(), g)
    # 1 quantum per pixel: the bead is still found, but its energy in the band is below
    # 3 times the noise's (the family's limit; in development every case above it was
    # within 1.8 degrees of the arc).
    low = dataclasses.replace(g, photons_per_pixel=1.0)
    m = measure(reconstruct(detect(t, low, seed=3), GRID, method="saa"))
    assert m.value is None and "times that of the noise" in m.note
    # 0.1 quantum per pixel: the bead is lost.
    lost = dataclasses.replace(g, photons_per_pixel=0.1)
    m = measure(reconstruct(detect(t, lost, seed=0), GRID, method="saa"))
    assert m.value is None and "not found" in m.note


def test_too_shallow_a_volume_is_not_measured(volumes):
    _, vol = volumes["dbt-mid-arc", "saa"]
    thin = Volume(vol.data[12:29], vol.spacing_mm, vol.to_mm((12, 0, 0)))
    m = measure(thin)
    assert m.value is None and "17 mm deep" in m.note


def test_arc_wider_than_the_band_shows_is_not_measured(volumes):
    # With orientations shown only to 30 degrees the wide arc's cut-off (~26 degrees) is
    # too close to the end of the range to be fitted with a floor beyond it.
    _, vol = volumes["dbt-wide-arc", "fbp"]
    m = measure(vol, bead_phantom(analysis={"coverage": {"max_orientation_deg": 30.0}}))
    assert m.value is None and "too close to the widest orientation" in m.note


def test_missing_bead_and_no_bead(volumes):
    _, vol = volumes["dbt-mid-arc", "saa"]
    ph = bead_phantom()
    lost = Layout(ph, {"bead": Placed(ph.objects[0], ph.objects[0].shape, False,
                                      "bead not found near (0.0, 0.0, 20.5) mm")})
    m = coverage.measure(vol, lost).measurements[0]
    assert m.value is None and "bead not found near" in m.note
    empty = Layout(Phantom("none", "", 20.0, ()), {})
    m = coverage.measure(vol, empty).measurements[0]
    assert m.value is None and "no bead" in m.note


def test_plot_and_registration(volumes):
    _, vol = volumes["dbt-wide-arc", "saa"]
    res = coverage.measure(vol, locate_nominal(vol, bead_phantom()))
    fig = coverage.plot(res)
    assert isinstance(fig, Figure) and len(fig.axes) == 2
    labels = [line.get_label() for line in fig.axes[1].get_lines()]
    assert "directional energy" in labels and any(lab.startswith("fit: ±") for lab in labels)
    assert coverage.plot(coverage.measure(vol, Layout(Phantom("none", "", 20.0, ()), {}))) is None
    fam = {f.name: f for f in families()}["coverage"]
    assert fam.title == "Angular coverage" and fam.order == 35
    spec = find_spec("coverage_half_arc")
    assert spec.unit == "deg" and spec.better == "band"
