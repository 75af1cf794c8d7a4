"""Placing test objects: nominal positions, with beads refined by a local search.

This first locator assumes the phantom sits where its definition says (a digital phantom,
or a physical one positioned on its marks). Each bead is searched for in 3-D within its
search radius; a bead that does not stand out from the noise is reported as not found,
and the metrics that need it say "not measured".
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage

from ..phantom.model import Phantom
from ..volume import Volume
from .layout import Layout, Placed, Pose

#: Defaults, overridable per phantom in ``analysis: {locate: {...}}``.
SEARCH_RADIUS_MM = 5.0
SEARCH_HALF_DEPTH_MM = 5.0
MIN_PEAK_SNR = 8.0


def _find_bead(volume: Volume, placed: Placed, polarity: float, options) -> Placed:
    radius = float(options.get("search_radius_mm", SEARCH_RADIUS_MM))
    depth = float(options.get("search_half_depth_mm", SEARCH_HALF_DEPTH_MM))
    min_snr = float(options.get("min_peak_snr", MIN_PEAK_SNR))
    x, y, z = placed.centre_xyz_mm
    dz, dy, dx = volume.spacing_mm
    iz, iy, ix = volume.to_index((z, y, x))
    nz, ny, nx = volume.shape
    lo = [int(max(0, np.floor(c - h))) for c, h in zip((iz, iy, ix), (depth / dz, radius / dy, radius / dx))]
    hi = [int(min(n, np.ceil(c + h) + 1)) for c, h, n in zip((iz, iy, ix), (depth / dz, radius / dy, radius / dx), (nz, ny, nx))]
    where = f"({x:.1f}, {y:.1f}, {z:.1f}) mm"
    if any(h - l < 3 for l, h in zip(lo, hi)):
        return Placed(placed.obj, placed.shape, False, f"{placed.id} not found near {where}: outside the volume")
    block = volume.data[lo[0]:hi[0], lo[1]:hi[1], lo[2]:hi[2]].astype(np.float64) * polarity
    # Subtract each plane's median so that a sloping background does not win the search,
    # then smooth over the bead's own size before looking for the peak.
    block = block - np.median(block, axis=(1, 2), keepdims=True)
    r_px = max(0.7, placed.obj.shape.half_xyz_mm[0] / max(dx, dy) * 0.7)
    smooth = ndimage.gaussian_filter(block, (0.0, r_px, r_px))
    peak = np.unravel_index(int(np.argmax(smooth)), smooth.shape)
    noise = 1.4826 * np.median(np.abs(smooth - np.median(smooth)))
    # A noiseless volume (simulation) has no noise to compare with: any peak counts.
    snr = smooth[peak] / noise if noise > 0 else (np.inf if smooth[peak] > 0 else 0.0)
    if snr < min_snr:
        return Placed(placed.obj, placed.shape, False,
                      f"{placed.id} not found near {where} (peak {snr:.1f} x noise, "
                      f"needs {min_snr:g})")
    # Centroid of the positive part around the peak, for sub-voxel in-plane position.
    pz = peak[0]
    w = int(np.ceil(2 * r_px)) + 1
    r0, c0 = max(0, peak[1] - w), max(0, peak[2] - w)
    patch = np.clip(smooth[pz, r0:peak[1] + w + 1, c0:peak[2] + w + 1], 0, None)
    cy, cx = ndimage.center_of_mass(patch) if patch.sum() > 0 else (peak[1] - r0, peak[2] - c0)
    found_z, found_y, found_x = volume.to_mm((lo[0] + pz, lo[1] + r0 + cy, lo[2] + c0 + cx))
    shape = placed.shape.moved((found_x, found_y, found_z))
    return Placed(placed.obj, shape, True, "")


def locate_nominal(volume: Volume, phantom: Phantom) -> Layout:
    """Place every object of ``phantom`` in ``volume`` (beads refined, others nominal)."""
    options = phantom.analysis.get("locate", {}) or {}
    bg = phantom.background
    mu_bg = bg.mu_per_mm if bg is not None and bg.mu_per_mm is not None else 0.0
    placed = {}
    for obj in phantom.objects:
        p = Placed(obj, obj.shape)
        if obj.role == "bead":
            polarity = 1.0 if (obj.mu_per_mm or 0.0) >= mu_bg else -1.0
            p = _find_bead(volume, p, polarity, options)
        placed[obj.id] = p
    return Layout(phantom, placed, Pose())
