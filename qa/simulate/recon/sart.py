"""SART and SIRT: algebraic reconstruction with the matched projector of :mod:`.projector`.

Both solve ``p = A x`` for the attenuation ``x`` (1/mm) by row- and column-normalised
corrections ``x ← x + λ C Aᵀ R (p − A x)``, with ``R = diag(1 / A 1)`` (one over the
length of each ray inside the grid) and ``C = diag(1 / Aᵀ 1)``; SIRT uses every view at
once, SART one view at a time.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ...errors import InputError
from ..acquire import Projections
from . import register
from .grid import ReconGrid
from .projector import DbtProjector

#: Column sums of every view are kept in memory below this size, recomputed above it.
CACHE_MB = 256.0


@dataclass(frozen=True)
class IterativeResult:
    """The outcome of an iterative reconstruction.

    ``residuals`` holds the stopping-rule quantity of each iteration (see the
    method's Notes), ``objective`` the value it minimises where that differs (empty
    otherwise); ``stopped_by`` is ``"iterations"`` or ``"tolerance"``.
    """

    volume: np.ndarray
    residuals: tuple[float, ...]
    iterations: int
    stopped_by: str
    objective: tuple[float, ...] = ()


def check_options(*, n_iter: int, relaxation: float | None = None, tol: float = 0.0) -> None:
    """Reject option values the iterations cannot use (shared by the iterative methods)."""
    if int(n_iter) != n_iter or n_iter < 1:
        raise InputError(f"n_iter must be a whole number >= 1, got {n_iter!r}", field="n_iter")
    if relaxation is not None and not 0.0 < relaxation < 2.0:
        raise InputError(f"relaxation must lie in (0, 2) for the iteration to converge, "
                         f"got {relaxation!r}", field="relaxation")
    if not tol >= 0.0:
        raise InputError(f"tol must be >= 0, got {tol!r}", field="tol")


def projector_for(projections: Projections, grid: ReconGrid, projector: DbtProjector | None,
                  source_blur: bool) -> DbtProjector:
    """The projector of ``projections`` on ``grid`` (a given one is checked to fit)."""
    if projector is None:
        return DbtProjector(projections.geometry, grid, source_blur=source_blur)
    mine, yours = projector.grid, grid
    same_grid = mine is yours or all(
        np.array_equal(a, b) for a, b in ((mine.z_mm, yours.z_mm), (mine.y_mm, yours.y_mm),
                                          (mine.x_mm, yours.x_mm)))
    if not same_grid or projector.geometry != projections.geometry:
        raise InputError("the projector given was made for another grid or geometry",
                         field="projector")
    return projector


def start_volume(x0, grid: ReconGrid) -> np.ndarray:
    if x0 is None:
        return np.zeros(grid.shape, dtype=np.float32)
    x = np.array(x0, dtype=np.float32)
    if x.shape != grid.shape:
        raise InputError(f"x0 of shape {x.shape} does not fit the grid {grid.shape}",
                         field="x0")
    return x


def _inverse(a: np.ndarray) -> np.ndarray:
    """1 / a where a > 0, else 0 (rays missing the grid, voxels no ray reaches)."""
    out = np.zeros(a.shape, dtype=np.float32)
    np.divide(1.0, a, out=out, where=a > 1e-12)
    return out


def converged(values, tol: float) -> bool:
    """Relative change of the last two values below ``tol``."""
    if tol <= 0 or len(values) < 2 or values[-2] == 0:
        return False
    return abs(values[-2] - values[-1]) / abs(values[-2]) < tol


def sirt_reconstruct(projections: Projections, grid: ReconGrid, *, n_iter: int = 10,
                     relaxation: float = 1.0, nonnegative: bool = True, tol: float = 1e-3,
                     x0=None, source_blur: bool = False,
                     projector: DbtProjector | None = None) -> IterativeResult:
    """SIRT with the matched projector.

    Parameters
    ----------
    projections : Projections
    grid : ReconGrid
    n_iter : int
        Largest number of iterations (each one forward and one backprojection).
    relaxation : float
        ``λ`` in (0, 2).
    nonnegative : bool
        Clip negative attenuation after every update.
    tol : float
        Stop when the weighted residual changes by less than this fraction between
        iterations (0: always run ``n_iter``).
    x0 : (nz, ny, nx) array_like, optional
        Start (default 0).
    source_blur : bool
        Model the source sub-positions of each view (see :class:`.DbtProjector`).
    projector : DbtProjector, optional
        A projector already built for this geometry and grid.

    Returns
    -------
    IterativeResult
        ``residuals[k] = ‖p − A x_k‖_R`` for ``k = 0 .. iterations`` (``x_0`` the start).

    Notes
    -----
    ``x_{k+1} = P(x_k + λ C Aᵀ R (p − A x_k))`` with ``R = diag(1 / A 1)``,
    ``C = diag(1 / Aᵀ 1)`` and ``P`` the clip at 0 (or the identity). This is the
    SIRT of Gregor & Benson (2008), eq. (2): a gradient step on
    ``½ ‖p − A x‖²_R`` in the metric ``C⁻¹``; since ``‖C^½ Aᵀ R A C^½‖ ≤ 1`` for
    non-negative ``A``, every ``λ`` in (0, 2) decreases ``‖p − A x‖_R`` monotonically
    (also with the clip, a projection onto a convex set in a diagonal metric).
    Stopping rule: after ``n_iter`` iterations, or earlier when
    ``|ρ_{k−1} − ρ_k| / ρ_{k−1} < tol`` with ``ρ_k = ‖p − A x_k‖_R``.

    References
    ----------
    J. Gregor and T. Benson, "Computational analysis and improvement of SIRT",
    IEEE Transactions on Medical Imaging 27(7), 918-924 (2008).
    A. C. Kak and M. Slaney, Principles of Computerized Tomographic Imaging (IEEE
    Press, 1988), section 7.4.
    """
    check_options(n_iter=n_iter, relaxation=relaxation, tol=tol)
    proj = projector_for(projections, grid, projector, source_blur)
    p = projections.data
    r_w = _inverse(proj.forward(np.ones(grid.shape, dtype=np.float32)))
    c_w = _inverse(proj.adjoint(np.ones(proj.data_shape, dtype=np.float32)))
    x = start_volume(x0, grid)
    residuals: list[float] = []
    stopped = "iterations"
    for k in range(int(n_iter) + 1):
        r = p - proj.forward(x) if (k or x0 is not None) else np.array(p)
        residuals.append(float(np.sqrt(np.sum(r_w * r.astype(np.float64) ** 2))))
        if k == n_iter:
            break
        if converged(residuals, tol):
            stopped = "tolerance"
            break
        x += relaxation * c_w * proj.adjoint(r_w * r)
        if nonnegative:
            np.maximum(x, 0.0, out=x)
    return IterativeResult(x, tuple(residuals), len(residuals) - 1, stopped)


def view_order(n_views: int) -> np.ndarray:
    """Views in an order that keeps consecutive ones far apart: sorted by the
    fractional part of ``i / golden ratio`` (common practice; an angularly spread
    order speeds up the convergence of view-by-view methods)."""
    return np.argsort((np.arange(n_views) * 0.6180339887498949) % 1.0, kind="stable")


def sart_reconstruct(projections: Projections, grid: ReconGrid, *, n_iter: int = 3,
                     relaxation: float = 0.5, nonnegative: bool = True, tol: float = 1e-3,
                     x0=None, source_blur: bool = False,
                     projector: DbtProjector | None = None) -> IterativeResult:
    """SART with the matched projector: one correction per view.

    Parameters
    ----------
    n_iter : int
        Largest number of sweeps through all views.
    relaxation : float
        ``λ`` in (0, 2).
    nonnegative, tol, x0, source_blur, projector
        As for :func:`sirt_reconstruct`.

    Returns
    -------
    IterativeResult
        ``residuals[k]``: the weighted residual met during sweep ``k + 1``,
        ``sqrt(Σ_i ‖p_i − A_i x‖²_{R_i})`` with each view's term taken just before
        that view's correction.

    Notes
    -----
    For view ``i`` (visited in the order of :func:`view_order`):
    ``x ← P(x + λ C_i A_iᵀ R_i (p_i − A_i x))``, ``R_i = diag(1 / A_i 1)``,
    ``C_i = diag(1 / A_iᵀ 1)``: the simultaneous correction from all rays of one
    projection of Andersen & Kak (1984), with the interpolation matrix of
    :class:`.DbtProjector` in place of their bilinear ray sampling.
    Stopping rule: after ``n_iter`` sweeps, or earlier when the sweep residual
    changes by less than ``tol`` (relative) from one sweep to the next.

    References
    ----------
    A. H. Andersen and A. C. Kak, "Simultaneous algebraic reconstruction technique
    (SART): a superior implementation of the ART algorithm", Ultrasonic Imaging 6,
    81-94 (1984).
    """
    check_options(n_iter=n_iter, relaxation=relaxation, tol=tol)
    proj = projector_for(projections, grid, projector, source_blur)
    p = projections.data
    ones_v = np.ones(grid.shape, dtype=np.float32)
    ones_d = np.ones((1,) + proj.data_shape[1:], dtype=np.float32)
    r_w = _inverse(proj.forward(ones_v))
    n_views = proj.data_shape[0]
    cache = n_views * ones_v.nbytes / 2 ** 20 <= CACHE_MB
    c_cache = [None] * n_views
    x = start_volume(x0, grid)
    residuals: list[float] = []
    stopped = "iterations"
    for _ in range(int(n_iter)):
        total = 0.0
        for i in view_order(n_views):
            c_i = c_cache[i]
            if c_i is None:
                c_i = _inverse(proj.adjoint(ones_d, views=[i]))
                if cache:
                    c_cache[i] = c_i
            r = p[i] - proj.forward(x, views=[i])[0]
            total += float(np.sum(r_w[i] * r.astype(np.float64) ** 2))
            x += relaxation * c_i * proj.adjoint((r_w[i] * r)[None], views=[i])
            if nonnegative:
                np.maximum(x, 0.0, out=x)
        residuals.append(float(np.sqrt(total)))
        if converged(residuals, tol):
            stopped = "tolerance"
            break
    return IterativeResult(x, tuple(residuals), len(residuals), stopped)


@register("sirt", "SIRT, row/column-normalised simultaneous iterations (Gregor & Benson 2008)")
def sirt(projections: Projections, grid: ReconGrid, **options) -> np.ndarray:
    """Registered SIRT: the volume of :func:`sirt_reconstruct` (same options)."""
    return sirt_reconstruct(projections, grid, **options).volume


@register("sart", "SART, one normalised correction per view (Andersen & Kak 1984)")
def sart(projections: Projections, grid: ReconGrid, **options) -> np.ndarray:
    """Registered SART: the volume of :func:`sart_reconstruct` (same options)."""
    return sart_reconstruct(projections, grid, **options).volume
