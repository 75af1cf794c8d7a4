"""Exact line integrals of 2D primitives against closed-form chord lengths."""

import math

import numpy as np
import pytest

from qa.errors import InputError
from qa.simulate import exact2d


def test_disk_projection_is_the_closed_form_chord():
    # Source: closed form, chord of a circle at distance u from its centre = 2 sqrt(r^2 - u^2).
    r, (cx, cy) = 10.0, (3.0, -2.0)
    angles = np.array([0.0, 17.0, 45.0, 90.0, 133.0, -71.0])
    t = np.linspace(-15.0, 15.0, 241)
    got = exact2d.parallel_integrals([exact2d.disk((cx, cy), r, value_per_mm=0.5)],
                                     angles_deg=angles, t_mm=t)
    th = np.deg2rad(angles)[:, None]
    u = t[None, :] - (cx * np.cos(th) + cy * np.sin(th))
    want = 0.5 * 2.0 * np.sqrt(np.clip(r * r - u * u, 0.0, None))
    # 1e-6 relative (project requirement); atol covers chords that vanish at the rim.
    np.testing.assert_allclose(got, want, rtol=1e-6, atol=1e-12)


def test_rays_through_a_disk_match_the_closed_form_chord():
    # Source: closed form as above, rays given as point + direction in any orientation.
    r, centre = 7.5, np.array([-4.0, 6.0])
    rng = np.random.default_rng(1)
    phi = rng.uniform(0, 2 * np.pi, 200)
    offset = rng.uniform(-9.0, 9.0, 200)
    direction = np.stack([np.cos(phi), np.sin(phi)], axis=-1)
    normal = np.stack([-np.sin(phi), np.cos(phi)], axis=-1)
    along = rng.uniform(-30.0, 30.0, 200)[:, None]  # any point of the line will do
    points = centre + offset[:, None] * normal + along * direction
    got = exact2d.ray_integrals([exact2d.disk(tuple(centre), r, value_per_mm=1.0)],
                                points_xy_mm=points, directions_xy=3.0 * direction)
    want = 2.0 * np.sqrt(np.clip(r * r - offset ** 2, 0.0, None))
    np.testing.assert_allclose(got, want, rtol=1e-6, atol=1e-9)  # 1e-6: project requirement


def test_ellipse_chords_along_its_axes_and_its_area():
    # Source: closed form. Lines normal to an axis through the centre cross the other axis
    # at full length (2a or 2b); the projection integrates to the area pi a b.
    e = exact2d.ellipse((2.0, 1.0), (20.0, 10.0), rotation_deg=30.0, value_per_mm=1.0)
    centre_t = lambda th: 2.0 * math.cos(math.radians(th)) + 1.0 * math.sin(math.radians(th))
    p = exact2d.parallel_integrals([e], angles_deg=[30.0, 120.0],
                                   t_mm=[centre_t(30.0), centre_t(120.0)])
    # Normal along the major axis (30 deg): the line runs along the minor axis -> 2b.
    np.testing.assert_allclose(np.diag(p), [20.0, 40.0], rtol=1e-12)
    t = np.linspace(-25, 25, 200001)
    area = np.trapezoid(exact2d.parallel_integrals([e], angles_deg=[73.0], t_mm=t)[0], t)
    # 1e-6: the trapezoid rule's error at the two square-root rims is ~(dt)^1.5 / a ~ 1e-8.
    assert area == pytest.approx(math.pi * 200.0, rel=1e-6)


def test_rectangle_path_lengths():
    # Source: closed form (plane geometry). Square of side s: lines along a side cross s;
    # lines along a diagonal, offset u from it, cross s*sqrt(2) - 2|u|.
    sq = [exact2d.rectangle((0.0, 0.0), (10.0, 10.0), value_per_mm=1.0)]
    u = np.linspace(-8.0, 8.0, 161)
    flat = exact2d.parallel_integrals(sq, angles_deg=[0.0], t_mm=u)[0]
    # A line on the edge itself counts half (the box spline's convention at a jump).
    on_side = np.where(np.abs(u) < 5, 10.0, np.where(np.abs(u) == 5, 5.0, 0.0))
    np.testing.assert_allclose(flat, on_side, atol=1e-12)
    diag = exact2d.parallel_integrals(sq, angles_deg=[45.0], t_mm=u)[0]
    np.testing.assert_allclose(diag, np.clip(10 * math.sqrt(2) - 2 * np.abs(u), 0, None),
                               rtol=1e-9, atol=1e-9)


def test_rotated_rectangle_central_chords_by_both_routes():
    # Source: closed form: a line through the centre of a 2a x 2b rectangle at angle psi to
    # its long side crosses min(2a / |cos psi|, 2b / |sin psi|).
    rect = [exact2d.rectangle((4.0, -3.0), (30.0, 10.0), rotation_deg=20.0, value_per_mm=1.0)]
    for direction_deg in (0.0, 11.0, 20.0, 37.0, 90.0, 110.0, 151.0):
        psi = math.radians(direction_deg - 20.0)
        with np.errstate(divide="ignore"):
            want = min(30.0 / abs(math.cos(psi)) if math.cos(psi) else math.inf,
                       10.0 / abs(math.sin(psi)) if math.sin(psi) else math.inf)
        theta = direction_deg - 90.0  # the line's normal
        t = 4.0 * math.cos(math.radians(theta)) - 3.0 * math.sin(math.radians(theta))
        by_projection = exact2d.parallel_integrals(rect, angles_deg=[theta], t_mm=[t])[0, 0]
        d = (math.cos(math.radians(direction_deg)), math.sin(math.radians(direction_deg)))
        by_slab = exact2d.ray_integrals(rect, points_xy_mm=(4.0, -3.0), directions_xy=d)
        assert by_projection == pytest.approx(want, rel=1e-9)  # round-off only
        assert float(by_slab) == pytest.approx(want, rel=1e-9)


@pytest.mark.parametrize("obj", [exact2d.disk((1.0, 2.0), 6.0, value_per_mm=1.0),
                                 exact2d.rectangle((1.0, 2.0), (8.0, 3.0), rotation_deg=25.0,
                                                   value_per_mm=1.0)])
def test_bin_mean_equals_the_average_of_point_integrals(obj):
    # Source: definition of the bin mean; the reference is a fine numerical average.
    t = np.linspace(-9.0, 9.0, 37)
    w = 0.8
    got = exact2d.parallel_integrals([obj], angles_deg=[33.0], t_mm=t, aperture_mm=w)[0]
    fine = (np.arange(4000) + 0.5) / 4000 - 0.5
    points = exact2d.parallel_integrals([obj], angles_deg=[33.0],
                                        t_mm=(t[:, None] + w * fine[None, :]).ravel())[0]
    # 1e-5: the midpoint rule with 4000 points errs by ~(w/4000)^1.5 near square-root rims.
    np.testing.assert_allclose(got, points.reshape(len(t), -1).mean(axis=1), rtol=1e-5, atol=1e-6)


def test_box_spline_has_unit_area_and_known_peaks():
    # Source: closed form. A unit box of width w peaks at 1/w; two boxes of width w make a
    # triangle peaking at 1/w; any convolution of unit-area boxes has unit area.
    assert exact2d.box_spline([0.0], [2.0])[0] == pytest.approx(0.5)
    assert exact2d.box_spline([0.0, 1.0], [1.0, 1.0]).tolist() == pytest.approx([1.0, 0.0])
    t = np.linspace(-3, 3, 60001)
    area = np.trapezoid(exact2d.box_spline(t, [0.7, 1.3, 1.0, 1e-9]), t)
    assert area == pytest.approx(1.0, abs=1e-8)  # smooth kernel: trapezoid error ~ dt^2


def test_rasterize_area_and_values():
    # Source: closed form, the area of a disk pi r^2.
    disk = exact2d.disk((1.3, -2.1), 20.0, value_per_mm=0.02)
    img = exact2d.rasterize([disk], shape=(64, 64), pixel_mm=1.0, supersample=8)
    # 0.2 %: each of the ~130 rim pixels misestimates its area by up to 1/8 of a pixel
    # row, with errors of both signs; their sum stays well under 0.002 * pi r^2 = 2.5 px.
    assert img.sum() == pytest.approx(0.02 * math.pi * 400.0, rel=2e-3)
    x, y = exact2d.pixel_centres_mm(img.shape, 1.0)
    r = np.hypot(x[None, :] - 1.3, y[:, None] + 2.1)
    assert np.all(img[r < 19] == 0.02) and np.all(img[r > 21] == 0.0)


def test_pixel_centres_are_centred_on_the_image():
    # Source: the section frame's definition (module notes of qa.simulate.exact2d).
    x, y = exact2d.pixel_centres_mm((3, 4), 0.5)
    assert x.tolist() == [-0.75, -0.25, 0.25, 0.75] and y.tolist() == [-0.5, 0.0, 0.5]


def test_bad_primitives_are_refused():
    with pytest.raises(InputError, match="half axes must be two positive lengths"):
        exact2d.disk((0.0, 0.0), -1.0, value_per_mm=1.0)
    with pytest.raises(InputError, match="unknown primitive 'triangle'"):
        exact2d.Primitive2D("triangle", (0, 0), (1, 1))
    with pytest.raises(InputError, match="aperture must be a length >= 0"):
        exact2d.parallel_integrals([], angles_deg=[0], t_mm=[0], aperture_mm=-1)
