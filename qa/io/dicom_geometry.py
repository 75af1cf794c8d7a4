"""From DICOM patient coordinates to Lacuna's [z, y, x] volume axes.

DICOM places each frame by Image Position (Patient) ``P`` (the centre of its first
pixel, mm) and Image Orientation (Patient) ``(r, c)``: ``r`` is the direction in which
the column index grows along a row, ``c`` the direction in which the row index grows
down a column (PS3.3 C.7.6.2.1.1, Image Plane Module; in an enhanced multi-frame object
the same attributes sit in the Plane Position / Plane Orientation functional groups,
PS3.3 C.7.6.16.2.3-4). Pixel Spacing is (row spacing, column spacing), i.e. (dy, dx).

Lacuna's volume axes are read off those vectors, with no resampling:

* ``x`` = ``r`` (array columns), ``y`` = ``c`` (array rows), ``z`` = ``n = r × c``, the
  plane normal. ``(x, y, z)`` is then right-handed, like the patient system, so volume
  coordinates are a rotation of patient coordinates, never a mirror image.
* Frames are ordered by their position along the normal, ``s = P · n`` (never by file
  or frame order), plane 0 having the smallest ``s``. DICOM does not say on which side
  of the stack the detector lies; Lacuna takes plane 0 (smallest ``s``) as the one
  nearest the detector, which is how :func:`qa.io.write_dicom` writes.
* ``origin_mm`` = ``(P0 · n, P0 · c, P0 · r)`` of the first plane's first pixel.

A scanner that stores its images with the direction of source travel down the columns
gives a volume whose ``x`` is not the source travel; DICOM does not say which axis it
is. :func:`qa.io.read_volume` then exchanges rows and columns when asked
(``travel_axis="columns"``); the header's orientation facts (cosines, normal) are kept
in the volume's meta as the header states them.

References
----------
DICOM PS3.3 C.7.6.2.1.1 (Image Position and Image Orientation (Patient)) and
C.7.6.16.2.3-4 (Plane Position / Plane Orientation (Patient) Macros).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import InputError

#: Largest departure of a plane step from the mean step: 1 % of the step or 1 µm,
#: whichever is larger (common practice: positions are printed as DS text with about
#: 6 decimals, so honest stacks agree far better than this; a missing or repeated
#: plane departs by 100 %).
SPACING_TOLERANCE_REL = 0.01
SPACING_TOLERANCE_MM = 1e-3
#: Two frames closer than this along the normal are the same plane (common practice).
DUPLICATE_MM = 1e-3
#: Direction cosines must agree to this between frames and be unit and orthogonal to
#: it (DS text of 6-8 decimals; 1e-4 rad is 0.006 degrees), common practice.
COSINE_TOLERANCE = 1e-4


@dataclass(frozen=True)
class Stack:
    """Where each stored frame goes and the volume geometry that follows.

    ``plane_of_frame[k]`` is the volume plane (z index) of stored frame ``k``.
    """

    plane_of_frame: np.ndarray
    spacing_mm: tuple[float, float, float]
    origin_mm: tuple[float, float, float]
    facts: dict


def _fmt(v) -> str:
    return "(" + ", ".join(f"{x:.4g}" for x in v) + ")"


def unit_cosines(orientation, source: str, what: str) -> tuple[np.ndarray, np.ndarray]:
    """Row and column direction cosines from the 6 values of Image Orientation."""
    o = np.asarray(orientation, dtype=float)
    if o.shape != (6,) or not np.all(np.isfinite(o)):
        raise InputError(f"Image Orientation (Patient) of {what} must be 6 numbers, got "
                         f"{list(np.ravel(o))}", source=source)
    r, c = o[:3], o[3:]
    if (abs(np.linalg.norm(r) - 1) > COSINE_TOLERANCE or abs(np.linalg.norm(c) - 1)
            > COSINE_TOLERANCE or abs(float(r @ c)) > COSINE_TOLERANCE):
        raise InputError(f"Image Orientation (Patient) of {what} is not two orthogonal unit "
                         f"vectors: {_fmt(o)}", source=source)
    return r, c


def order_planes(positions, orientations, pixel_spacing_mm, source: str,
                 names: list[str] | None = None) -> Stack:
    """Order frames along the plane normal and check they form a regular stack.

    Parameters
    ----------
    positions : (n, 3) array_like
        Image Position (Patient) of each stored frame, mm.
    orientations : (n, 6) array_like
        Image Orientation (Patient) of each stored frame.
    pixel_spacing_mm : (2,) array_like
        (row spacing, column spacing) = (dy, dx), shared by all frames.
    source : str
        The file or folder, for messages.
    names : list of str, optional
        A label per frame (file names of a folder of slices) for messages.

    Returns
    -------
    Stack

    Raises
    ------
    InputError
        Fewer than 2 frames, frames not parallel, frames shifted in-plane by more than
        half a pixel, two frames at one position, or steps that differ by more than the
        tolerance (:data:`SPACING_TOLERANCE_REL`, :data:`SPACING_TOLERANCE_MM`).

    Notes
    -----
    With ``n = r × c`` the position of frame ``k`` along the normal is
    ``s_k = P_k · n``; after sorting, the plane step is
    ``dz = (s_max - s_min) / (N - 1)`` and every step ``s_(i+1) - s_i`` must lie within
    ``max(0.01 dz, 0.001 mm)`` of it.
    """
    pos = np.asarray(positions, dtype=float)
    ori = np.asarray(orientations, dtype=float)
    labels = names or [f"frame {k + 1}" for k in range(len(pos))]
    if len(pos) < 2:
        raise InputError("a 2D image (a single frame) where a volume is expected",
                         source=source)
    if pos.shape != (len(pos), 3) or not np.all(np.isfinite(pos)):
        raise InputError("Image Position (Patient) must be 3 numbers per frame",
                         source=source)
    r, c = unit_cosines(ori[0], source, labels[0])
    bad = np.flatnonzero(np.max(np.abs(ori - ori[0]), axis=1) > COSINE_TOLERANCE)
    if bad.size:
        k = int(bad[0])
        raise InputError(f"frames are not parallel: {labels[k]} has orientation "
                         f"{_fmt(ori[k])}, {labels[0]} has {_fmt(ori[0])}", source=source)
    n = np.cross(r, c)
    s = pos @ n
    order = np.argsort(s, kind="stable")
    s_sorted = s[order]
    steps = np.diff(s_sorted)
    dup = np.flatnonzero(steps < DUPLICATE_MM)
    if dup.size:
        a, b = order[dup[0]], order[dup[0] + 1]
        raise InputError(f"duplicate frame positions: {labels[a]} and {labels[b]} both lie "
                         f"at {s_sorted[dup[0]]:.4f} mm along the normal "
                         f"(positions {_fmt(pos[a])} and {_fmt(pos[b])})", source=source)
    dz = float((s_sorted[-1] - s_sorted[0]) / (len(s) - 1))
    tol = max(SPACING_TOLERANCE_REL * dz, SPACING_TOLERANCE_MM)
    off = np.flatnonzero(np.abs(steps - dz) > tol)
    if off.size:
        i = int(off[0])
        raise InputError(
            f"non-uniform frame positions: step {steps[i]:.4f} mm between "
            f"{labels[order[i]]} at {s_sorted[i]:.4f} mm and {labels[order[i + 1]]} at "
            f"{s_sorted[i + 1]:.4f} mm, mean step {dz:.4f} mm (tolerance {tol:.4f} mm); "
            f"sorted positions along the normal (mm): {_fmt(s_sorted)}", source=source)
    dy, dx = (float(v) for v in pixel_spacing_mm)
    u, v = pos @ r, pos @ c
    if np.ptp(u) > dx / 2 or np.ptp(v) > dy / 2:
        raise InputError(f"frames are shifted in-plane by up to ({np.ptp(u):.3f}, "
                         f"{np.ptp(v):.3f}) mm along (rows, columns): not one stack",
                         source=source)
    first = order[0]
    plane_of_frame = np.empty(len(s), dtype=np.intp)
    plane_of_frame[order] = np.arange(len(s))
    facts = {
        "image_orientation_patient": [float(x) for x in ori[0]],
        "plane_normal_patient": [float(x) for x in n],
        "first_plane_position_patient_mm": [float(x) for x in pos[first]],
        "axes_from_dicom": "x = row direction cosines, y = column direction cosines, "
                           "z = their cross product; plane 0 at the lowest position "
                           "along it",
        "frames_in_position_order": bool(np.all(order == np.arange(len(s)))),
    }
    origin = (float(s[first]), float(v[first]), float(u[first]))
    return Stack(plane_of_frame, (dz, dy, dx), origin, facts)


def patient_frame(origin_mm, spacing_mm, nz: int, orientation=None) -> tuple[list, np.ndarray]:
    """The inverse mapping, for the writer: orientation and the position of each plane.

    Returns the 6 orientation values and an (nz, 3) array of Image Position (Patient),
    plane ``k`` at ``origin_z + k dz`` along the normal.
    """
    if orientation is None:
        orientation = (1.0, 0.0, 0.0, 0.0, 1.0, 0.0)
    r, c = unit_cosines(orientation, "volume meta", "image_orientation_patient")
    n = np.cross(r, c)
    z0, y0, x0 = (float(v) for v in origin_mm)
    z = z0 + spacing_mm[0] * np.arange(nz)
    positions = x0 * r + y0 * c + z[:, None] * n
    return [float(v) for v in np.concatenate([r, c])], positions
