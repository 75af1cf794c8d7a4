"""Simulated test volumes for the locator: the phantom definition itself moved, turned and
mirrored, then acquired and reconstructed by the DBT simulator (a small, fast geometry),
or cut into a stack of 2-D sections and reconstructed over a limited arc.

The truth is written here independently of :mod:`qa.locate.pose`: a definition point
``(x, y, z)`` goes to ``R(theta) M (x, y) + t`` and ``z + dz``, with ``M`` reversing x
when mirrored and ``R`` turning counter-clockwise about the phantom's origin.
"""

import dataclasses
import math

import numpy as np
import pytest

from qa import PROJECT_ROOT
from qa.phantom import load_phantom
from qa.phantom.model import Phantom, Shape
from qa.simulate.geometry import Detector
from qa.simulate.profiles import load_geometry
from qa.simulate.run import simulate

DBT_QC = PROJECT_ROOT / "phantoms" / "lacuna-dbt-qc.yaml"
SECTION_QC = PROJECT_ROOT / "phantoms" / "lacuna-section-qc.yaml"


def truth_xyz(xyz, shift_xy, rotation_deg, mirrored, dz=0.0):
    """Where the moved phantom puts a definition point (module notes)."""
    x, y, z = xyz
    if mirrored:
        x = -x
    c, s = math.cos(math.radians(rotation_deg)), math.sin(math.radians(rotation_deg))
    return (c * x - s * y + shift_xy[0], s * x + c * y + shift_xy[1], z + dz)


def moved_phantom(phantom, shift_xy, rotation_deg, mirrored, dz=0.0, drop=()):
    """The definition moved as a rigid body; objects in ``drop`` left out (made missing)."""
    objects = []
    for obj in phantom.objects:
        if obj.id in drop:
            continue
        rx, ry, rz = obj.shape.rotation_deg
        if mirrored:  # flipping x turns Rz(c) Ry(b) Rx(a) into Rz(-c) Ry(-b) Rx(a)
            ry, rz = -ry, -rz
        shape = Shape(obj.shape.kind, truth_xyz(obj.shape.centre_xyz_mm, shift_xy, rotation_deg,
                                                mirrored, dz),
                      obj.shape.half_xyz_mm, (rx, ry, rz + rotation_deg))
        objects.append(dataclasses.replace(obj, shape=shape))
    bg = phantom.background.shape
    corners = [truth_xyz((bg.centre_xyz_mm[0] + sx * bg.half_xyz_mm[0],
                          bg.centre_xyz_mm[1] + sy * bg.half_xyz_mm[1], 0.0),
                         shift_xy, rotation_deg, mirrored) for sx in (-1, 1) for sy in (-1, 1)]
    xs, ys = [c[0] for c in corners], [c[1] for c in corners]
    z0, z1 = phantom.field_xyz_mm[2]
    field = ((math.floor(min(xs)) - 3, math.ceil(max(xs)) + 3),
             (math.floor(min(ys)) - 3, math.ceil(max(ys)) + 3), (z0 + dz, z1 + dz))
    return Phantom(phantom.name, phantom.description, phantom.energy_keV, tuple(objects),
                   phantom.source, phantom.analysis, field)


def small_geometry(field, plane_mm, *, pitch_mm=0.25, views=9):
    """The mid-arc profile on a 0.25 mm detector just large enough for ``field``, 9 views.

    Quanta per pixel scale with the pixel area, so the noise per unit area is the
    profile's (25000 per 0.1 mm pixel). The pixel aperture is integrated by 2 x 2
    sub-rays as in the profile: point-sampled pixels would alias sharp plate edges that
    run along a pixel row into a staircase, which no real detector shows.
    """
    g = load_geometry(PROJECT_ROOT / "phantoms" / "geometries" / "dbt-mid-arc.yaml")
    angles = tuple(np.linspace(g.angles_deg[0], g.angles_deg[-1], views))
    sid, ztop = g.source_to_image_mm, field[2][1]
    reach = max(abs(g.radius_mm * math.sin(math.radians(a))) for a in angles)
    mag = sid / (sid - ztop)
    x0 = min(field[0][0] * mag - reach * (mag - 1), field[0][0]) - 2
    x1 = max(field[0][1] * mag + reach * (mag - 1), field[0][1]) + 2
    y0, y1 = min(field[1][0] * mag, field[1][0]) - 2, max(field[1][1] * mag, field[1][1]) + 2
    cols, rows = int(math.ceil((x1 - x0) / pitch_mm)), int(math.ceil((y1 - y0) / pitch_mm))
    det = Detector(pitch_mm, cols, rows, (x0 + pitch_mm / 2, y0 + pitch_mm / 2))
    return dataclasses.replace(g, detector=det, aperture_samples=2, angles_deg=angles,
                               photons_per_pixel=g.photons_per_pixel * (pitch_mm / 0.1) ** 2,
                               plane_spacing_mm=plane_mm)


def truth_of(shift, rot, mirrored, dz):
    """:func:`truth_xyz` of the moved phantom, as a function of a definition point."""
    return lambda xyz: np.array(truth_xyz(xyz, shift, rot, mirrored, dz))


def check_layout(layout, truth, rot, mirrored, missing=()):
    """Every object where the moved phantom has it (found ones), missing ones reported."""
    for obj in layout.phantom.objects:
        p = layout.placed[obj.id]
        if obj.id in missing:
            assert not p.found
            assert p.note.startswith(f"{obj.id} not found near (")
            continue
        assert p.found, p.note
        err = np.asarray(p.centre_xyz_mm) - truth(obj.shape.centre_xyz_mm)
        assert np.abs(err[:2]).max() <= 0.3, (obj.id, err)
        # Heights: a bead's own in-focus height, the others' nominal one plus the beads'
        # offset; the brief's 0.3 mm for both (beads measured within 0.23 mm over the
        # sweep of test_pose_sweep.py at 0.5-2 mm planes).
        assert abs(err[2]) <= 0.3, (obj.id, err)
        expected_rz = (-1 if mirrored else 1) * obj.shape.rotation_deg[2] + rot
        assert abs(p.shape.rotation_deg[2] - expected_rz) <= 0.3, (obj.id, p.shape.rotation_deg)


@pytest.fixture(name="truth_of")
def truth_of_fixture():
    """:func:`truth_of` as a fixture (test modules cannot import conftest)."""
    return truth_of


@pytest.fixture(name="check_layout")
def check_layout_fixture():
    return check_layout


@pytest.fixture(name="moved_phantom")
def moved_phantom_fixture():
    return moved_phantom


@pytest.fixture(name="section_volume")
def section_volume_fixture():
    return section_volume


_CACHE = {}


@pytest.fixture(scope="session")
def dbt_qc():
    return load_phantom(DBT_QC)


@pytest.fixture(scope="session")
def simulated(dbt_qc):
    """``simulated(shift_xy, rotation_deg, mirrored, plane_mm, dz=0, drop=())`` ->
    (volume, moved phantom), cached for the session (seeded: seed 7)."""
    def make(shift_xy, rotation_deg, mirrored, plane_mm, dz=0.0, drop=()):
        key = (tuple(shift_xy), rotation_deg, mirrored, plane_mm, dz, tuple(drop))
        if key not in _CACHE:
            moved = moved_phantom(dbt_qc, shift_xy, rotation_deg, mirrored, dz, drop)
            geometry = small_geometry(moved.field_xyz_mm, plane_mm)
            _CACHE[key] = (simulate(moved, geometry, recon="fbp", seed=7).volume, moved)
        return _CACHE[key]
    return make


def section_primitives(phantom, z_mm):
    """The phantom's cross-section at height ``z_mm`` as 2-D primitives (objects turned
    about z only), each with its attenuation added to the background's."""
    from qa.simulate.exact2d import Primitive2D

    out = []
    for obj, delta in phantom.attenuating():
        s = obj.shape
        assert s.rotation_deg[0] == 0 and s.rotation_deg[1] == 0
        u = (z_mm - s.centre_xyz_mm[2]) / s.half_xyz_mm[2]
        if abs(u) >= 1.0:
            continue
        if s.kind == "ellipsoid":
            f = math.sqrt(1.0 - u * u)  # an ellipsoid's cut shrinks by sqrt(1 - u^2)
            kind, half = "ellipse", (s.half_xyz_mm[0] * f, s.half_xyz_mm[1] * f)
        else:
            kind = "rectangle" if s.kind == "box" else "ellipse"
            half = s.half_xyz_mm[:2]
        out.append(Primitive2D(kind, s.centre_xyz_mm[:2], half, s.rotation_deg[2], delta))
    return out


def section_volume(phantom, *, pixel_mm=0.25, plane_mm=2.0, arc_deg=(0.0, 120.0), views=121,
                   noise_sd=0.02, seed=11):
    """A stack of limited-arc parallel-beam FBP sections of ``phantom`` over its field.

    Exact line integrals (qa.simulate.exact2d) with Gaussian noise of ``noise_sd`` per
    bin (seeded), filtered backprojection over ``arc_deg`` (qa.simulate.section2d).
    The section frame's origin is the image centre, so the volume's origin is set to it.
    """
    from qa.simulate.exact2d import parallel_integrals
    from qa.simulate.section2d import fbp_parallel
    from qa.volume import Volume

    (x0, x1), (y0, y1), (z0, z1) = phantom.field_xyz_mm
    half = max(abs(x0), abs(x1), abs(y0), abs(y1))
    n = int(round(2 * half / pixel_mm))
    n_det = int(math.ceil(n * math.sqrt(2))) + 4
    t = (np.arange(n_det) - (n_det - 1) / 2) * pixel_mm
    angles = np.linspace(arc_deg[0], arc_deg[1], views)
    rng = np.random.default_rng(seed)
    z = z0 + plane_mm * (np.arange(int(round((z1 - z0) / plane_mm))) + 0.5)
    planes = []
    for zk in z:
        sino = parallel_integrals(section_primitives(phantom, zk), angles_deg=angles,
                                  t_mm=t, aperture_mm=pixel_mm)
        sino = sino + noise_sd * rng.standard_normal(sino.shape)
        planes.append(fbp_parallel(sino, angles_deg=angles, pixel_mm=pixel_mm, shape=(n, n)))
    first = -(n - 1) / 2 * pixel_mm
    return Volume(np.array(planes, dtype=np.float32), (plane_mm, pixel_mm, pixel_mm),
                  (float(z[0]), first, first))


@pytest.fixture(scope="session")
def section_qc():
    return load_phantom(SECTION_QC)
