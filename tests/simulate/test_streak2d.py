"""Streak directions: the measurement on closed-form images, then the physics of
limited-arc FBP (Frikel & Quinto, "Characterization and reduction of artifacts in
limited angle tomography", Inverse Problems 29, 2013)."""

import numpy as np
import pytest

from qa.analysis import streak2d
from qa.errors import InputError, NotMeasurable
from qa.simulate import exact2d, section2d

PIXEL_MM = 0.5


def _lines_image(shape, centre_xy_mm, angles_deg, amplitudes, sigma_mm=0.6):
    """Gaussian-profile lines through a point: I = sum_k A_k exp(-d_k^2 / 2 sigma^2)."""
    x, y = exact2d.pixel_centres_mm(shape, PIXEL_MM)
    dx, dy = x[None, :] - centre_xy_mm[0], y[:, None] - centre_xy_mm[1]
    image = np.zeros(shape)
    for angle, amp in zip(angles_deg, amplitudes):
        a = np.deg2rad(angle)
        distance = -np.sin(a) * dx + np.cos(a) * dy
        image += amp * np.exp(-distance ** 2 / (2 * sigma_mm ** 2))
    return image


@pytest.mark.parametrize("angles, centre", [((37.3, 118.6), (4.2, -6.1)),
                                            ((2.15, 91.7), (-8.0, 3.3)),
                                            ((64.4, 171.05), (0.0, 0.0))])
def test_directions_of_synthetic_lines(angles, centre):
    # Source: closed form; lines drawn at known angles through the point. Each line's
    # energy profile is symmetric about its angle, so the parabola's vertex falls on it
    # (measured errors below 0.001 deg); 0.05 deg, half a 0.1-degree sample, asks for
    # sub-sample precision. The stronger line must come first.
    image = _lines_image((200, 200), centre, angles, (1.0, 0.6))
    res = streak2d.streak_directions(image, centre_xy_mm=centre, pixel_mm=PIXEL_MM,
                                     r_min_mm=3.0, r_max_mm=30.0)
    assert streak2d.angle_difference_deg(res.directions_deg, angles).max() < 0.05
    assert res.peak_ratio[0] > res.peak_ratio[1] > 2.0


def test_noise_only_is_not_measurable():
    # A featureless image has no direction: the metric says why instead of guessing.
    flat = np.random.default_rng(0).normal(size=(120, 120))
    with pytest.raises(NotMeasurable, match="streak directions stand"):
        streak2d.streak_directions(flat, centre_xy_mm=(0, 0), pixel_mm=PIXEL_MM,
                                   r_min_mm=3.0, r_max_mm=25.0, min_peak_ratio=3.0)
    with pytest.raises(NotMeasurable, match="blank"):
        streak2d.streak_directions(np.zeros((120, 120)), centre_xy_mm=(0, 0),
                                   pixel_mm=PIXEL_MM, r_min_mm=3.0, r_max_mm=25.0)
    with pytest.raises(InputError, match="reaches outside the image"):
        streak2d.directional_energy(flat, centre_xy_mm=(20, 0), pixel_mm=PIXEL_MM,
                                    r_min_mm=3.0, r_max_mm=25.0)


def test_expected_directions_and_angle_difference():
    # Source: Frikel & Quinto 2013 (streaks along lines whose normal is at an end of the
    # arc); a line with normal theta runs along theta + 90 in the section frame.
    assert streak2d.expected_streak_directions((-20, 20)) == (70.0, 110.0)
    assert streak2d.expected_streak_directions((0, 90)) == (90.0, 0.0)
    assert float(streak2d.angle_difference_deg(179.0, 1.0)) == pytest.approx(2.0)


@pytest.fixture(scope="module")
def point():
    return (5.0, -3.0), [exact2d.disk((5.0, -3.0), 0.5, value_per_mm=1.0)]


@pytest.mark.parametrize("arc", [(-20, 20), (-30, 30), (0, 90), (-10, 35), (15, 75),
                                 (100, 140)])
def test_limited_arc_streaks_lie_along_the_ends_of_the_arc(point, arc):
    centre, disk = point
    angles = np.arange(arc[0], arc[1] + 1e-9, 0.25)  # dense views: no view-aliasing streaks
    t = (np.arange(460) - 459 / 2) * PIXEL_MM
    sino = exact2d.parallel_integrals(disk, angles_deg=angles, t_mm=t)  # exact, not ours
    rec = section2d.fbp_parallel(sino, angles_deg=angles, pixel_mm=PIXEL_MM, shape=(320, 320))
    res = streak2d.streak_directions(rec, centre_xy_mm=centre, pixel_mm=PIXEL_MM,
                                     r_min_mm=5.0, r_max_mm=60.0)
    expected = streak2d.expected_streak_directions(arc)
    error = [streak2d.angle_difference_deg(res.directions_deg, e).min() for e in expected]
    # Source: Frikel & Quinto 2013; streak lines along theta_end + 90 deg (module notes of
    # qa.analysis.streak2d). 2 deg: project requirement; measured 0.3 to 1.1 deg, the
    # residual pull of the unequal bright/dark pair near the point.
    assert max(error) < 2.0
    # The other reading, streaks along theta_end itself, is refuted: it is 30 deg or
    # more off for every arc here but (0, 90), whose ends are 90 deg apart so that both
    # readings give the same pair of lines.
    wrong = [streak2d.angle_difference_deg(res.directions_deg, a).min() for a in arc]
    assert min(wrong) > 20.0 or arc == (0, 90)
