"""Exact line integrals against closed-form chord lengths."""

import numpy as np
import pytest

from qa.phantom.model import Shape
from qa.simulate.raytrace import chord_lengths, grid_chords


def test_sphere_chords_match_closed_form():
    # Closed form: a line at distance p from the centre of a sphere of radius r has a
    # chord of 2 sqrt(r^2 - p^2) (elementary geometry); 1e-6 relative as required.
    rng = np.random.default_rng(1)
    r = 3.7
    ball = Shape("ellipsoid", (1.0, -2.0, 15.0), (r, r, r))
    n = 2000
    dirs = rng.normal(size=(n, 3))
    dirs /= np.linalg.norm(dirs, axis=1, keepdims=True)
    # A random point of closest approach at distance p < r, perpendicular to the ray.
    p = rng.uniform(0, r * 0.999, n)
    perp = np.cross(dirs, rng.normal(size=(n, 3)))
    perp /= np.linalg.norm(perp, axis=1, keepdims=True)
    closest = np.asarray(ball.centre_xyz_mm) + perp * p[:, None]
    s = closest - 50 * dirs
    t = closest + 50 * dirs
    got = chord_lengths(ball, s, t)
    want = 2 * np.sqrt(r ** 2 - p ** 2)
    np.testing.assert_allclose(got, want, rtol=1e-6)
    # Rays that pass outside the sphere have no chord.
    far = np.asarray(ball.centre_xyz_mm) + perp * (r * 1.01)
    assert np.all(chord_lengths(ball, far - 50 * dirs, far + 50 * dirs) == 0)


def test_box_chords_match_analytic_path_length():
    # A rotated box: the path of a ray through it, computed by hand in the box's frame.
    box = Shape("box", (0.0, 0.0, 10.0), (2.0, 1.0, 0.5), (0.0, 0.0, 30.0))
    rot = box.rotation
    # Along local x through the centre: full length 4 mm.
    ax = rot[:, 0]
    c = np.array(box.centre_xyz_mm)
    assert chord_lengths(box, c - 10 * ax, c + 10 * ax)[0] == pytest.approx(4.0, rel=1e-12)
    # Along local z at local (1.5, 0.5): thickness 1 mm.
    start = c + rot @ np.array([1.5, 0.5, -5])
    end = c + rot @ np.array([1.5, 0.5, 5])
    assert chord_lengths(box, start, end)[0] == pytest.approx(1.0, rel=1e-12)
    # Oblique in the local x-z plane at angle a to local x through the centre: it leaves
    # through the z faces when tan(a) > hz/hx, with length 2 hz / sin(a).
    a = np.radians(40.0)
    d = rot @ np.array([np.cos(a), 0, np.sin(a)])
    assert chord_lengths(box, c - 10 * d, c + 10 * d)[0] == pytest.approx(1.0 / np.sin(a), rel=1e-12)


def test_cylinder_chords():
    cyl = Shape("cylinder", (0.0, 0.0, 0.0), (2.0, 2.0, 1.5))
    # Along the axis: its height. Across the axis at offset p: 2 sqrt(r^2 - p^2).
    assert chord_lengths(cyl, [0.5, 0.3, -9], [0.5, 0.3, 9])[0] == pytest.approx(3.0, rel=1e-12)
    assert chord_lengths(cyl, [-9, 1.2, 0.2], [9, 1.2, 0.2])[0] == pytest.approx(
        2 * np.sqrt(4 - 1.44), rel=1e-12)
    assert chord_lengths(cyl, [-9, 1.2, 1.6], [9, 1.2, 1.6])[0] == 0.0


def test_segment_clipping():
    ball = Shape("ellipsoid", (0, 0, 0), (1, 1, 1))
    # The segment ends at the centre: half the chord.
    assert chord_lengths(ball, [-5, 0, 0], [0, 0, 0])[0] == pytest.approx(1.0)


def test_grid_chords_equal_ray_by_ray():
    shapes = [Shape("ellipsoid", (1, 2, 20), (3, 2, 1), (10, 20, 30)),
              Shape("box", (-3, 5, 10), (4, 4, 0.25), (0, 0, 4)),
              Shape("cylinder", (2, -1, 30), (1.5, 1.5, 0.5), (0, 5, 0))]
    src = np.array([80.0, 0.0, 640.0])
    u = np.linspace(-10, 10, 81)
    v = np.linspace(-8, 12, 61)
    uu, vv = np.meshgrid(u, v)
    targets = np.stack([uu.ravel(), vv.ravel(), np.zeros(uu.size)], axis=1)
    for shape in shapes:
        # Both evaluate the same formulas in a different order; near-tangent rays,
        # where the chord is the square root of a tiny discriminant, then differ by
        # ~1e-9 mm, hence the tolerance.
        np.testing.assert_allclose(grid_chords(shape, src, u, v),
                                   chord_lengths(shape, src, targets).reshape(uu.shape),
                                   rtol=1e-8, atol=1e-8)
