"""Fan-beam (flat detector) projector, backprojector, redundancy weights and FBP.

Outside references: closed-form chords of a disk, the definition of the transpose,
Parker's short-scan weights (Med Phys 9, 1982) and Kak & Slaney's fan-beam FBP (1988).
"""

import math

import numpy as np
import pytest

from qa.errors import InputError
from qa.simulate import exact2d, fan2d

R_MM, D_MM = 200.0, 400.0  # a dental-size geometry: source 200 mm from the centre


def _geometry(shape, angles_deg, r_mm=R_MM):
    return fan2d.FanBeam(shape=shape, pixel_mm=1.0, angles_deg=angles_deg,
                         source_centre_mm=r_mm, source_detector_mm=D_MM)


def test_adjoint_identity():
    # Source: definition of the transpose; 1e-5 relative (project requirement).
    rng = np.random.default_rng(5)
    g = fan2d.FanBeam(shape=(33, 41), pixel_mm=0.8, angles_deg=rng.uniform(0, 360, 9),
                      source_centre_mm=100.0, source_detector_mm=160.0, subpixels=2)
    x = rng.standard_normal(g.shape)
    y = rng.standard_normal((9, g.n_det))
    assert np.vdot(g.project(x), y) == pytest.approx(np.vdot(x, g.backproject(y)), rel=1e-5)
    back = fan2d.backproject_fan(y, angles_deg=g.angles_deg, pixel_mm=0.8, shape=g.shape,
                                 source_centre_mm=100.0, source_detector_mm=160.0)
    np.testing.assert_allclose(back, g.backproject(y), rtol=1e-12)


def test_fan_rays_are_the_stated_parallel_lines():
    # Source: closed form. The ray through detector coordinate u at view beta is the
    # parallel line theta = beta - gamma, t = R sin(gamma), gamma = atan(u / D); a disk's
    # integral along it is 2 sqrt(r^2 - (t - c . n)^2).
    g = _geometry((64, 64), [0.0, 37.0, 200.0])
    centre, r = (12.0, -7.0), 25.0
    got = fan2d.exact_fan_sinogram([exact2d.disk(centre, r, value_per_mm=1.0)], g)
    gamma = np.arctan(g.u_mm / D_MM)[None, :]
    theta = np.deg2rad(g.angles_deg)[:, None] - gamma
    u = R_MM * np.sin(gamma) - (centre[0] * np.cos(theta) + centre[1] * np.sin(theta))
    np.testing.assert_allclose(got, 2 * np.sqrt(np.clip(r * r - u * u, 0, None)),
                               rtol=1e-9, atol=1e-9)  # round-off only


def test_projection_of_a_disk_matches_the_exact_chords():
    centre, r = (6.0, -4.0), 30.0
    disk = [exact2d.disk(centre, r, value_per_mm=0.02)]
    g = _geometry((96, 96), np.linspace(0, 360, 60, endpoint=False))
    image = exact2d.rasterize(disk, shape=g.shape, pixel_mm=1.0, supersample=8)
    exact = fan2d.exact_fan_sinogram(disk, g)
    error = g.project(image) - exact
    # Reference: exact chords (closed form). Measured relative RMSE 4.8e-3 over all rays,
    # 1.5e-3 over rays 3 mm or more inside the rim. The first is the 1-mm pixelisation
    # of the rim (the parallel projectors score 6.5e-3 to 7.5e-3 on a like image); the
    # second is the model's own error (linear splatting of 2 x 2 points per pixel).
    # Bounds at twice the measured values: a wrong ray-spacing weight D / (L cos gamma)
    # would err by several per cent.
    gamma = np.arctan(g.u_mm / D_MM)[None, :]
    theta = np.deg2rad(g.angles_deg)[:, None] - gamma
    u = R_MM * np.sin(gamma) - (centre[0] * np.cos(theta) + centre[1] * np.sin(theta))
    assert np.sqrt(np.mean(error ** 2)) < 1e-2 * exact.max()
    assert np.sqrt(np.mean(error[np.abs(u) < r - 3] ** 2)) < 3e-3 * exact.max()


def test_conjugate_rays_and_parker_weights_sum_to_one():
    # Source: Parker, Med Phys 9, 1982: w(b, g) + w(b + pi + 2g, -g) = 1 for delta >= |g|.
    # In our geometry the conjugate of (beta, gamma) is (beta + pi - 2 gamma, -gamma):
    # checked first on the rays themselves (same line, opposite direction).
    g = _geometry((64, 64), [10.0])
    gamma = math.atan(g.u_mm[40] / D_MM)
    conj = _geometry((64, 64), [10.0 + 180.0 - 2 * math.degrees(gamma)])
    (p1, d1), (p2, d2) = g.rays(), conj.rays()
    k2 = g.n_det - 1 - 40                                  # bin at -u
    np.testing.assert_allclose(d1[0, 40], -d2[0, k2], atol=1e-12)
    offset = p2[0, k2] - p1[0, 40]
    assert abs(offset[0] * d1[0, 40, 1] - offset[1] * d1[0, 40, 0]) < 1e-9  # collinear
    rng = np.random.default_rng(2)
    delta, gam = 0.3, rng.uniform(-0.29, 0.29, 500)
    b = rng.uniform(0, np.pi + 2 * delta, 500)
    b_conj = b + np.pi + 2 * gam
    b_conj = np.where(b_conj > np.pi + 2 * delta, b_conj - 2 * np.pi, b_conj)
    inside = (b_conj >= 0)
    total = fan2d.parker_weight(b, gam, delta) + fan2d.parker_weight(b_conj, -gam, delta)
    np.testing.assert_allclose(total[inside], 1.0, atol=1e-12)


def _disk_value(angles_deg):
    disk = [exact2d.disk((0.0, 0.0), 40.0, value_per_mm=0.02)]
    g = _geometry((128, 128), angles_deg)
    rec = fan2d.fbp_fan(fan2d.exact_fan_sinogram(disk, g), g)
    x, y = exact2d.pixel_centres_mm(g.shape, 1.0)
    r = np.hypot(x[None, :], y[:, None])
    return rec[r < 35].mean(), rec[(r > 45) & (r < 60)].mean(), fan2d.redundancy_weights(g)[1]


def test_full_scan_fbp_recovers_a_centred_disk():
    # Source: closed form (exact chords of the disk in, its value 0.02 /mm expected).
    inside, outside, kind = _disk_value(np.linspace(0, 360, 360, endpoint=False))
    # Measured -0.085 % inside, -2e-7 /mm outside; 0.5 % allows the discretised ramp's
    # bias, a wrong weight (1/U, missing cosine or the 1/2) misses by more than 5 %.
    assert kind == "full"
    assert inside == pytest.approx(0.02, rel=5e-3) and abs(outside) < 1e-3 * 0.02


def test_short_scan_fbp_with_parker_weights_recovers_the_disk():
    half_fan = math.degrees(math.atan(_geometry((128, 128), [0]).u_mm.max()
                                      / D_MM))
    inside, outside, kind = _disk_value(np.arange(0.0, 180 + 2 * half_fan + 4, 1.0))
    # Same measured values as the full scan; same tolerances and reasons.
    assert kind == "short"
    assert inside == pytest.approx(0.02, rel=5e-3) and abs(outside) < 1e-3 * 0.02


def test_limited_arc_weights_count_each_line_once():
    # Source: definition. Over a limited arc the weights of a line's measurements sum to
    # one: 1 where the conjugate ray is outside the arc, 1/2 where both were measured.
    g = _geometry((64, 64), np.arange(0.0, 191.0, 1.0))
    w, kind = fan2d.redundancy_weights(g)
    assert kind == "limited" and set(np.unique(w)) == {0.5, 1.0}
    assert w[75, g.n_det // 2] == 1.0  # central ray mid-arc: its conjugate is 180 deg away


def test_bad_geometry_is_refused():
    with pytest.raises(InputError, match="need source_detector_mm > source_centre_mm > the image"):
        _geometry((128, 128), [0.0], r_mm=80.0)
    with pytest.raises(InputError, match=r"per angle \(2\) and \d+ bins, got shape \(2, 5\)"):
        g = _geometry((16, 16), [0.0, 90.0])
        fan2d.fbp_fan(np.zeros((2, 5)), g)


def test_sirt_over_a_short_scan_recovers_the_disk_and_its_residual_falls():
    # Source: closed form (exact fan chords of a disk of 0.02 /mm in, that value out).
    g = _geometry((64, 64), np.arange(0.0, 200.0, 4.0))
    disk = [exact2d.disk((4.0, -3.0), 18.0, value_per_mm=0.02)]
    sino = fan2d.exact_fan_sinogram(disk, g)
    img, history = fan2d.sirt_fan(sino, g, n_iter=60, rtol=0.0)
    # Jiang & Wang (IEEE Trans Image Process 12, 2003): for 0 < lambda < 2 the weighted
    # residual decreases; the plain one did so in every run here (round-off slack).
    assert np.all(np.diff(history) <= 1e-12) and history[-1] < 0.05 * history[0]
    x, y = exact2d.pixel_centres_mm(g.shape, 1.0)
    inner = np.hypot(x[None, :] - 4.0, y[:, None] + 3.0) < 14
    # 1 %: the mean over the disk's interior after 60 iterations (measured +0.2 %).
    assert img[inner].mean() == pytest.approx(0.02, rel=1e-2)
    with pytest.raises(InputError, match="0 < relaxation < 2"):
        fan2d.sirt_fan(sino, g, relaxation=2.0)
