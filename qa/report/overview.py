"""The log's overview: the in-focus plane with every measuring region drawn on it."""

from __future__ import annotations

import numpy as np
from matplotlib.patches import Circle, Rectangle

from ..volume import Volume
from .figures import new_figure

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


#: What each drawn region measures: (key text, colour, line style), chosen by family and
#: region name (see :func:`region_kind`). Colours are light, to show on a grey plane, and
#: kinds within a family differ in line style, so colour is never the only cue.
REGION_KINDS = {
    "mtf": ("MTF: edge region (edge spread, along x and y)", "#5fd3e6", "-"),
    "asf_bead": ("ASF: bead region (signal per plane)", "#ffd166", "-"),
    "asf_background": ("ASF: background strips beside the bead", "#ffd166", "--"),
    "coverage": ("Angular coverage: x-z section through a bead", "#c9a0ff", "-"),
    "disk_signal": ("Detectability: disk signal region", "#a7e07a", "-"),
    "disk_background": ("Detectability: background annulus (inner, outer)", "#a7e07a", ":"),
    "nps": ("Noise power spectrum: region of the NPS", "#f4a261", "-."),
    "uniformity": ("Uniformity: grid cells", "#ff8fab", "-"),
    "other": ("other region", "#e0e0e0", "-"),
}


def region_kind(family: str, label: str) -> str:
    """The key of :data:`REGION_KINDS` for a region of ``family`` named ``label``."""
    text = label.lower()
    if "nps" in text:
        return "nps"
    if family == "asf":
        return "asf_background" if "background" in text else "asf_bead"
    if family == "detectability":
        return "disk_background" if "background" in text else "disk_signal"
    if family == "noise":
        return "uniformity"
    return family if family in REGION_KINDS else "other"


def overview_figure(volume: Volume, families, layout=None):
    """The in-focus plane with every region drawn and a key of what each one measures."""
    from matplotlib import patheffects
    from matplotlib.lines import Line2D

    k, _ = overview_plane(volume, families)
    plane, b = display_plane(volume.data[k])
    lo, hi = np.percentile(plane, [1, 99])
    dx, dy = b * volume.spacing_mm[2], b * volume.spacing_mm[1]
    # centres of the blocks drawn
    x = volume.axis_mm(2)[:plane.shape[1] * b].reshape(-1, b).mean(axis=1)
    y = volume.axis_mm(1)[:plane.shape[0] * b].reshape(-1, b).mean(axis=1)
    aspect = (y[-1] - y[0]) / max(x[-1] - x[0], 1e-9)
    fig, ax = new_figure(7.0, min(6.0, max(2.6, 4.2 * aspect + 0.5)))
    ax.imshow(plane, cmap="gray", vmin=lo, vmax=hi, origin="lower", interpolation="nearest",
              extent=(x[0] - dx / 2, x[-1] + dx / 2, y[0] - dy / 2, y[-1] + dy / 2))
    ax.grid(False)
    used = []
    for fam in families:
        for roi in fam.rois:
            kind = region_kind(fam.family, roi.label)
            _, colour, style = REGION_KINDS[kind]
            used.append(kind)
            cx, cy = roi.centre_xy_mm
            if roi.kind == "circle":
                patch = Circle((cx, cy), roi.size_mm[0] / 2, fill=False, lw=0.9, ec=colour,
                               ls=style)
            else:
                w, h = roi.size_mm
                patch = Rectangle((cx - w / 2, cy - h / 2), w, h, fill=False, lw=0.9,
                                  ec=colour, ls=style)
            ax.add_patch(patch)
    outline = [patheffects.withStroke(linewidth=2.0, foreground="black")]
    if layout is not None:
        for placed in layout.placed.values():
            if placed.obj.role in ("background",):
                continue
            px, py, _ = placed.centre_xyz_mm
            label = placed.id + ("" if placed.found else " (not found)")
            ax.annotate(label, (px, py), xytext=(4, 4), textcoords="offset points",
                        fontsize=7, color="white", path_effects=outline)
    ax.set_xlabel("x, along source travel (mm)")
    ax.set_ylabel("y, from chest wall (mm)")
    ax.set_title(f"plane {k} at z = {volume.axis_mm(0)[k]:.1f} mm", fontsize=8, loc="left")
    handles = [Line2D([], [], color=REGION_KINDS[kd][1], ls=REGION_KINDS[kd][2], lw=1.6,
                      label=REGION_KINDS[kd][0]) for kd in dict.fromkeys(used)]
    if handles:
        key = fig.legend(handles=handles, loc="outside right center", fontsize=6.5,
                         frameon=True, title="regions drawn", title_fontsize=7,
                         handlelength=2.6)
        key.get_frame().set_facecolor("#5c677d")
        key.get_frame().set_edgecolor("none")
        for text in key.get_texts() + [key.get_title()]:
            text.set_color("white")
    return fig
