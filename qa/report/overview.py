"""The log's overview: the in-focus plane with every measuring region drawn on it."""

from __future__ import annotations

import numpy as np
from matplotlib.patches import Circle, Rectangle

from ..volume import Volume
from .figures import PALETTE, new_figure

#: Largest side, in pixels, of the plane drawn: the figure is some 730 pixels wide in the
#: log, so a clinical plane (2000 x 2500) is averaged in blocks first; drawing it whole
#: costs seconds and megabytes for nothing seen.
MAX_PIXELS = 1024


def display_plane(plane: np.ndarray, *, max_pixels: int = MAX_PIXELS):
    """``plane`` averaged in ``b x b`` blocks so that no side exceeds ``max_pixels``.

    Returns ``(image, b)``; rows and columns past the last whole block are dropped.
    """
    b = int(np.ceil(max(plane.shape) / max_pixels))
    if b <= 1:
        return plane, 1
    ny, nx = plane.shape[0] // b, plane.shape[1] // b
    return plane[:ny * b, :nx * b].reshape(ny, b, nx, b).mean(axis=(1, 3)), b


def overview_plane(volume: Volume, families) -> tuple[int, list]:
    """The plane holding most regions, and the regions of every family."""
    rois = [roi for fam in families for roi in fam.rois]
    if rois:
        planes = [volume.plane_index(r.z_mm) for r in rois]
        k = max(set(planes), key=planes.count)
    else:
        k = volume.shape[0] // 2
    return k, rois


def overview_figure(volume: Volume, families, layout=None):
    k, rois = overview_plane(volume, families)
    plane, b = display_plane(volume.data[k])
    lo, hi = np.percentile(plane, [1, 99])
    dx, dy = b * volume.spacing_mm[2], b * volume.spacing_mm[1]
    # centres of the blocks drawn
    x = volume.axis_mm(2)[:plane.shape[1] * b].reshape(-1, b).mean(axis=1)
    y = volume.axis_mm(1)[:plane.shape[0] * b].reshape(-1, b).mean(axis=1)
    aspect = (y[-1] - y[0]) / max(x[-1] - x[0], 1e-9)
    fig, ax = new_figure(5.6, min(6.0, 5.6 * aspect + 0.6))
    ax.imshow(plane, cmap="gray", vmin=lo, vmax=hi, origin="lower", interpolation="nearest",
              extent=(x[0] - dx / 2, x[-1] + dx / 2, y[0] - dy / 2, y[-1] + dy / 2))
    ax.grid(False)
    for i, roi in enumerate(rois):
        colour = PALETTE[(i % (len(PALETTE) - 1)) + 1]
        cx, cy = roi.centre_xy_mm
        if roi.kind == "circle":
            ax.add_patch(Circle((cx, cy), roi.size_mm[0] / 2, fill=False, lw=0.7, ec=colour))
        else:
            w, h = roi.size_mm
            ax.add_patch(Rectangle((cx - w / 2, cy - h / 2), w, h, fill=False, lw=0.7, ec=colour))
    if layout is not None:
        for placed in layout.placed.values():
            if placed.obj.role in ("background",):
                continue
            px, py, _ = placed.centre_xyz_mm
            label = placed.id + ("" if placed.found else " (not found)")
            ax.annotate(label, (px, py), xytext=(3, 3), textcoords="offset points", fontsize=6,
                        color="#f4d35e")
    ax.set_xlabel("x, along source travel (mm)")
    ax.set_ylabel("y, from chest wall (mm)")
    ax.set_title(f"plane {k} at z = {volume.axis_mm(0)[k]:.1f} mm", fontsize=8)
    return fig
