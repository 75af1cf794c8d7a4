"""Regions of interest on one plane, in pixel units (centres, radii and boxes)."""

from __future__ import annotations

import numpy as np


def disk_mask(shape: tuple[int, int], centre_rc: tuple[float, float], radius_px: float) -> np.ndarray:
    """Pixels whose centres lie within ``radius_px`` of ``centre_rc`` (row, column)."""
    rows, cols = np.ogrid[: shape[0], : shape[1]]
    return (rows - centre_rc[0]) ** 2 + (cols - centre_rc[1]) ** 2 <= radius_px ** 2


def box_slices(shape: tuple[int, int], centre_rc: tuple[float, float],
               half_rc: tuple[float, float]) -> tuple[slice, slice] | None:
    """Index slices of a box around ``centre_rc``; ``None`` when it leaves the image."""
    r0 = int(np.floor(centre_rc[0] - half_rc[0] + 0.5))
    r1 = int(np.floor(centre_rc[0] + half_rc[0] + 0.5))
    c0 = int(np.floor(centre_rc[1] - half_rc[1] + 0.5))
    c1 = int(np.floor(centre_rc[1] + half_rc[1] + 0.5))
    if r0 < 0 or c0 < 0 or r1 > shape[0] or c1 > shape[1] or r1 <= r0 or c1 <= c0:
        return None
    return slice(r0, r1), slice(c0, c1)


def disk_weights(shape: tuple[int, int], centre_rc: tuple[float, float], radius_px: float, *,
                 supersample: int = 8) -> np.ndarray:
    """Fraction of each pixel inside a circle (``supersample``² points per pixel).

    Unlike :func:`disk_mask`, the total weight is the circle's area whatever its
    sub-pixel position, so a region mean does not jump as the circle moves.
    """
    n = int(supersample)
    offs = (np.arange(n) + 0.5) / n - 0.5
    rows = (np.arange(shape[0])[:, None] + offs[None, :]).ravel()
    cols = (np.arange(shape[1])[:, None] + offs[None, :]).ravel()
    inside = ((rows[:, None] - centre_rc[0]) ** 2 + (cols[None, :] - centre_rc[1]) ** 2
              <= radius_px ** 2)
    return inside.reshape(shape[0], n, shape[1], n).mean(axis=(1, 3))
