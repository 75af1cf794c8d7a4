"""Fan-beam projection, matched backprojection and FBP of a 2D section (flat detector).

Geometry (section frame of :mod:`qa.simulate.exact2d`)
-----------------------------------------------------
At view ``beta`` the source sits at ``S = R (sin beta, -cos beta)``, ``R`` the
source-to-rotation-centre distance (``source_centre_mm``); the central ray runs along
``c = (-sin beta, cos beta)`` through the rotation centre, so at ``beta = theta`` it is
the parallel line ``t = 0`` of view ``theta``. The detector is **flat** (equally spaced
bins, not equiangular), perpendicular to ``c`` at ``D`` from the source
(``source_detector_mm``), with its axis ``e = (cos beta, sin beta)`` (the ``t`` axis of
the parallel view) and bin ``k`` centred at ``u_k = (k - (n_det - 1) / 2) det_mm``. The
ray through ``u`` has fan angle ``gamma = atan(u / D)`` and is the parallel line
``theta = beta - gamma``, ``t = R sin(gamma)``; the same line is measured again, reversed,
at ``beta + 180 deg - 2 gamma`` with ``-gamma`` (its conjugate).

Projector: pixel-driven. Each pixel is split into ``subpixels^2`` points; a point at
distance ``L`` from the source along ``c`` lands at ``u_P = D (P . e) / L`` and spreads
its value times area times ``D / (L cos gamma)`` (the spacing of rays at the point) over
the two nearest bins by linear interpolation. The backprojector is its exact transpose.

FBP: the weighted filtered backprojection for equally spaced collinear detectors (Kak &
Slaney 1988, section 3.4.2), on a virtual detector through the rotation centre
(``s = u R / D``): pre-weight ``R / sqrt(R^2 + s^2)``, ramp filter, backprojection
weighted by ``1 / U^2`` with ``U = L / R``. Redundant rays are weighted by
:func:`redundancy_weights`: one half each over a full 360-degree scan; Parker's weights
over a short scan (arc at least 180 degrees plus the full fan angle, extra arc used as
Parker's ``delta`` grows); over a shorter, limited arc each ray gets 1, or 1/2 where its
conjugate was also measured, with no smoothing, so the limited-arc streaks remain.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from .exact2d import (check_angles, check_length, check_sinogram, pixel_centres_mm,
                      ray_integrals)
from .section2d import angular_weights_rad, ramp_filter, sirt_iterate


@dataclass(frozen=True, eq=False, kw_only=True)
class FanBeam:
    """A fan-beam geometry over an image grid, with its projector and exact transpose.

    Parameters
    ----------
    shape : (ny, nx)
    pixel_mm : float
    angles_deg : (n_views,) array_like
        Source angles ``beta``, degrees (module notes).
    source_centre_mm, source_detector_mm : float
        ``R`` and ``D``; ``R`` must exceed the image's half diagonal, ``D > R``.
    n_det : int, optional
        Default: enough bins for the image's circumscribed circle.
    det_mm : float, optional
        Bin pitch on the detector; default ``pixel_mm * D / R`` (one pixel at the centre).
    subpixels : int
        Points per pixel side in the projector (aliasing falls as they grow).

    References
    ----------
    .. [1] Kak & Slaney, "Principles of Computerized Tomographic Imaging", IEEE Press
           1988, section 3.4.2.
    """

    shape: tuple[int, int]
    pixel_mm: float
    angles_deg: np.ndarray
    source_centre_mm: float
    source_detector_mm: float
    n_det: int | None = None
    det_mm: float | None = None
    subpixels: int = 2

    def __post_init__(self):
        shape = tuple(int(s) for s in self.shape)
        if len(shape) != 2 or min(shape) < 1:
            raise InputError(f"shape must be two positive sizes (ny, nx), got {self.shape!r}",
                             field="shape")
        d = check_length(self.pixel_mm, "pixel_mm")
        r = check_length(self.source_centre_mm, "source_centre_mm")
        dd = check_length(self.source_detector_mm, "source_detector_mm")
        half_diagonal = 0.5 * math.hypot(*shape) * d
        if r <= half_diagonal or dd <= r:
            raise InputError(f"need source_detector_mm > source_centre_mm > the image's half "
                             f"diagonal ({half_diagonal:g} mm), got {dd:g} and {r:g}",
                             field="source_centre_mm")
        det = d * dd / r if self.det_mm is None else check_length(self.det_mm, "det_mm")
        n_det = self.n_det
        if n_det is None:
            u_max = dd * math.tan(math.asin(half_diagonal / r))
            n_det = 2 * int(math.ceil(u_max / det)) + 2
        if int(n_det) < 1 or int(self.subpixels) < 1:
            raise InputError(f"n_det and subpixels must be positive counts, got {n_det!r}, "
                             f"{self.subpixels!r}", field="n_det")
        for name, value in (("shape", shape), ("pixel_mm", d), ("source_centre_mm", r),
                            ("source_detector_mm", dd), ("det_mm", det), ("n_det", int(n_det)),
                            ("subpixels", int(self.subpixels)),
                            ("angles_deg", check_angles(self.angles_deg))):
            object.__setattr__(self, name, value)

    @property
    def u_mm(self) -> np.ndarray:
        """Bin centres on the detector, mm."""
        return (np.arange(self.n_det) - (self.n_det - 1) / 2) * self.det_mm

    def _points(self, n: int):
        """Coordinates (x, y) of an ``n x n`` grid of points in every pixel."""
        x, y = pixel_centres_mm(self.shape, self.pixel_mm)
        sub = ((np.arange(n) + 0.5) / n - 0.5) * self.pixel_mm
        return (x[:, None] + sub).ravel(), (y[:, None] + sub).ravel()

    def _splat(self, beta: float, x, y):
        """Bin index, interpolation fraction and weight of every point at view beta."""
        sb, cb = math.sin(beta), math.cos(beta)
        along = self.source_centre_mm + (-x[None, :] * sb + y[:, None] * cb)   # L
        u = self.source_detector_mm * (x[None, :] * cb + y[:, None] * sb) / along
        cos_gamma = self.source_detector_mm / np.hypot(self.source_detector_mm, u)
        position = u / self.det_mm + (self.n_det - 1) / 2
        k0 = np.floor(position)
        weight = self.source_detector_mm / (along * cos_gamma * self.det_mm)
        return k0.astype(np.intp), position - k0, weight

    def project(self, image) -> np.ndarray:
        """Fan-beam sinogram ``[view, bin]`` of ``image`` (1/mm -> unitless)."""
        f = np.asarray(image, dtype=float)
        if f.shape != self.shape:
            raise InputError(f"image shape {f.shape} differs from the geometry's "
                             f"{self.shape}", field="image")
        n = self.subpixels
        x, y = self._points(n)
        values = np.repeat(np.repeat(f, n, axis=0), n, axis=1) * (self.pixel_mm / n) ** 2
        out = np.empty((len(self.angles_deg), self.n_det))
        for v, beta in enumerate(np.deg2rad(self.angles_deg)):
            k0, frac, weight = self._splat(beta, x, y)
            w = values * weight
            idx = np.concatenate([k0.ravel() + 1, k0.ravel() + 2])  # +1: room for bin -1
            wts = np.concatenate([(w * (1 - frac)).ravel(), (w * frac).ravel()])
            keep = (idx >= 1) & (idx <= self.n_det)
            out[v] = np.bincount(idx[keep], wts[keep], minlength=self.n_det + 2)[1:-1]
        return out

    def backproject(self, sinogram) -> np.ndarray:
        """The transpose of :meth:`project` applied to a ``[view, bin]`` array."""
        s = check_sinogram(sinogram, len(self.angles_deg), self.n_det)
        n = self.subpixels
        x, y = self._points(n)
        acc = np.zeros((len(y), len(x)))
        for v, beta in enumerate(np.deg2rad(self.angles_deg)):
            k0, frac, weight = self._splat(beta, x, y)
            padded = np.concatenate(([0.0], s[v], [0.0, 0.0]))
            lo = np.clip(k0 + 1, 0, self.n_det + 1)
            hi = np.clip(k0 + 2, 0, self.n_det + 1)
            acc += weight * ((1 - frac) * padded[lo] * (lo == k0 + 1)
                             + frac * padded[hi] * (hi == k0 + 2))
        ny, nx = self.shape
        return acc.reshape(ny, n, nx, n).sum(axis=(1, 3)) * (self.pixel_mm / n) ** 2

    def rays(self):
        """Source points and unit directions ``(n_views, n_det, 2)`` of every measured ray."""
        beta = np.deg2rad(self.angles_deg)[:, None]
        c = np.stack(np.broadcast_arrays(-np.sin(beta), np.cos(beta)), axis=-1)
        e = np.stack(np.broadcast_arrays(np.cos(beta), np.sin(beta)), axis=-1)
        source = -self.source_centre_mm * c
        direction = self.source_detector_mm * c + self.u_mm[None, :, None] * e
        return np.broadcast_to(source, direction.shape), direction / np.linalg.norm(
            direction, axis=-1, keepdims=True)


def exact_fan_sinogram(objects, geometry: FanBeam) -> np.ndarray:
    """Exact fan-beam line integrals of :mod:`~qa.simulate.exact2d` primitives."""
    points, directions = geometry.rays()
    return ray_integrals(objects, points_xy_mm=points, directions_xy=directions)


def parker_weight(b_rad, gamma_rad, delta_rad) -> np.ndarray:
    """Parker's short-scan weight at arc position ``b`` in ``[0, pi + 2 delta]``.

    Written for rays whose conjugate is at ``b + pi + 2 gamma`` (Parker's convention; in
    ours pass ``-gamma``). Needs ``delta >= |gamma|``; ``w(b, g) + w(b + pi + 2g, -g) = 1``.

    References
    ----------
    .. [1] Parker, "Optimal short scan convolution reconstruction for fanbeam CT",
           Med Phys 9, 1982.
    """
    b, g = np.broadcast_arrays(np.asarray(b_rad, float), np.asarray(gamma_rad, float))
    rise = np.sin(np.pi / 4 * b / np.maximum(delta_rad - g, 1e-12)) ** 2
    fall = np.sin(np.pi / 4 * (np.pi + 2 * delta_rad - b) / np.maximum(delta_rad + g, 1e-12)) ** 2
    w = np.where(b < 2 * delta_rad - 2 * g, rise, np.where(b <= np.pi - 2 * g, 1.0, fall))
    return np.where((b < 0) | (b > np.pi + 2 * delta_rad), 0.0, w)


def redundancy_weights(geometry: FanBeam) -> tuple[np.ndarray, str]:
    """Weights ``[view, bin]`` that sum to one over the measurements of each line.

    Returns the weights and the scan kind: ``"full"`` (360 degrees: 1/2 each),
    ``"short"`` (Parker, :func:`parker_weight`, ``delta = (arc - 180 deg) / 2``) or
    ``"limited"`` (1, or 1/2 where the conjugate ray lies inside the arc as well).
    """
    beta = np.deg2rad(geometry.angles_deg)
    gamma = np.arctan(geometry.u_mm / geometry.source_detector_mm)
    arc = float(beta.max() - beta.min())
    step = arc / max(len(beta) - 1, 1)
    if arc + step >= 2 * np.pi * (1 - 1e-9):
        return np.full((len(beta), geometry.n_det), 0.5), "full"
    if arc >= np.pi + 2 * np.abs(gamma).max():
        b = beta[:, None] - beta.min()
        return parker_weight(b, -gamma[None, :], (arc - np.pi) / 2), "short"
    conj = beta[:, None] - 2 * gamma[None, :]
    inside = lambda a: (a >= beta.min() - 1e-12) & (a <= beta.max() + 1e-12)
    twice = inside(conj + np.pi) | inside(conj - np.pi)
    return np.where(twice, 0.5, 1.0), "limited"


def fbp_fan(sinogram, geometry: FanBeam, *, filter_name: str = "ramp") -> np.ndarray:
    """Weighted filtered backprojection of a flat-detector fan-beam sinogram.

    Parameters
    ----------
    sinogram : (n_views, n_det) array_like
        Line integrals.
    geometry : FanBeam
        The acquisition and the output grid.
    filter_name : str
        Apodisation window (:data:`qa.simulate.section2d.WINDOWS`).

    Returns
    -------
    (ny, nx) ndarray, 1/mm

    Notes
    -----
    ``f(P) = sum_v w_v U^-2 Q_v(s_P)``, ``Q_v = ramp * (rho p_v R / sqrt(R^2 + s^2))``
    on the virtual detector ``s = u R / D`` of pitch ``det R / D``, ``rho`` the
    redundancy weights, ``w_v`` the angular interval of the view, ``U = L / R`` and
    ``s_P = R (P . e) / L`` (linear interpolation).

    References
    ----------
    .. [1] Kak & Slaney, "Principles of Computerized Tomographic Imaging", IEEE Press
           1988, section 3.4.2 (equally spaced collinear detectors).
    .. [2] Parker, Med Phys 9, 1982 (short-scan weights).
    """
    g = geometry
    s = check_sinogram(sinogram, len(g.angles_deg), g.n_det)
    r = g.source_centre_mm
    ds = g.det_mm * r / g.source_detector_mm
    s_virtual = g.u_mm * r / g.source_detector_mm
    rho, _ = redundancy_weights(g)
    q = ramp_filter(s * rho * (r / np.hypot(r, s_virtual)), det_mm=ds, filter_name=filter_name)
    q *= angular_weights_rad(g.angles_deg, period_deg=360.0)[:, None]
    x, y = pixel_centres_mm(g.shape, g.pixel_mm)
    out = np.zeros(g.shape)
    padded = np.zeros(g.n_det + 2)
    for v, beta in enumerate(np.deg2rad(g.angles_deg)):
        sb, cb = math.sin(beta), math.cos(beta)
        along = r + (-x[None, :] * sb + y[:, None] * cb)
        position = r * (x[None, :] * cb + y[:, None] * sb) / along / ds + (g.n_det - 1) / 2
        padded[1:-1] = q[v]
        value = np.interp(position, np.arange(-1, g.n_det + 1), padded)
        out += value * (r / along) ** 2
    return out


def sirt_fan(sinogram, geometry: FanBeam, *, n_iter: int = 100, relaxation: float = 1.0,
             rtol: float = 1e-4, nonnegative: bool = False):
    """SIRT with the matched fan-beam pair of :class:`FanBeam`.

    Returns ``(image, history)`` as :func:`~qa.simulate.section2d.sirt_parallel`, whose
    Notes (row- and column-normalised simultaneous updates, stopping rule) apply
    unchanged. Redundant rays need no weights here: the least-squares solution counts
    every measured line, and a line measured twice simply weighs twice.

    References
    ----------
    A. H. Andersen and A. C. Kak, "Simultaneous algebraic reconstruction technique
    (SART)", Ultrasonic Imaging 6, 81-94 (1984).
    """
    s = check_sinogram(sinogram, len(geometry.angles_deg), geometry.n_det)
    return sirt_iterate(geometry, s, n_iter=n_iter, relaxation=relaxation, rtol=rtol,
                        nonnegative=nonnegative)


def project_fan(image, *, angles_deg, pixel_mm: float, source_centre_mm: float,
                source_detector_mm: float, n_det: int | None = None,
                det_mm: float | None = None, subpixels: int = 2) -> np.ndarray:
    """Fan-beam sinogram ``[view, bin]`` of a 2D image (see :class:`FanBeam`)."""
    f = np.asarray(image, dtype=float)
    if f.ndim != 2:
        raise InputError(f"a section image is 2-D [y, x], got shape {f.shape}", field="image")
    return FanBeam(shape=f.shape, pixel_mm=pixel_mm, angles_deg=angles_deg,
                   source_centre_mm=source_centre_mm, source_detector_mm=source_detector_mm,
                   n_det=n_det, det_mm=det_mm, subpixels=subpixels).project(f)


def backproject_fan(sinogram, *, angles_deg, pixel_mm: float, shape, source_centre_mm: float,
                    source_detector_mm: float, det_mm: float | None = None,
                    subpixels: int = 2) -> np.ndarray:
    """The exact transpose of :func:`project_fan` (same keywords, plus ``shape``)."""
    s = check_sinogram(sinogram, len(check_angles(angles_deg)))
    return FanBeam(shape=shape, pixel_mm=pixel_mm, angles_deg=angles_deg,
                   source_centre_mm=source_centre_mm, source_detector_mm=source_detector_mm,
                   n_det=s.shape[1], det_mm=det_mm, subpixels=subpixels).backproject(s)
