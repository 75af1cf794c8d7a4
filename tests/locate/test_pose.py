"""Pose arithmetic and bead matching, against closed forms and scikit-image."""

import math

import numpy as np
import pytest
from skimage.transform import EuclideanTransform

from qa.locate.layout import Pose
from qa.locate.pose import apply_pose, fit_rigid_2d, match_beads, pose_shape
from qa.phantom.model import Shape

# The five bead centres of phantoms/lacuna-dbt-qc.yaml.
BEADS = np.array([[-30, 8, 22.5], [22, 14, 5], [-12, 22, 40], [37, 41, 32.5], [-38, 50, 12.5]])


def truth(xyz, shift, rot_deg, mirrored, dz=0.0):
    """Closed form of the convention: (x, y) -> R(rot) diag(-1 if mirrored, 1) (x, y) + shift."""
    p = np.array(xyz, dtype=float)
    x = -p[..., 0] if mirrored else p[..., 0]
    c, s = math.cos(math.radians(rot_deg)), math.sin(math.radians(rot_deg))
    return np.stack([c * x - s * p[..., 1] + shift[0], s * x + c * p[..., 1] + shift[1],
                     p[..., 2] + dz], axis=-1)


def test_rigid_fit_agrees_with_scikit_image():
    # Reference library: skimage.transform.EuclideanTransform.from_estimate (scikit-image
    # 0.26) solves the same least-squares problem (Umeyama 1991). Noisy
    # correspondences, seeded.
    rng = np.random.default_rng(3)
    src = rng.uniform(-40, 40, (7, 2))
    r = np.radians(7.3)
    dst = src @ np.array([[np.cos(r), -np.sin(r)], [np.sin(r), np.cos(r)]]).T + [12.5, -4.0]
    dst += rng.normal(0, 0.2, dst.shape)
    rot, shift, rms = fit_rigid_2d(src, dst)
    ref = EuclideanTransform.from_estimate(src, dst)
    assert ref
    # Same problem, same minimiser: agreement to rounding (1e-9 deg / mm).
    assert rot == pytest.approx(math.degrees(ref.rotation), abs=1e-9)
    assert shift == pytest.approx(ref.translation, abs=1e-9)
    assert rms == pytest.approx(np.sqrt(np.mean(ref.residuals(src, dst) ** 2)), abs=1e-9)


def test_rigid_fit_is_exact_without_noise():
    # Closed form: points moved by a known rotation and shift are mapped back exactly.
    pose = Pose((-8.0, 3.5), -4.2, False)
    rot, shift, rms = fit_rigid_2d(BEADS[:, :2], apply_pose(pose, BEADS)[:, :2])
    assert rot == pytest.approx(-4.2, abs=1e-10) and rms < 1e-10
    assert shift == pytest.approx((-8.0, 3.5), abs=1e-10)


@pytest.mark.parametrize("mirrored", [False, True])
def test_apply_pose_matches_the_convention(mirrored):
    pose = Pose((10.0, -5.0), 3.0, mirrored, shift_z_mm=1.25)
    assert np.allclose(apply_pose(pose, BEADS), truth(BEADS, (10, -5), 3.0, mirrored, 1.25))


@pytest.mark.parametrize("rotation", [(0, 0, 4), (10, 20, 30), (-15, 5, -70)])
@pytest.mark.parametrize("mirrored", [False, True])
def test_posed_shape_holds_the_moved_points(rotation, mirrored):
    # Geometric closed form: a point is inside the posed solid exactly when its preimage
    # is inside the original (the pose is a rigid motion, or a reflection of one).
    shape = Shape("box", (5.0, 20.0, 10.0), (6.0, 3.0, 2.0), rotation)
    pose = Pose((7.0, -3.0), 4.5, mirrored, shift_z_mm=0.5)
    posed = pose_shape(shape, pose)
    rng = np.random.default_rng(5)
    pts = rng.uniform(-7, 7, (4000, 3)) + shape.centre_xyz_mm
    inside = shape.contains(pts)
    assert 200 < inside.sum() < 3800  # both kinds of point are tested
    assert np.array_equal(posed.contains(truth(pts, (7, -3), 4.5, mirrored, 0.5)), inside)


CASES = [((15.0, -10.0), 5.0, False), ((-15.0, 12.0), -5.0, True), ((0.0, 0.0), 0.0, True),
         ((8.0, 15.0), -3.0, False)]


@pytest.mark.parametrize("shift,rot,mirrored", CASES)
def test_matching_with_a_missing_bead_and_extra_candidates(shift, rot, mirrored):
    # Candidates: the posed beads with 0.1 mm scatter (and 0.5 mm in height), one bead
    # missing, 25 random extra blobs (seeded). The fit must recover the pose to within
    # what 0.1 mm scatter over four beads allows (about 0.1 / sqrt(4) mm; 0.15 mm, and
    # 0.15 deg for a lever of about 30 mm).
    rng = np.random.default_rng(11)
    cand = truth(BEADS, shift, rot, mirrored, 2.0)[[0, 1, 3, 4]]
    cand += rng.normal(0, [0.1, 0.1, 0.5], cand.shape)
    extra = np.column_stack([rng.uniform(-60, 60, 25), rng.uniform(-20, 80, 25),
                             rng.uniform(0, 45, 25)])
    order = rng.permutation(len(cand) + len(extra))
    allc = np.vstack([cand, extra])[order]
    m = match_beads(BEADS, allc)
    assert m is not None and m.pose.mirrored == mirrored and not m.ambiguous
    assert len(m.pairs) == 4 and 2 not in [i for i, _ in m.pairs]
    assert m.pose.rotation_deg == pytest.approx(rot, abs=0.15)
    assert m.pose.shift_xy_mm == pytest.approx(shift, abs=0.15)
    assert m.z_offset_mm == pytest.approx(2.0, abs=0.6)  # 0.5 mm scatter over 4 beads, 2.4 SE


def test_two_beads_cannot_tell_a_mirror_image():
    # Distances are kept by a reflection: two points fit a mirrored pose as well. The
    # beads b22 and b12 lie 79 deg from x, so the mirrored fit needs a turn of only
    # 2 x (90 - 79) = 22 deg, inside the 30 deg searched.
    cand = truth(BEADS[[0, 4]], (5, 5), 2.0, False)
    m = match_beads(BEADS, cand)
    assert m is not None and m.ambiguous and m.other is not None
    assert {m.pose.mirrored, m.other.mirrored} == {False, True}
    # Two beads lying along x instead (b32, b12: 173 deg) would need a turn of about
    # 166 deg when mirrored: excluded by the rotation limit, so not ambiguous.
    m = match_beads(BEADS, truth(BEADS[[3, 4]], (5, 5), 2.0, False))
    assert m is not None and not m.ambiguous and not m.pose.mirrored


def test_no_match_from_fewer_than_two_candidates():
    assert match_beads(BEADS, BEADS[:1]) is None
    # none at all (a blank volume), with the strengths of none
    assert match_beads(BEADS, np.empty((0, 3)), strengths=np.empty(0)) is None
