"""Ground-truth volumes: the phantom's attenuation averaged over each voxel.

Each voxel is sampled on a regular ``n × n × n`` sub-grid (``n = supersample``) and the
attenuation of the solids containing each sample is averaged; only the voxels near each
solid's bounding sphere are visited. This is the reference a reconstruction is compared
with, made independently of the projector (which uses exact chords).
"""

from __future__ import annotations

import numpy as np

from ..phantom.model import Phantom
from ..volume import Volume
from .recon.grid import ReconGrid


def _overlap(centres: np.ndarray, step: float, lo: float, hi: float) -> np.ndarray:
    """Fraction of each voxel interval ``[c - step/2, c + step/2]`` inside ``[lo, hi]``."""
    a = np.maximum(centres - step / 2, lo)
    b = np.minimum(centres + step / 2, hi)
    return np.clip(b - a, 0.0, None) / step


def _aligned_box(shape, grid: ReconGrid) -> np.ndarray:
    """Exact voxel fractions of an axis-aligned box (separable along z, y, x)."""
    (cx, cy, cz), (hx, hy, hz) = shape.centre_xyz_mm, shape.half_xyz_mm
    dz, dy, dx = grid.spacing_mm
    fz = _overlap(grid.z_mm, dz, cz - hz, cz + hz)
    fy = _overlap(grid.y_mm, dy, cy - hy, cy + hy)
    fx = _overlap(grid.x_mm, dx, cx - hx, cx + hx)
    return fz[:, None, None] * fy[None, :, None] * fx[None, None, :]


def voxelise(phantom: Phantom, grid: ReconGrid, *, supersample: int = 3) -> Volume:
    """Attenuation (1/mm) of ``phantom`` averaged over the voxels of ``grid``."""
    n = int(supersample)
    dz, dy, dx = grid.spacing_mm
    offs = (np.arange(n) + 0.5) / n - 0.5
    out = np.zeros(grid.shape, dtype=np.float64)
    for obj, delta in phantom.attenuating():
        if obj.shape.kind == "box" and np.allclose(obj.shape.rotation, np.eye(3)):
            out += delta * _aligned_box(obj.shape, grid)
            continue
        r = obj.shape.bounding_radius_mm
        cx, cy, cz = obj.shape.centre_xyz_mm
        sl = []
        for centres, c, step in ((grid.z_mm, cz, dz), (grid.y_mm, cy, dy), (grid.x_mm, cx, dx)):
            lo = np.searchsorted(centres, c - r - step)
            hi = np.searchsorted(centres, c + r + step, side="right")
            sl.append(slice(lo, hi))
        if any(s.stop <= s.start for s in sl):
            continue
        z = (grid.z_mm[sl[0]][:, None] + dz * offs[None, :]).ravel()
        y = (grid.y_mm[sl[1]][:, None] + dy * offs[None, :]).ravel()
        x = (grid.x_mm[sl[2]][:, None] + dx * offs[None, :]).ravel()
        block = np.zeros((sl[0].stop - sl[0].start, sl[1].stop - sl[1].start,
                          sl[2].stop - sl[2].start))
        for k, zk in enumerate(z):       # one sub-plane at a time keeps memory small
            yy, xx = np.meshgrid(y, x, indexing="ij")
            pts = np.stack([xx, yy, np.full_like(xx, zk)], axis=-1)
            inside = obj.shape.contains(pts).astype(np.float64)
            block[k // n] += inside.reshape(block.shape[1], n, block.shape[2], n).mean(axis=(1, 3))
        out[sl[0], sl[1], sl[2]] += delta * block / n
    return Volume(out.astype(np.float32), grid.spacing_mm, grid.origin_mm,
                  {"phantom": phantom.name, "simulated": "ground truth", "unit_of_value": "1/mm"})
