"""A wider sweep of poses and plane spacings: a subset in the default run, all opt-in.

The default run covers one pose per spacing (test_locate_dbt.py) and, here, each corner
pose of the brief's range once (shifts of +-15 mm in x and y, turns of +-5 deg, mirrored
and not), with every plane spacing (0.5, 1 and 2 mm) among them: about 10 s. The full
cross of the four poses with the three spacings (about 30 s) runs with
``LACUNA_LOCATE_SWEEP=1 python -m pytest tests/locate/test_pose_sweep.py``. Tolerances
as in test_locate_dbt.py (the brief's 0.3 mm and 0.3 deg).
"""

import os

import pytest

from qa.locate import locate

FULL_SWEEP = os.environ.get("LACUNA_LOCATE_SWEEP") == "1"

POSES = [((15.0, 15.0), 5.0, False), ((-15.0, -15.0), -5.0, False),
         ((15.0, -15.0), 5.0, True), ((-15.0, 15.0), -5.0, True)]
SPACINGS = (0.5, 1.0, 2.0)
#: (pose, plane spacing) run by default: every pose once, every spacing at least once,
#: the fine 0.5 mm planes with a mirrored pose and the coarse 2 mm with both laterality
DEFAULT = {(0, 2.0), (1, 1.0), (2, 0.5), (3, 2.0)}


def _cases():
    for i, (shift, rot, mirrored) in enumerate(POSES):
        for plane_mm in SPACINGS:
            marks = () if (i, plane_mm) in DEFAULT else pytest.mark.skipif(
                not FULL_SWEEP, reason="full sweep is opt-in: set LACUNA_LOCATE_SWEEP=1")
            yield pytest.param(shift, rot, mirrored, plane_mm, marks=marks,
                               id=f"pose{i}-{plane_mm}mm")


@pytest.mark.parametrize("shift,rot,mirrored,plane_mm", list(_cases()))
def test_pose_sweep(shift, rot, mirrored, plane_mm, simulated, dbt_qc, truth_of, check_layout):
    volume, _ = simulated(shift, rot, mirrored, plane_mm)
    layout = locate(volume, dbt_qc)
    truth = truth_of(shift, rot, mirrored, 0.0)
    pose = layout.pose
    assert pose.mirrored == mirrored and len(pose.fitted_from) == 5
    assert pose.rotation_deg == pytest.approx(rot, abs=0.3)
    assert pose.shift_xy_mm == pytest.approx(tuple(truth((0, 0, 0))[:2]), abs=0.3)
    check_layout(layout, truth, rot, mirrored)
