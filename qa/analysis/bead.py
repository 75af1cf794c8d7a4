"""Per-plane signals around a small bead: the shared input of the ASF and streak metrics.

For each plane of the volume the bead's region (a disk of the bead's radius, at least
1.5 pixels) and two background strips are read. The strips lie beside the bead
*across* the direction of source travel (offset in y), where the bead's out-of-focus
copies never fall, because those spread along x only.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import NotMeasurable
from ..volume import Volume
from .roi import disk_weights


@dataclass(frozen=True)
class BeadSignals:
    """Signals of one bead through the volume.

    Attributes
    ----------
    z_mm : (nz,) plane heights.
    bead_mean, bg_mean : (nz,) mean value inside the bead region and in the strips.
    roi_mean_sd : (nz,) SD of the mean of a bead-sized region of background, measured
        from tiles of the strips (it includes the noise's correlation).
    x_mm : (nw,) positions along x of the profile columns.
    profile : (nz, nw) background-subtracted mean over the bead's rows, per column.
    profile_sd : (nz,) SD of one profile sample, from the difference of the two strips.
    centre_xy_mm : the bead's in-plane centre used.
    radius_mm : radius of the bead region.
    strip_offset_mm : distance in y from the bead centre to each strip's centre.
    """

    z_mm: np.ndarray
    bead_mean: np.ndarray
    bg_mean: np.ndarray
    roi_mean_sd: np.ndarray
    x_mm: np.ndarray
    profile: np.ndarray
    profile_sd: np.ndarray
    centre_xy_mm: tuple[float, float]
    radius_mm: float
    strip_offset_mm: float
    strip_rows: int


def bead_signals(volume: Volume, centre_xy_mm: tuple[float, float], bead_radius_mm: float, *,
                 half_window_mm: float = 15.0, strip_gap_mm: float = 1.5) -> BeadSignals:
    """Read the bead's region, its background strips and its x-profiles in every plane.

    Parameters
    ----------
    volume : Volume
    centre_xy_mm : (x, y) of the bead in mm.
    bead_radius_mm : radius of the bead.
    half_window_mm : half length along x of the profiles and of the strips.
    strip_gap_mm : clearance in y between the bead region and each strip.

    Raises
    ------
    NotMeasurable
        When the bead is too close to the volume's border for the strips.
    """
    dz, dy, dx = volume.spacing_mm
    nz, ny, nx = volume.shape
    x, y = centre_xy_mm
    _, iy, ix = volume.to_index((0.0, y, x))
    r_px = max(1.5, bead_radius_mm / min(dx, dy))
    rows_half = max(1, int(round(r_px * dx / dy if dy else r_px)))
    half_w = int(round(half_window_mm / dx))
    gap = int(np.ceil(r_px + strip_gap_mm / dy))
    c0, c1 = int(round(ix)) - half_w, int(round(ix)) + half_w + 1
    row = int(round(iy))
    bead_rows = slice(row - rows_half, row + rows_half + 1)
    n_rows = bead_rows.stop - bead_rows.start
    below = slice(row - gap - n_rows, row - gap)
    above = slice(row + gap + 1, row + gap + 1 + n_rows)
    if c0 < 0 or c1 > nx or below.start < 0 or above.stop > ny:
        raise NotMeasurable(f"bead at ({x:.1f}, {y:.1f}) mm is closer than "
                            f"{half_window_mm:g} mm (along x) or {(gap + n_rows) * dy:.1f} mm "
                            "(along y) to the edge of the volume")
    cols = slice(c0, c1)
    data = volume.data
    strip_a = data[:, below, cols].astype(np.float64)
    strip_b = data[:, above, cols].astype(np.float64)
    bg_cols = 0.5 * (strip_a.mean(axis=1) + strip_b.mean(axis=1))     # (nz, nw)
    prof = data[:, bead_rows, cols].astype(np.float64).mean(axis=1) - bg_cols
    # prof = bead rows - (A + B) / 2 with A, B, bead rows alike and independent, each of
    # variance v per column: var(prof) = 1.5 v, and var(A - B) = 2 v.
    diff = strip_a.mean(axis=1) - strip_b.mean(axis=1)
    profile_sd = diff.std(axis=1, ddof=1) * np.sqrt(0.75)
    h = int(np.ceil(r_px)) + 1
    r_lo, c_lo = int(round(iy)) - h, int(round(ix)) - h
    window = data[:, r_lo:r_lo + 2 * h + 1, c_lo:c_lo + 2 * h + 1].astype(np.float64)
    # Area-weighted pixels: the region's mean does not jump with the bead's sub-pixel
    # position (a binary disk changed its pixel count from 82 to 85 and the FWHM by 1.4 %).
    mask = disk_weights(window.shape[1:], (iy - r_lo, ix - c_lo), r_px)
    bead_mean = (window * mask).sum(axis=(1, 2)) / mask.sum()
    bg_mean = 0.5 * (strip_a.mean(axis=(1, 2)) + strip_b.mean(axis=(1, 2)))
    # Tiles of the strips as large as the bead region give the SD of such a mean.
    n_pix = int(round(mask.sum()))
    tile_w = max(1, int(round(n_pix / n_rows)))
    tiles = []
    for strip in (strip_a, strip_b):
        n_t = strip.shape[2] // tile_w
        t = strip[:, :, : n_t * tile_w].reshape(nz, n_rows, n_t, tile_w).mean(axis=(1, 3))
        tiles.append(t - t.mean(axis=1, keepdims=True))
    tiles = np.concatenate(tiles, axis=1)
    roi_mean_sd = tiles.std(axis=1, ddof=1) * np.sqrt(1.0 + 1.0 / tiles.shape[1])
    x_mm = volume.axis_mm(2)[cols]
    return BeadSignals(volume.axis_mm(0), bead_mean, bg_mean, roi_mean_sd, x_mm, prof,
                       profile_sd, (float(x), float(y)), float(r_px * min(dx, dy)),
                       float((gap + n_rows / 2) * dy), n_rows)
