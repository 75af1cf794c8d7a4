"""The locator on stacks of limited-arc CT sections of phantoms/lacuna-section-qc.yaml,
moved as a rigid body (conftest.py: exact line integrals over a 120 deg arc, FBP)."""

import numpy as np
import pytest

from qa.locate import locate

CASES = [((-6.0, 9.0), 5.0, True), ((8.0, -5.0), -4.0, False)]


@pytest.mark.parametrize("shift,rot,mirrored", CASES)
def test_section_stack_pose_from_rods(shift, rot, mirrored, section_qc, moved_phantom,
                                      section_volume, truth_of, check_layout):
    # Tolerances: the brief's 0.3 mm and 0.3 deg. Measured: pose within 0.03 mm and
    # 0.03 deg; the edge block's turn within 0.23 deg (its sides at 0 and 90 deg lie at
    # and inside the ends of the 120 deg arc, where a limited arc renders edges worst).
    volume = section_volume(moved_phantom(section_qc, shift, rot, mirrored))
    layout = locate(volume, section_qc)
    pose = layout.pose
    truth = truth_of(shift, rot, mirrored, 0.0)
    assert pose.mirrored == mirrored
    assert pose.rotation_deg == pytest.approx(rot, abs=0.3)
    assert pose.shift_xy_mm == pytest.approx(tuple(truth((0, 0, 0))[:2]), abs=0.3)
    assert len(pose.fitted_from) == 5
    # Rods have no in-focus plane: no height offset is fitted, heights stay nominal.
    assert pose.shift_z_mm == 0.0 and "height" not in pose.note
    for rod in section_qc.with_role("bead"):
        assert layout.placed[rod.id].centre_xyz_mm[2] == rod.shape.centre_xyz_mm[2]
    check_layout(layout, truth, rot, mirrored)
    assert np.isfinite(pose.residual_mm) and pose.residual_mm < 0.15
