"""A wider sweep of poses and plane spacings (opt-in: about a minute).

Run with ``LACUNA_LOCATE_SWEEP=1 python -m pytest tests/locate/test_pose_sweep.py``. The
default run covers one pose per spacing (test_locate_dbt.py); this one crosses the
corners of the brief's range (shifts of +-15 mm in x and y, turns of +-5 deg, mirrored
and not) with simulated plane spacings of 0.5, 1 and 2 mm. Tolerances as in
test_locate_dbt.py (the brief's 0.3 mm and 0.3 deg).
"""

import os

import pytest

from qa.locate import locate

pytestmark = pytest.mark.skipif(os.environ.get("LACUNA_LOCATE_SWEEP") != "1",
                                reason="opt-in sweep: set LACUNA_LOCATE_SWEEP=1")

POSES = [((15.0, 15.0), 5.0, False), ((-15.0, -15.0), -5.0, False),
         ((15.0, -15.0), 5.0, True), ((-15.0, 15.0), -5.0, True)]


@pytest.mark.parametrize("plane_mm", [0.5, 1.0, 2.0])
@pytest.mark.parametrize("shift,rot,mirrored", POSES)
def test_pose_sweep(shift, rot, mirrored, plane_mm, simulated, dbt_qc, truth_of, check_layout):
    volume, _ = simulated(shift, rot, mirrored, plane_mm)
    layout = locate(volume, dbt_qc)
    truth = truth_of(shift, rot, mirrored, 0.0)
    pose = layout.pose
    assert pose.mirrored == mirrored and len(pose.fitted_from) == 5
    assert pose.rotation_deg == pytest.approx(rot, abs=0.3)
    assert pose.shift_xy_mm == pytest.approx(tuple(truth((0, 0, 0))[:2]), abs=0.3)
    check_layout(layout, truth, rot, mirrored)
