"""The matched DBT projector: adjoint identity and line integrals against exact chords."""

import numpy as np
import pytest
from scipy.ndimage import binary_erosion

from qa.errors import InputError
from qa.phantom.model import Phantom, PhantomObject, Shape
from qa.simulate.acquire import simulate_projections
from qa.simulate.geometry import DbtGeometry, Detector
from qa.simulate.recon.grid import ReconGrid
from qa.simulate.recon.projector import DbtProjector
from qa.simulate.voxelise import voxelise

MU = 0.05  # 1/mm, a breast-like attenuation (any positive value would do)


def _geometry(det, angles, **kw):
    args = dict(name="test", description="", source_to_image_mm=650.0, pivot_height_mm=0.0,
                angles_deg=tuple(angles), detector=det, aperture_samples=1)
    args.update(kw)
    return DbtGeometry(**args)


def _one_object(shape):
    return Phantom("p", "", 20.0, (PhantomObject("o", "background", shape, None, MU),))


CASES = {
    "arc about the detector": (
        _geometry(Detector(0.5, 60, 40, (-14.75, -4.75)), np.linspace(-15, 15, 7)),
        ReconGrid.from_field((-12, 12), (-2, 14), (0, 8), pixel_mm=0.4, plane_mm=1.0), False),
    "pivot above the detector, continuous motion modelled": (
        _geometry(Detector(0.5, 60, 40, (-14.75, -4.75)), np.linspace(-7.5, 7.5, 5),
                  pivot_height_mm=40.0, motion="continuous", sweep_deg=1.0, motion_samples=3),
        ReconGrid.from_field((-12, 12), (-2, 14), (0, 8), pixel_mm=0.4, plane_mm=1.0), True),
    "wide arc, grid larger than the detector, odd spacings": (
        _geometry(Detector(0.3, 50, 30, (-7.35, -2.35)), np.linspace(-25, 25, 9),
                  pivot_height_mm=20.0),
        ReconGrid.from_field((-10, 10), (-4, 9), (2, 9), pixel_mm=0.35, plane_mm=0.7), False),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_adjoint_identity(case):
    # <A x, y> = <x, Aᵀ y> holds exactly in exact arithmetic (Aᵀ applies the transposes
    # of the same sparse matrices). A x and Aᵀ y are float32: each term carries ~1e-7
    # relative rounding, and the inner products of positive terms stay within ~1e-6;
    # 1e-5 as required.
    geometry, grid, blur = CASES[case]
    proj = DbtProjector(geometry, grid, source_blur=blur)
    rng = np.random.default_rng(3)
    x = rng.uniform(0.0, 1.0, proj.volume_shape)
    y = rng.uniform(0.0, 1.0, proj.data_shape)
    lhs = float(np.vdot(proj.forward(x).astype(float), y))
    rhs = float(np.vdot(x, proj.adjoint(y).astype(float)))
    assert lhs > 0
    assert abs(lhs - rhs) / abs(lhs) < 1e-5


def test_view_subsets_agree_with_all_views():
    geometry, grid, _ = CASES["arc about the detector"]
    proj = DbtProjector(geometry, grid)
    rng = np.random.default_rng(4)
    x = rng.uniform(0.0, 1.0, proj.volume_shape)
    y = rng.uniform(0.0, 1.0, proj.data_shape)
    # One view alone is the same row block of A (float32 output: 1e-6 relative).
    np.testing.assert_allclose(proj.forward(x, views=[2])[0], proj.forward(x)[2], rtol=1e-6)
    parts = sum(proj.adjoint(y[i:i + 1], views=[i]) for i in range(geometry.n_views))
    np.testing.assert_allclose(parts, proj.adjoint(y), rtol=1e-5, atol=1e-6)


def test_slab_line_integrals_are_exact_inside():
    # A box with faces off the voxel grid: qa.simulate.voxelise gives its partial voxels
    # exactly (axis-aligned box), and a ray crossing a plane inside the box runs
    # dz / cos(phi) in it, so sum_k (dz / cos phi) mu_k = mu T / cos(phi), the exact
    # integral (closed form, as in test_acquire). Compared with the ray tracer on rays
    # that stay more than two pixels (> one voxel + one pixel of interpolation) inside the
    # full-thickness region; what remains is float32 rounding (~1e-7), hence 1e-5.
    geometry, grid, _ = CASES["arc about the detector"]
    slab = Shape("box", (0.37, 5.21, 4.13), (7.6, 5.3, 2.65))
    phantom = _one_object(slab)
    exact = simulate_projections(phantom, geometry, noise=False).data.astype(float)
    proj = DbtProjector(geometry, grid)
    model = proj.forward(voxelise(phantom, grid).data).astype(float)
    full = MU * 2 * 2.65 * np.stack([proj.path_weights(i) / grid.spacing_mm[0]
                                     for i in range(geometry.n_views)])
    inside = np.stack([binary_erosion(np.abs(e - f) < 1e-6 * f, iterations=2)
                       for e, f in zip(exact, full)])
    assert inside.sum() > 0.5 * (15.2 / 0.5) * (10.6 / 0.5) * geometry.n_views
    np.testing.assert_allclose(model[inside], exact[inside], rtol=1e-5)


def _sphere_case(h):
    """A sphere seen by a detector of pitch h through a grid of h voxels and 2h planes."""
    n = int(round(14 / h))
    geometry = _geometry(Detector(h, n, n, (-7 + h / 2, -7 + h / 2)), (0.0, 15.0))
    grid = ReconGrid.from_field((-4, 4), (-4, 4), (1, 9), pixel_mm=h, plane_mm=2 * h)
    return geometry, grid


def _sphere_errors(h, centre, radius, core_mm):
    """Relative errors of A(voxelised sphere) on the rays passing within
    radius - core_mm of the centre, per view."""
    geometry, grid = _sphere_case(h)
    phantom = _one_object(Shape("ellipsoid", centre, (radius,) * 3))
    exact = simulate_projections(phantom, geometry, noise=False).data.astype(float)
    model = DbtProjector(geometry, grid).forward(
        voxelise(phantom, grid, supersample=9).data).astype(float)
    det = geometry.detector
    uu, vv = np.meshgrid(det.u_mm(), det.v_mm())
    out = []
    for i, angle in enumerate(geometry.angles_deg):
        s = geometry.source_xyz(angle)
        d = np.stack([uu - s[0], vv - s[1], np.full_like(uu, -s[2])], axis=-1)
        d /= np.linalg.norm(d, axis=-1, keepdims=True)
        w = np.asarray(centre) - s
        dist = np.linalg.norm(w - (d @ w)[..., None] * d, axis=-1)   # closest approach
        core = dist < radius - core_mm
        out.append(np.abs(model[i] - exact[i])[core] / exact[i][core])
    return out


def test_sphere_line_integrals_within_the_smoothing_error():
    # Along the central view's rays (cos phi = 1 to 2e-5 here) the model is the exact
    # line-integral image g(rho) = 2 mu sqrt(r^2 - rho^2) seen through two smoothing
    # kernels: the voxel average (box of side a, variance a^2/12 per axis) and the
    # footprint-normalised linear splat onto pixels of pitch p (hat of half-width p,
    # variance p^2/6). To second order the error is (sigma^2 / 2) |lap g| with
    # sigma^2 = a^2/12 + p^2/6 and, in the plane, lap sqrt(r^2 - rho^2) =
    # -(r^2 / f^3 + 1 / f), f = sqrt(r^2 - rho^2) (elementary calculus); it grows
    # towards the rim, so the bound is taken at the outermost ray checked. 9^3
    # sub-samples per voxel keep the voxelisation's own error below it.
    h, radius, core_mm = 0.25, 2.0, 0.5
    rho = radius - core_mm
    f = np.sqrt(radius ** 2 - rho ** 2)
    sigma2 = h ** 2 / 12 + h ** 2 / 6
    bound = 0.5 * sigma2 * (radius ** 2 / f ** 3 + 1 / f) / f
    central, _ = _sphere_errors(h, (0.3, 0.2, 5.1), radius, core_mm)
    assert central.max() < bound


def test_oblique_line_integrals_converge_as_the_grid_refines():
    # An oblique ray (angle phi) meets the sphere's surface inside a plane of thickness
    # dz, where the plane's voxels hold the surface as seen straight down; the crossing
    # is misplaced by up to (dz/2) t / (1 - t), t = tan(phi) tan(beta), beta the tilt of
    # the surface normal from z (elementary geometry of a line meeting a tilted plane).
    # For rays within r - 1 mm of the centre, beta <= asin((r - 1)/r) + phi. Two
    # crossings over a chord of at least 2 sqrt(2r - 1) give the worst case below, first
    # order in dz, on top of the second-order smoothing of the test above; halving
    # voxels, planes and pixels together must therefore at least nearly halve the
    # largest error (<= 0.6: first order gives 0.5, plus slack for where the crossings
    # fall inside their planes).
    radius, core_mm, phi = 2.0, 1.0, np.radians(15.0)
    t = np.tan(phi) * np.tan(np.arcsin((radius - core_mm) / radius) + phi)
    chord = 2 * np.sqrt(2 * radius * core_mm - core_mm ** 2)
    errors = {}
    for h in (0.5, 0.25):
        errors[h] = _sphere_errors(h, (0.3, 0.2, 5.1), radius, core_mm)[1].max()
        f = chord / 2
        worst = 2 * h * t / (1 - t) / chord + h ** 2 / 8 * (radius ** 2 / f ** 3 + 1 / f) / f
        assert errors[h] < worst  # dz/2 = h; smoothing as above, sigma^2 = h^2/4
    assert errors[0.25] <= 0.6 * errors[0.5]


def test_bad_inputs_are_named():
    geometry, grid, _ = CASES["arc about the detector"]
    proj = DbtProjector(geometry, grid)
    with pytest.raises(InputError, match=r"volume of shape \(2, 2, 2\)"):
        proj.forward(np.zeros((2, 2, 2)))
    with pytest.raises(InputError, match="view 9 does not exist"):
        proj.forward(np.zeros(proj.volume_shape), views=[9])
    tall = ReconGrid.from_field((-1, 1), (-1, 1), (0, 700), pixel_mm=0.5, plane_mm=100.0)
    with pytest.raises(InputError, match="at or above the source"):
        DbtProjector(geometry, tall)
