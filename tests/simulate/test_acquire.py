"""Projections: geometry, noise statistics and the shift-and-add depth spread."""

import math

import numpy as np
import pytest

from qa import PROJECT_ROOT
from qa.phantom.model import Phantom, PhantomObject, Shape
from qa.simulate.acquire import simulate_projections
from qa.simulate.geometry import DbtGeometry, Detector
from qa.simulate.profiles import load_geometry


def _slab_phantom(mu=0.05, thickness=20.0):
    slab = PhantomObject("slab", "background", Shape("box", (0, 20, thickness / 2),
                                                     (40, 30, thickness / 2)), None, mu)
    return Phantom("slab", "", 20.0, (slab,))


def _geometry(**kw):
    det = Detector(0.5, 40, 30, (-9.75, 5.25))
    args = dict(name="test", description="", source_to_image_mm=650.0, pivot_height_mm=0.0,
                angles_deg=(-10.0, 0.0, 10.0), detector=det, aperture_samples=1)
    args.update(kw)
    return DbtGeometry(**args)


def test_noiseless_projection_of_a_slab_is_mu_times_oblique_path():
    # Closed form: a ray through a slab of thickness T at angle phi to the normal has a
    # path T / cos(phi) inside it.
    g = _geometry()
    p = simulate_projections(_slab_phantom(), g, noise=False)
    src = g.source_xyz(10.0)
    u, v = g.detector.u_mm()[20], g.detector.v_mm()[15]
    d = np.array([u, v, 0.0]) - src
    cos_phi = -d[2] / np.linalg.norm(d)
    assert p.data[2, 15, 20] == pytest.approx(0.05 * 20.0 / cos_phi, rel=1e-6)


def test_poisson_noise_variance_of_log_projection_is_one_over_counts():
    # Common practice (first-order error propagation): var(-ln(N/N0)) = 1 / (N0 T)
    # for Poisson N with mean N0 T. 5 % as required; 3 x 1200 pixels give a relative
    # SD of the variance estimate of about sqrt(2/3600) = 2.4 %.
    g = _geometry(photons_per_pixel=20000.0)
    phantom = _slab_phantom(mu=0.05, thickness=20.0)
    noisy = simulate_projections(phantom, g, seed=3)
    clean = simulate_projections(phantom, g, noise=False)
    expected_counts = 20000.0 * np.exp(-clean.data.astype(float))
    z = (noisy.data - clean.data) * np.sqrt(expected_counts)
    assert np.var(z) == pytest.approx(1.0, rel=0.05)


def test_seeded_projections_are_reproducible():
    g = _geometry(photons_per_pixel=1000.0)
    a = simulate_projections(_slab_phantom(), g, seed=11).data
    b = simulate_projections(_slab_phantom(), g, seed=11).data
    c = simulate_projections(_slab_phantom(), g, seed=12).data
    assert np.array_equal(a, b) and not np.array_equal(a, c)


def test_shipped_geometry_profiles_load():
    for name, half, views in (("dbt-narrow-arc", 7.5, 9), ("dbt-mid-arc", 12.5, 15),
                              ("dbt-wide-arc", 25.0, 25)):
        g = load_geometry(PROJECT_ROOT / "phantoms" / "geometries" / f"{name}.yaml")
        assert g.half_arc_deg == pytest.approx(half)
        assert g.n_views == views
        # The source is source_to_image_mm above the detector at 0 degrees.
        assert g.source_xyz(0.0)[2] == pytest.approx(g.source_to_image_mm)
        # On the arc about the pivot at every angle.
        for a in g.angles_deg:
            s = g.source_xyz(a)
            assert math.hypot(s[0], s[2] - g.pivot_height_mm) == pytest.approx(g.radius_mm)


def test_detector_blur_of_an_edge_and_of_white_noise():
    from math import erf, pi, sqrt

    from qa.simulate.acquire import detect

    det = Detector(0.1, 80, 60, (0.05, 0.05), blur_sd_mm=0.2)
    g = _geometry(detector=det, angles_deg=(-5.0, 5.0))
    # Noiseless: a transmission step from 0.2 to 0.8 across the columns becomes
    # 0.2 + 0.6 * Phi(x / sigma) (closed form of a Gaussian-blurred step).
    t = np.full((2, 60, 80), 0.2, dtype=np.float32)
    t[:, :, 40:] = 0.8
    p = detect(t, g, noise=False).data[0, 30]
    x = (np.arange(80) - 39.5) * 0.1
    want = 0.2 + 0.6 * np.array([0.5 * (1 + erf(v / (0.2 * sqrt(2)))) for v in x])
    np.testing.assert_allclose(np.exp(-p[20:60]), want[20:60], atol=2e-3)
    # Noisy: Poisson counts of mean N through a Gaussian of SD s pixels have variance
    # N / (4 pi s^2) (white noise through a Gaussian filter, continuous approximation,
    # common practice; accurate to ~1 % for s = 2 pixels), so in the log domain the
    # variance is 1 / (4 pi s^2 N). 10 % allows for the estimate's spread.
    g = _geometry(detector=det, angles_deg=(-5.0, 5.0), photons_per_pixel=5000.0)
    flat = np.full((2, 60, 80), 1.0, dtype=np.float32)
    p = detect(flat, g, seed=4).data[:, 10:50, 10:70]
    assert np.var(p) == pytest.approx(1.0 / (4 * pi * 2.0 ** 2 * 5000.0), rel=0.10)
