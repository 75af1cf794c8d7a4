"""Streak directions of a point's artefact in a limited-arc 2D section.

Angles follow the section frame of :mod:`qa.simulate.exact2d`: from ``+x`` towards
``+y`` (``y`` grows with the row index), and a direction is a line through the point, so
it is defined modulo 180 degrees.

Expected directions
-------------------
Data over an arc of view angles ``[theta_1, theta_2]`` (the normals of the measured
lines) recover the singularities whose normal lies in the arc; a limited-angle
reconstruction adds streaks along the lines through a singularity whose normal is at an
end of the arc (Frikel & Quinto 2013). In the section frame a line with normal
``theta_end`` runs along ``theta_end + 90 deg``: a point's streaks lie at
``theta_1 + 90`` and ``theta_2 + 90`` (mod 180). Backprojection agrees: view ``theta``
smears along its rays, direction ``theta + 90``; inside the arc the smears cancel, at its
ends they do not.

Measurement
-----------
The directional energy ``E(phi)`` is the mean of ``(r f)^2`` over the segment through
the point at angle ``phi`` (both sides), between radii ``r_min`` (outside the point's
own blur) and ``r_max``, sampled by bilinear interpolation every ``step_deg``. The weight
``r`` is there because a point's streak falls off as ``1 / r`` (the tail of the ramp
kernel): every radius then counts alike, and the far part, where the streak's angular
width (about one pixel over ``r``) is small, is not swamped by the near part. Near the
point the streak is a bright and a dark line on either side of the end line, unequal in
strength, which pulls an energy peak into the arc by up to a pixel over ``r``. The
profile is smoothed by a circular Gaussian of ``smooth_deg`` (merging the pair), and the
streaks are its strongest local maxima at least ``min_separation_deg`` apart, each
refined to a fraction of a step by a parabola through the peak sample and its two
neighbours.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from ..errors import InputError, NotMeasurable


@dataclass(frozen=True, eq=False)
class StreakDirections:
    """Measured streak directions and the energy profile they come from.

    ``directions_deg`` are in ``[0, 180)``, strongest first; ``peak_ratio`` is each
    peak's energy over the median of the profile (the streaks' prominence); ``energy``
    is the smoothed profile over ``angles_deg``.
    """

    directions_deg: tuple[float, ...]
    peak_ratio: tuple[float, ...]
    angles_deg: np.ndarray
    energy: np.ndarray


def expected_streak_directions(arc_deg) -> tuple[float, float]:
    """Streak directions (deg in [0, 180)) of a point over the view arc ``(theta_1, theta_2)``.

    Frikel & Quinto 2013: streaks along the lines whose normal is at an end of the arc,
    i.e. along ``theta_end + 90`` in the section frame (module notes).

    References
    ----------
    .. [1] Frikel & Quinto, "Characterization and reduction of artifacts in limited
           angle tomography", Inverse Problems 29, 2013.
    """
    lo, hi = (float(a) for a in arc_deg)
    return ((lo + 90.0) % 180.0, (hi + 90.0) % 180.0)


def angle_difference_deg(a, b) -> np.ndarray:
    """Smallest difference between two line directions, degrees in ``[0, 90]``."""
    d = np.abs((np.asarray(a, float) - np.asarray(b, float)) % 180.0)
    return np.minimum(d, 180.0 - d)


def _centre_index(image, centre_xy_mm, pixel_mm):
    ny, nx = image.shape
    x, y = (float(c) for c in centre_xy_mm)
    return y / pixel_mm + (ny - 1) / 2, x / pixel_mm + (nx - 1) / 2


def directional_energy(image, *, centre_xy_mm, pixel_mm: float, r_min_mm: float,
                       r_max_mm: float, step_deg: float = 0.1):
    """Directional energy ``E(phi)`` of an image around a point (module notes).

    Parameters
    ----------
    image : (ny, nx) array_like
        Reconstruction, section frame.
    centre_xy_mm : (float, float)
        The point ``(x, y)``, mm, origin at the image centre.
    pixel_mm : float
    r_min_mm, r_max_mm : float
        Radii of the annulus sampled, mm; the annulus must lie inside the image.
    step_deg : float
        Angular sampling, degrees.

    Returns
    -------
    angles_deg : (n,) ndarray
        ``0, step, ..., < 180``.
    energy : (n,) ndarray
        Mean of ``(r f)^2`` on each segment, ``r`` in mm (image unit squared, mm^2).
    """
    f = np.asarray(image, dtype=float)
    if f.ndim != 2:
        raise InputError(f"a section image is 2-D [y, x], got shape {f.shape}", field="image")
    if not (0 < r_min_mm < r_max_mm) or pixel_mm <= 0 or not 0 < step_deg <= 5:
        raise InputError(f"need 0 < r_min_mm < r_max_mm, pixel_mm > 0 and 0 < step_deg <= 5, "
                         f"got {r_min_mm!r}, {r_max_mm!r}, {pixel_mm!r}, {step_deg!r}",
                         field="r_min_mm")
    row0, col0 = _centre_index(f, centre_xy_mm, pixel_mm)
    reach = r_max_mm / pixel_mm
    if row0 - reach < 0 or col0 - reach < 0 or row0 + reach > f.shape[0] - 1 \
            or col0 + reach > f.shape[1] - 1:
        raise InputError(f"the annulus of radius {r_max_mm:g} mm around {centre_xy_mm} "
                         f"reaches outside the image", field="r_max_mm")
    angles = np.arange(0.0, 180.0, step_deg)
    radii = np.arange(r_min_mm, r_max_mm, pixel_mm / 2)
    radii = np.concatenate((-radii[::-1], radii))       # both sides of the point
    phi = np.deg2rad(angles)[:, None]
    rows = row0 + radii[None, :] / pixel_mm * np.sin(phi)
    cols = col0 + radii[None, :] / pixel_mm * np.cos(phi)
    samples = ndimage.map_coordinates(f, [rows.ravel(), cols.ravel()], order=1)
    return angles, np.mean((samples.reshape(rows.shape) * radii) ** 2, axis=1)


def _refine(energy, i):
    """Sub-sample offset of the peak at ``i`` (parabola through three samples, cyclic)."""
    n = energy.size
    left, mid, right = energy[(i - 1) % n], energy[i], energy[(i + 1) % n]
    curvature = left - 2 * mid + right
    return 0.0 if curvature >= 0 else float(np.clip(0.5 * (left - right) / curvature, -0.5, 0.5))


def streak_directions(image, *, centre_xy_mm, pixel_mm: float, r_min_mm: float,
                      r_max_mm: float, n_streaks: int = 2, step_deg: float = 0.1,
                      smooth_deg: float = 1.5, min_separation_deg: float = 5.0,
                      min_peak_ratio: float = 2.0) -> StreakDirections:
    """Measure the directions of the streaks through a point (module notes).

    Parameters
    ----------
    image, centre_xy_mm, pixel_mm, r_min_mm, r_max_mm, step_deg
        As in :func:`directional_energy`.
    n_streaks : int
        Number of streak directions to report.
    smooth_deg : float
        Standard deviation of the Gaussian smoothing of the profile, degrees (0: none).
    min_separation_deg : float
        Smallest angle between two reported directions.
    min_peak_ratio : float
        A peak must reach this multiple of the profile's median energy.

    Returns
    -------
    StreakDirections

    Raises
    ------
    NotMeasurable
        When fewer than ``n_streaks`` peaks stand ``min_peak_ratio`` above the median.

    Notes
    -----
    Peak refinement: with samples ``E_-1, E_0, E_+1`` around the largest, the parabola's
    vertex lies ``(E_-1 - E_+1) / (2 (E_-1 - 2 E_0 + E_+1))`` steps from the middle one.

    References
    ----------
    .. [1] Frikel & Quinto, "Characterization and reduction of artifacts in limited
           angle tomography", Inverse Problems 29, 2013.
    """
    angles, energy = directional_energy(image, centre_xy_mm=centre_xy_mm, pixel_mm=pixel_mm,
                                        r_min_mm=r_min_mm, r_max_mm=r_max_mm,
                                        step_deg=step_deg)
    if smooth_deg < 0:
        raise InputError(f"smooth_deg must be >= 0, got {smooth_deg!r}", field="smooth_deg")
    if smooth_deg > 0:
        energy = ndimage.gaussian_filter1d(energy, smooth_deg / step_deg, mode="wrap")
    median = float(np.median(energy))
    if not median > 0:
        raise NotMeasurable("the image is blank around the point: no streak energy")
    is_peak = (energy >= np.roll(energy, 1)) & (energy > np.roll(energy, -1))
    found, ratios = [], []
    for i in np.argsort(energy)[::-1]:
        if not is_peak[i] or energy[i] < min_peak_ratio * median:
            continue
        direction = (angles[i] + _refine(energy, i) * step_deg) % 180.0
        if all(angle_difference_deg(direction, d) >= min_separation_deg for d in found):
            found.append(float(direction))
            ratios.append(float(energy[i] / median))
        if len(found) == n_streaks:
            return StreakDirections(tuple(found), tuple(ratios), angles, energy)
    raise NotMeasurable(f"only {len(found)} of {n_streaks} streak directions stand "
                        f"{min_peak_ratio:g} times above the median directional energy")
