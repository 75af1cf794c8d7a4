"""A matched forward projector ``A`` and backprojector ``Aᵀ`` for DBT on a ReconGrid.

``A`` maps a volume ``(nz, ny, nx)`` of attenuation (1/mm) to log projections
``(views, rows, columns)``, the line integrals approximated plane by plane; ``Aᵀ`` is
its exact adjoint (the same sparse matrices, transposed), so that
``<A x, y> = <x, Aᵀ y>`` holds to rounding. Both are what the algebraic methods
(:mod:`.sart`, :mod:`.tv`) iterate with.

For a source ``s`` a plane at height ``z`` maps onto the detector by a separable
scale-and-shift (:mod:`.grid`), so each plane's contribution to a view is two 1-D
sparse products with two entries per row, ``P += D ⊙ (Fv @ X_k @ Fu.T)``, never a
scatter of single voxels.
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np
from scipy import sparse

from ...errors import InputError
from ...parallel import workers
from ..geometry import DbtGeometry
from .grid import ReconGrid, Taps, plane_taps


@dataclass(frozen=True)
class _AxisMap:
    """One axis of one plane seen from one source position.

    ``back`` (outputs × pixels, CSR) interpolates detector pixels ``first:first + n``
    at the grid positions ``span[0]:span[1]``; ``fwd`` (CSC) is its transpose.
    """

    span: tuple[int, int]
    first: int
    back: sparse.csr_array
    fwd: sparse.csc_array


def _axis_map(taps: Taps) -> _AxisMap | None:
    """The interpolation matrix of one axis over the grid lines with a valid tap."""
    valid = np.flatnonzero(taps.valid)
    if valid.size == 0:
        return None
    lo, hi = int(valid[0]), int(valid[-1]) + 1
    index, weight, ok = taps.index[lo:hi], taps.weight[lo:hi], taps.valid[lo:hi]
    first = int(index[ok].min())
    count = int(index[ok].max()) + 2 - first
    n = hi - lo
    data = np.empty(2 * n)
    data[0::2] = np.where(ok, 1.0 - weight, 0.0)
    data[1::2] = np.where(ok, weight, 0.0)
    pixel = np.empty(2 * n, dtype=np.int32)
    pixel[0::2] = np.clip(index - first, 0, count - 2)
    pixel[1::2] = pixel[0::2] + 1
    indptr = np.arange(0, 2 * n + 1, 2, dtype=np.int32)
    # Footprint normalisation: each detector line receives the weighted *mean* of the
    # grid lines splatted onto it (weights divided by their sum over the grid lines).
    reach = np.bincount(pixel, weights=data, minlength=count)
    scale = np.divide(1.0, reach, out=np.zeros_like(reach), where=reach > 1e-12)
    data = (data * scale[pixel]).astype(np.float32)
    back = sparse.csr_array((data, pixel, indptr), shape=(n, count))
    fwd = sparse.csc_array((data, pixel, indptr), shape=(count, n))
    return _AxisMap((lo, hi), first, back, fwd)


class DbtProjector:
    """Forward projector ``A`` and its adjoint for a DBT geometry and a grid.

    Parameters
    ----------
    geometry : DbtGeometry
        Sources and detector.
    grid : ReconGrid
        Voxel centres; the planes must lie below every source.
    source_blur : bool
        Model each view as the weighted mean over the source sub-positions of
        :meth:`DbtGeometry.source_samples` (continuous motion, focal spot) instead of
        the nominal source alone.

    Notes
    -----
    For plane ``k`` and source ``s`` let ``Wv`` (ny × rows) and ``Wu`` (nx × columns)
    be the 1-D linear-interpolation matrices of :func:`.grid.sample` (two entries per
    row, zero where a voxel projects off the detector). The forward projection is

    ``P_s = D_s ⊙ Σ_k Nv Wvᵀ X_k Wu Nu``,  ``D_s(u, v) = dz / cos φ(u, v)``,

    where ``Nv = diag(1 / Wvᵀ1)`` and ``Nu = diag(1 / Wuᵀ1)`` (0 where a detector line
    receives nothing) turn the splat into a weighted mean of the voxels landing on each
    detector line, and ``φ(u, v)`` is the angle to the detector normal of the ray from
    ``s`` to the centre of pixel ``(u, v)``: ``cos φ = s_z / |s - (u, v, 0)|``. The
    voxels splatted onto a pixel lie on that ray (to within the interpolation), so
    ``dz / cos φ`` is the path length through one plane along it, taken per pixel, exact
    for the pixel's central ray, and common to all planes. A view is
    ``P = Σ_s w_s P_s`` over the source positions (one, weight 1, without
    ``source_blur``). The adjoint is ``X_k = Σ_s Wv Nv (D_s ⊙ Y) Nu Wuᵀ``: the
    bilinear backprojection of :func:`.grid.sample` applied to the weighted data.

    Why the normalisation: a plain splat sums ``(p / (m d))²`` voxels per pixel (``m``
    the magnification, ``d`` the voxel side, ``p`` the pitch). When a voxel's shadow is
    larger than a pixel (``m d > p``, the case of a grid at the detector pitch, where
    ``m = 1`` to 1.08) linear splatting leaves a moiré of under-filled pixels of
    relative depth up to ``(m d / p - 1) / 2`` per axis; the per-line normalisation
    removes it exactly for a uniform plane. Pixels are still point samples: when
    ``m d > 2 p`` some pixels lie between voxel shadows and stay 0, so use voxels no
    larger than about the demagnified pitch for a line-integral model.
    The model ignores the pixel aperture and the voxel's extent along the ray. The
    products run in float32 (the iterations need no more), accumulated per view and
    per plane.

    References
    ----------
    Kak & Slaney, Principles of Computerized Tomographic Imaging (IEEE Press, 1988),
    ch. 7 (the discrete model ``p = A x`` of algebraic reconstruction).
    """

    def __init__(self, geometry: DbtGeometry, grid: ReconGrid, *, source_blur: bool = False):
        self.geometry = geometry
        self.grid = grid
        self.source_blur = bool(source_blur)
        self.plane_mm = grid.spacing_mm[0]
        det = geometry.detector
        self._sources: list[list[tuple[np.ndarray, float]]] = []
        for view in range(geometry.n_views):
            if self.source_blur:
                pts, wts = geometry.source_samples(view)
            else:
                pts, wts = geometry.source_xyz(geometry.angles_deg[view])[None, :], [1.0]
            top = float(np.max(grid.z_mm))
            if np.any(pts[:, 2] <= top):
                raise InputError(f"the grid reaches z = {top:g} mm, at or above the source "
                                 f"of view {view} ({pts[:, 2].min():g} mm)", field="grid")
            self._sources.append([(np.asarray(p, float), float(w)) for p, w in zip(pts, wts)])
        # Per view, per source position, per plane: the two axis maps (None: off detector).
        self._maps = [[[self._plane_map(src, z) for z in grid.z_mm] for src, _ in view]
                      for view in self._sources]
        self._u = det.u_mm()
        self._v = det.v_mm()

    def _plane_map(self, source, z_mm):
        cols, rows = plane_taps(source, z_mm, self.grid, self.geometry.detector)
        mv, mu = _axis_map(rows), _axis_map(cols)
        return None if mv is None or mu is None else (mv, mu)

    @property
    def volume_shape(self) -> tuple[int, int, int]:
        return self.grid.shape

    @property
    def data_shape(self) -> tuple[int, int, int]:
        return (self.geometry.n_views,) + self.geometry.detector.shape

    def path_weights(self, view: int, position: int = 0) -> np.ndarray:
        """``dz / cos φ`` (mm) per detector pixel ``(rows, columns)`` for one source position."""
        s = self._sources[view][position][0]
        du = (self._u - s[0]) ** 2
        dv = (self._v - s[1]) ** 2
        return self.plane_mm * np.sqrt(dv[:, None] + du[None, :] + s[2] ** 2) / s[2]

    def _views(self, views) -> list[int]:
        if views is None:
            return list(range(self.geometry.n_views))
        views = [int(v) for v in np.atleast_1d(views)]
        bad = [v for v in views if not 0 <= v < self.geometry.n_views]
        if bad:
            raise InputError(f"view {bad[0]} does not exist; the geometry has "
                             f"{self.geometry.n_views} views", field="views")
        return views

    # -- forward --------------------------------------------------------------------
    def _splat(self, volume, view, position, planes) -> np.ndarray:
        """Σ over ``planes`` of the normalised splats, transposed: (columns, rows)."""
        acc_t = np.zeros(self.geometry.detector.shape[::-1], dtype=np.float32)
        for k in planes:
            m = self._maps[view][position][k]
            if m is None:
                continue
            mv, mu = m
            (j0, j1), (i0, i1) = mv.span, mu.span
            x = np.ascontiguousarray(volume[k, j0:j1, i0:i1], dtype=np.float32)
            along_rows = mv.fwd @ x                                # (rows', i1 - i0)
            block_t = mu.fwd @ np.ascontiguousarray(along_rows.T)  # (columns', rows')
            acc_t[mu.first:mu.first + block_t.shape[0],
                  mv.first:mv.first + block_t.shape[1]] += block_t
        return acc_t

    def forward(self, volume: np.ndarray, *, views=None) -> np.ndarray:
        """``A x``: projections ``(len(views), rows, columns)`` float32 of ``volume``.

        Parameters
        ----------
        volume : (nz, ny, nx) array_like
            Attenuation (1/mm) on the grid.
        views : sequence of int, optional
            The views to compute (default all), in this order.
        """
        volume = self._check(volume, self.volume_shape, "volume")
        views = self._views(views)
        nz = self.grid.shape[0]
        n_chunks = 1 if len(views) >= workers() else min(nz, workers())
        chunks = [range(c, nz, n_chunks) for c in range(n_chunks)]
        tasks = [(i, p, c) for i in range(len(views))
                 for p in range(len(self._sources[views[i]])) for c in chunks]
        out = np.zeros((len(views),) + self.geometry.detector.shape, dtype=np.float64)

        def run(task):
            i, p, planes = task
            return i, p, self._splat(volume, views[i], p, planes)

        with ThreadPoolExecutor(max_workers=workers()) as pool:
            for i, p, acc_t in pool.map(run, tasks):
                w = self._sources[views[i]][p][1]
                out[i] += (w * self.path_weights(views[i], p)) * acc_t.T
        return out.astype(np.float32)

    # -- adjoint --------------------------------------------------------------------
    def adjoint(self, data: np.ndarray, *, views=None) -> np.ndarray:
        """``Aᵀ y``: the exact adjoint of :meth:`forward`, a volume ``(nz, ny, nx)`` float32.

        Parameters
        ----------
        data : (len(views), rows, columns) array_like
        views : sequence of int, optional
            The views ``data`` holds (default all).
        """
        views = self._views(views)
        data = self._check(data, (len(views),) + self.geometry.detector.shape, "data")
        weighted = [[(w * self.path_weights(v, p) * data[i]).astype(np.float32)
                     for p, (_, w) in enumerate(self._sources[v])] for i, v in enumerate(views)]
        nz, ny, nx = self.grid.shape
        out = np.zeros(self.grid.shape, dtype=np.float32)

        def plane(k):
            acc_t = np.zeros((nx, ny), dtype=np.float32)
            for i, v in enumerate(views):
                for p, z in enumerate(weighted[i]):
                    m = self._maps[v][p][k]
                    if m is None:
                        continue
                    mv, mu = m
                    (j0, j1), (i0, i1) = mv.span, mu.span
                    sub = np.ascontiguousarray(z[mv.first:mv.first + mv.back.shape[1],
                                                 mu.first:mu.first + mu.back.shape[1]])
                    along_rows = mv.back @ sub                              # (j1 - j0, cols')
                    acc_t[i0:i1, j0:j1] += mu.back @ np.ascontiguousarray(along_rows.T)
            out[k] = acc_t.T

        with ThreadPoolExecutor(max_workers=workers()) as pool:
            list(pool.map(plane, range(nz)))
        return out

    @staticmethod
    def _check(arr, shape, what) -> np.ndarray:
        arr = np.asarray(arr)
        if arr.shape != tuple(shape):
            raise InputError(f"{what} of shape {arr.shape} does not fit the projector, "
                             f"expected {tuple(shape)}", field=what)
        return arr


__all__ = ["DbtProjector"]
