"""The grid a reconstruction is computed on, and the plane-to-detector mapping.

For a source at ``s = (sx, sy, sz)`` a point ``(x, y, z)`` projects onto the detector
plane at ``u = sx + (x - sx) m``, ``v = sy + (y - sy) m`` with ``m = sz / (sz - z)``: for
each plane and view the mapping is a separable scale-and-shift in x and in y, which is
what makes shift-and-add and backprojection cheap (two 1-D interpolations per plane).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..geometry import Detector


@dataclass(frozen=True)
class ReconGrid:
    """Voxel centres of a reconstruction: plane heights, row (y) and column (x) positions."""

    z_mm: np.ndarray
    y_mm: np.ndarray
    x_mm: np.ndarray

    @classmethod
    def from_field(cls, x_range_mm, y_range_mm, z_range_mm, *, pixel_mm: float,
                   plane_mm: float) -> "ReconGrid":
        """Voxels filling the box ``[x0, x1] x [y0, y1] x [z0, z1]`` edge to edge."""
        def centres(lo, hi, step):
            n = max(1, int(round((hi - lo) / step)))
            return lo + step * (np.arange(n) + 0.5)
        return cls(centres(*z_range_mm, plane_mm), centres(*y_range_mm, pixel_mm),
                   centres(*x_range_mm, pixel_mm))

    @property
    def shape(self) -> tuple[int, int, int]:
        return (self.z_mm.size, self.y_mm.size, self.x_mm.size)

    @property
    def spacing_mm(self) -> tuple[float, float, float]:
        def step(a):
            return float(a[1] - a[0]) if a.size > 1 else 1.0
        return (step(self.z_mm), step(self.y_mm), step(self.x_mm))

    @property
    def origin_mm(self) -> tuple[float, float, float]:
        return (float(self.z_mm[0]), float(self.y_mm[0]), float(self.x_mm[0]))


@dataclass(frozen=True)
class Taps:
    """Linear-interpolation taps of one axis: ``value = (1-w) a[i] + w a[i+1]``."""

    index: np.ndarray
    weight: np.ndarray
    valid: np.ndarray


def axis_taps(positions_mm: np.ndarray, source_mm: float, magnification: float,
              first_centre_mm: float, pitch_mm: float, n_pixels: int) -> Taps:
    """Taps into detector pixels for points at ``positions_mm`` on one axis."""
    detector_mm = source_mm + (positions_mm - source_mm) * magnification
    f = (detector_mm - first_centre_mm) / pitch_mm
    i = np.floor(f).astype(np.int64)
    w = f - i
    valid = (f >= 0) & (f <= n_pixels - 1)
    i = np.clip(i, 0, max(n_pixels - 2, 0))
    w = np.where(valid, np.clip(f - i, 0.0, 1.0), 0.0)
    return Taps(i, w, valid)


def plane_taps(source_xyz: np.ndarray, z_mm: float, grid: ReconGrid,
               detector: Detector) -> tuple[Taps, Taps]:
    """Column taps (for grid x) and row taps (for grid y) of one plane in one view."""
    sx, sy, sz = source_xyz
    m = sz / (sz - z_mm)
    cols = axis_taps(grid.x_mm, sx, m, detector.first_centre_xy_mm[0], detector.pitch_mm,
                     detector.columns)
    rows = axis_taps(grid.y_mm, sy, m, detector.first_centre_xy_mm[1], detector.pitch_mm,
                     detector.rows)
    return cols, rows


#: Output rows per pass of :func:`sample`: its work buffers stay small and are reused
#: from block to block instead of fresh page-mapped arrays for every call.
SAMPLE_BLOCK_ROWS = 64


def _sample_rows(out, sub, rows, lo, hi, ci, wc0, wc1, wr0, wr1, span):
    """Rows ``lo:hi`` of :func:`sample` into ``out`` (columns ``span``)."""
    n = min(SAMPLE_BLOCK_ROWS, hi - lo)
    dtype = out.dtype
    r, t = np.empty((n, sub.shape[1]), dtype), np.empty((n, sub.shape[1]), dtype)
    a, b = np.empty((n, ci.size), dtype), np.empty((n, ci.size), dtype)
    ci1 = ci + 1
    for j0 in range(lo, hi, n):
        j1 = min(j0 + n, hi)
        rj, tj, aj, bj = r[:j1 - j0], t[:j1 - j0], a[:j1 - j0], b[:j1 - j0]
        np.multiply(sub[rows.index[j0:j1]], wr0[j0:j1, None], out=rj)
        np.multiply(sub[rows.index[j0:j1] + 1], wr1[j0:j1, None], out=tj)
        rj += tj
        np.take(rj, ci, axis=1, out=aj, mode="wrap")
        np.take(rj, ci1, axis=1, out=bj, mode="wrap")
        aj *= wc0
        bj *= wc1
        np.add(aj, bj, out=out[j0:j1, span])


def sample(image: np.ndarray, cols: Taps, rows: Taps) -> np.ndarray:
    """Bilinear samples ``(ny, nx)`` of a detector image at the taps (0 outside).

    Notes
    -----
    ``out[j, i] = (1 - wc_i) r_j[c_i] + wc_i r_j[c_i + 1]`` of the row-interpolated
    ``r_j = (1 - wr_j) image[k_j] + wr_j image[k_j + 1]``, 0 where a tap is invalid, in
    float32 for a float32 image (the projections; half the memory traffic, and the
    samples are then as exact as the data) and in float64 otherwise. Only the detector columns the plane reaches are read, a block of rows at a
    time with work buffers reused between blocks. numpy releases the GIL in these
    loops, so calls for different planes can run in parallel threads.
    """
    ny, nx = rows.index.size, cols.index.size
    dtype = np.float32 if image.dtype == np.float32 else np.float64
    valid_r, valid_c = np.flatnonzero(rows.valid), np.flatnonzero(cols.valid)
    if valid_r.size == 0 or valid_c.size == 0:
        return np.zeros((ny, nx), dtype)
    j_lo, j_hi = int(valid_r[0]), int(valid_r[-1]) + 1
    i_lo, i_hi = int(valid_c[0]), int(valid_c[-1]) + 1
    out = np.empty((ny, nx), dtype)   # every element is written once: the margins here
    out[:j_lo] = 0.0
    out[j_hi:] = 0.0
    out[j_lo:j_hi, :i_lo] = 0.0
    out[j_lo:j_hi, i_hi:] = 0.0
    ci = cols.index[i_lo:i_hi]
    c0 = int(ci.min())
    ok_c, w_c = cols.valid[i_lo:i_hi], cols.weight[i_lo:i_hi]
    weights = [np.where(ok_c, 1.0 - w_c, 0.0), np.where(ok_c, w_c, 0.0),
               np.where(rows.valid, 1.0 - rows.weight, 0.0), np.where(rows.valid, rows.weight, 0.0)]
    _sample_rows(out, image[:, c0:int(ci.max()) + 2], rows, j_lo, j_hi, ci - c0,
                 *(w.astype(dtype) for w in weights), slice(i_lo, i_hi))
    return out


def spread(plane: np.ndarray, cols: Taps, rows: Taps, shape: tuple[int, int]) -> np.ndarray:
    """The adjoint of :func:`sample`: splat a plane ``(ny, nx)`` onto a detector image."""
    p = plane * (rows.valid[:, None] & cols.valid[None, :])
    tmp = np.zeros((p.shape[0], shape[1]))
    np.add.at(tmp.T, cols.index, (p * (1.0 - cols.weight)).T)
    np.add.at(tmp.T, cols.index + 1, (p * cols.weight).T)
    out = np.zeros(shape)
    np.add.at(out, rows.index, tmp * (1.0 - rows.weight)[:, None])
    np.add.at(out, rows.index + 1, tmp * rows.weight[:, None])
    return out
