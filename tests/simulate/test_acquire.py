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
