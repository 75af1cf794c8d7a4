"""The locator on simulated DBT volumes of phantoms/lacuna-dbt-qc.yaml, moved as a rigid
body before the simulation (conftest.py), and on a simulated volume transformed after the
reconstruction with scipy.ndimage.

Tolerances: the brief's 0.3 mm and 0.3 deg for the pose and for every object placed by
it (conftest.py: check_layout).
"""

import math

import numpy as np
import pytest
from scipy import ndimage

from qa.locate import locate
from qa.measure.asf import measure_asf
from qa.measure.streak import measure_streak
from qa.volume import Volume

# (shift_xy_mm, rotation_deg, mirrored, plane spacing mm, height shift mm, beads left out)
CASES = {
    "shifted-turned-1mm": ((15.0, -10.0), 5.0, False, 1.0, 0.0, ()),
    "mirrored-raised-2mm-b22-missing": ((-15.0, 12.0), -5.0, True, 2.0, 1.5, ("b22",)),
}


@pytest.mark.parametrize("name", CASES)
def test_pose_and_objects_of_a_moved_phantom(name, simulated, dbt_qc, truth_of, check_layout):
    shift, rot, mirrored, plane, dz, drop = CASES[name]
    volume, _ = simulated(shift, rot, mirrored, plane, dz, drop)
    layout = locate(volume, dbt_qc)
    pose = layout.pose
    truth = truth_of(shift, rot, mirrored, dz)
    assert pose.mirrored == mirrored
    assert pose.rotation_deg == pytest.approx(rot, abs=0.3)
    assert pose.shift_xy_mm == pytest.approx(tuple(truth((0, 0, 0))[:2]), abs=0.3)
    assert pose.shift_z_mm == pytest.approx(dz, abs=0.3)
    assert set(pose.fitted_from) == {b.id for b in dbt_qc.with_role("bead")} - set(drop)
    assert 0 < pose.residual_mm < 0.15  # beads found to ~0.05 mm (see the bead checks)
    check_layout(layout, truth, rot, mirrored, missing=drop)


def test_missing_first_bead_makes_asf_and_streak_not_measured(simulated, dbt_qc):
    # The ASF and streak families use the first bead (b22); it was left out of the
    # simulation, so they report "not measured" with the locator's note.
    shift, rot, mirrored, plane, dz, drop = CASES["mirrored-raised-2mm-b22-missing"]
    volume, _ = simulated(shift, rot, mirrored, plane, dz, drop)
    layout = locate(volume, dbt_qc)
    note = layout.placed["b22"].note
    assert note.startswith("b22 not found near (")
    for result in (measure_asf(volume, layout), measure_streak(volume, layout)):
        for m in result.measurements:
            assert m.value is None and note in m.note and "not measured" in m.note


def test_two_beads_and_the_marker_give_the_laterality(simulated, dbt_qc, truth_of, check_layout):
    # Only b32 and b12 are in the volume: the pose still follows from two beads, and the
    # mirrored image is told by the chest-wall marker.
    shift, rot = (10.0, 15.0), -3.0
    volume, _ = simulated(shift, rot, True, 2.0, 0.0, ("b22", "b05", "b40"))
    layout = locate(volume, dbt_qc)
    pose = layout.pose
    assert pose.mirrored and "marker" in pose.note
    assert pose.fitted_from == ("b32", "b12")
    truth = truth_of(shift, rot, True, 0.0)
    assert pose.rotation_deg == pytest.approx(rot, abs=0.3)
    assert pose.shift_xy_mm == pytest.approx(tuple(truth((0, 0, 0))[:2]), abs=0.3)
    assert layout.placed["cw-marker"].found
    check_layout(layout, truth, rot, True, missing=("b22", "b05", "b40"))


def transformed(volume, *, rotation_deg, shift_xy_mm, plane_mm):
    """Flip x about the volume's centre line, turn about its centre, shift, then re-slice
    in z at ``plane_mm`` by linear interpolation (scipy.ndimage throughout).

    Returns the new volume and the map of a point of the old volume to the new one.
    """
    dz, dy, dx = volume.spacing_mm
    z0, y0, x0 = volume.origin_mm
    nz, ny, nx = volume.shape
    cx, cy = x0 + (nx - 1) * dx / 2, y0 + (ny - 1) * dy / 2
    t = math.radians(rotation_deg)
    r = np.array([[math.cos(t), -math.sin(t)], [math.sin(t), math.cos(t)]])

    def forward(xyz):
        q = np.array([2 * cx - xyz[0], xyz[1]]) - (cx, cy)
        q = r @ q + (cx, cy) + shift_xy_mm
        return np.array([q[0], q[1], xyz[2]])
    # Output (y, x) mm -> input (y, x) mm: q_in = flip(c + R^T (q_out - s - c)).
    rt = r.T
    lin = np.diag([-1.0, 1.0]) @ rt                      # acting on (x, y)
    off = np.diag([-1.0, 1.0]) @ (np.array([cx, cy]) - rt @ (np.array([cx, cy]) + shift_xy_mm))
    off += (2 * cx, 0.0)
    # In index space (row, column) = ((y - y0)/dy, (x - x0)/dx).
    m = np.array([[lin[1, 1], lin[1, 0] * dx / dy], [lin[0, 1] * dy / dx, lin[0, 0]]])
    o_mm = np.array([lin[1, 0] * x0 + lin[1, 1] * y0 + off[1], lin[0, 0] * x0 + lin[0, 1] * y0
                     + off[0]])
    o = (o_mm - (y0, x0)) / (dy, dx)
    planes = np.stack([ndimage.affine_transform(p, m, offset=o, order=1, mode="nearest")
                       for p in np.asarray(volume.data, float)])
    z_new = z0 + plane_mm * np.arange(int((nz - 1) * dz / plane_mm) + 1)
    k = np.clip((z_new - z0) / dz, 0, nz - 1)
    i = np.minimum(np.floor(k).astype(int), nz - 2)
    w = (k - i)[:, None, None]
    data = (1 - w) * planes[i] + w * planes[i + 1]
    return Volume(data, (plane_mm, dy, dx), (z0, y0, x0)), forward


@pytest.mark.parametrize("plane_mm", [0.5])
def test_volume_flipped_turned_shifted_and_resliced(simulated, dbt_qc, plane_mm, truth_of,
                                                   check_layout):
    # The 1 mm simulated volume of the first case, mirrored, turned by 3 deg, shifted by
    # (-4, 6) mm and re-sliced at 0.5 mm: the truth is the composition of both moves.
    shift, rot, mirrored, plane, dz, drop = CASES["shifted-turned-1mm"]
    volume, _ = simulated(shift, rot, mirrored, plane, dz, drop)
    new, forward = transformed(volume, rotation_deg=3.0, shift_xy_mm=(-4.0, 6.0),
                               plane_mm=plane_mm)
    first = truth_of(shift, rot, mirrored, dz)

    def truth(xyz):
        return forward(first(xyz))
    layout = locate(new, dbt_qc)
    pose = layout.pose
    # Flip then turn by 3 deg after a turn of 5 deg: mirrored, turned by 3 - 5 = -2 deg.
    assert pose.mirrored
    assert pose.rotation_deg == pytest.approx(-2.0, abs=0.3)
    assert pose.shift_xy_mm == pytest.approx(tuple(truth((0, 0, 0))[:2]), abs=0.3)
    check_layout(layout, truth, -2.0, True)
