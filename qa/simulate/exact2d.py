"""Exact line integrals of 2D primitives (disks, ellipses, rotated rectangles).

This is the phantom side of the 2D section simulator: sinograms computed here come from
closed-form chord lengths, never from a discretised image, so reconstructions made with
:mod:`qa.simulate.section2d` and :mod:`qa.simulate.fan2d` are not tested against their
own projectors.

The section frame (shared by every 2D module)
---------------------------------------------
An image is indexed ``[y, x]`` (row, column). The centre of pixel ``[i, j]`` lies at
``x = (j - (nx - 1) / 2) * pixel_mm`` and ``y = (i - (ny - 1) / 2) * pixel_mm``: the origin
(the rotation centre) is the geometric centre of the image and ``y`` grows with the row
index. Angles are measured from ``+x`` towards ``+y`` (on a display with row 0 at the top
they turn clockwise). A parallel line with angle ``theta`` and detector coordinate ``t``
is the set ``{(x, y): x cos(theta) + y sin(theta) = t}``; it runs along the direction
``theta + 90 deg``. :func:`pixel_centres_mm` and the ``check_*`` functions (angles,
lengths, ``[view, bin]`` sinograms) are the frame's shared pieces.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import numpy as np

from ..errors import InputError

KINDS = ("ellipse", "rectangle")


@dataclass(frozen=True)
class Primitive2D:
    """One uniform 2D object of the phantom.

    Parameters
    ----------
    kind : {"ellipse", "rectangle"}
        A disk is an ellipse with equal semi-axes.
    centre_xy_mm : (float, float)
        Centre ``(x, y)`` in the section frame, mm.
    half_axes_mm : (float, float)
        Semi-axes (ellipse) or half side lengths (rectangle) along the object's own
        axes, before rotation, mm.
    rotation_deg : float
        Turn of the object's first axis from ``+x`` towards ``+y``, degrees.
    value_per_mm : float
        Linear attenuation (1/mm). Overlapping objects add.
    """

    kind: str
    centre_xy_mm: tuple[float, float]
    half_axes_mm: tuple[float, float]
    rotation_deg: float = 0.0
    value_per_mm: float = 1.0

    def __post_init__(self):
        if self.kind not in KINDS:
            raise InputError(f"unknown primitive '{self.kind}'; expected one of {KINDS}",
                             field="kind")
        half = tuple(float(h) for h in self.half_axes_mm)
        if len(half) != 2 or not all(math.isfinite(h) and h > 0 for h in half):
            raise InputError(f"half axes must be two positive lengths in mm, got "
                             f"{self.half_axes_mm!r}", field="half_axes_mm")
        centre = tuple(float(c) for c in self.centre_xy_mm)
        if len(centre) != 2 or not all(math.isfinite(c) for c in centre):
            raise InputError(f"centre must be two finite numbers (x, y) in mm, got "
                             f"{self.centre_xy_mm!r}", field="centre_xy_mm")
        object.__setattr__(self, "half_axes_mm", half)
        object.__setattr__(self, "centre_xy_mm", centre)
        object.__setattr__(self, "rotation_deg", float(self.rotation_deg))
        object.__setattr__(self, "value_per_mm", float(self.value_per_mm))

    def _to_local(self, x_mm, y_mm):
        """Coordinates along the object's own axes (rotation undone, centre removed)."""
        phi = math.radians(self.rotation_deg)
        dx, dy = x_mm - self.centre_xy_mm[0], y_mm - self.centre_xy_mm[1]
        return dx * math.cos(phi) + dy * math.sin(phi), -dx * math.sin(phi) + dy * math.cos(phi)

    def contains(self, x_mm, y_mm) -> np.ndarray:
        """True where the points ``(x_mm, y_mm)`` lie inside (boundary included)."""
        u, v = self._to_local(np.asarray(x_mm, float), np.asarray(y_mm, float))
        a, b = self.half_axes_mm
        if self.kind == "ellipse":
            return (u / a) ** 2 + (v / b) ** 2 <= 1.0
        return (np.abs(u) <= a) & (np.abs(v) <= b)


def disk(centre_xy_mm, radius_mm: float, *, value_per_mm: float) -> Primitive2D:
    """A uniform disk of radius ``radius_mm``."""
    return Primitive2D("ellipse", centre_xy_mm, (radius_mm, radius_mm), 0.0, value_per_mm)


def ellipse(centre_xy_mm, semi_axes_mm, *, rotation_deg: float = 0.0,
            value_per_mm: float) -> Primitive2D:
    """A uniform ellipse with semi-axes ``(a, b)`` turned by ``rotation_deg``."""
    return Primitive2D("ellipse", centre_xy_mm, tuple(semi_axes_mm), rotation_deg, value_per_mm)


def rectangle(centre_xy_mm, size_mm, *, rotation_deg: float = 0.0,
              value_per_mm: float) -> Primitive2D:
    """A uniform rectangle of sides ``size_mm = (width, height)`` turned by ``rotation_deg``."""
    half = tuple(float(s) / 2.0 for s in size_mm)
    return Primitive2D("rectangle", centre_xy_mm, half, rotation_deg, value_per_mm)


def pixel_centres_mm(shape, pixel_mm: float) -> tuple[np.ndarray, np.ndarray]:
    """Positions ``(x_mm, y_mm)`` of the pixel centres of an image of ``shape = (ny, nx)``.

    The origin is the geometric centre of the image (see the module notes).
    """
    ny, nx = (int(s) for s in shape)
    x = (np.arange(nx) - (nx - 1) / 2.0) * pixel_mm
    y = (np.arange(ny) - (ny - 1) / 2.0) * pixel_mm
    return x, y


def check_angles(angles_deg) -> np.ndarray:
    """View angles as a 1-D float array, refusing empty or non-finite input."""
    a = np.atleast_1d(np.asarray(angles_deg, dtype=float))
    if a.ndim != 1 or a.size == 0 or not np.all(np.isfinite(a)):
        raise InputError(f"angles must be a non-empty list of finite degrees, got shape "
                         f"{a.shape}", field="angles_deg")
    return a


def check_length(value, field: str) -> float:
    """A positive finite length in mm, or an InputError naming ``field``."""
    v = float(value)
    if not (math.isfinite(v) and v > 0):
        raise InputError(f"{field} must be a positive length in mm, got {value!r}", field=field)
    return v


def check_sinogram(sinogram, n_views: int, n_det: int | None = None) -> np.ndarray:
    """A ``[view, bin]`` float array with one row per view (and ``n_det`` bins if given)."""
    s = np.asarray(sinogram, dtype=float)
    if s.ndim != 2 or s.shape[0] != n_views or n_det not in (None, s.shape[1]):
        raise InputError(f"a sinogram is [view, bin] with one row per angle ({n_views})"
                         + ("" if n_det is None else f" and {n_det} bins")
                         + f", got shape {s.shape}", field="sinogram")
    return s


def box_spline(t, widths) -> np.ndarray:
    """The convolution of unit-area boxes of the given widths, evaluated at ``t``.

    Parameters
    ----------
    t : array_like
        Abscissae, in the unit of ``widths``.
    widths : sequence of float
        Box widths (at least one positive). Widths below 1e-6 of the largest are taken
        as Dirac impulses (the error is of second order in the width).

    Notes
    -----
    With ``B_w(t) = (H(t + w/2) - H(t - w/2)) / w`` and the truncated power
    ``R_k(x) = x_+^k / k!`` (``R_0`` the unit step, one half at 0),
    ``(B_w1 * ... * B_wn)(t) = (prod w_i)^-1 sum_{e in {+1,-1}^n} (prod e_i)
    R_{n-1}(t + sum_i e_i w_i / 2)``. The projection of a ``w1 x w2`` rectangle at angle
    ``alpha`` to its sides is ``w1 w2 (B_{w1 |cos a|} * B_{w2 |sin a|})(t)``.

    References
    ----------
    .. [1] de Boor, "A Practical Guide to Splines", Springer 1978 (truncated powers and
           divided differences).
    """
    t = np.asarray(t, dtype=float)
    w = np.asarray(widths, dtype=float)
    if w.ndim != 1 or w.size == 0 or not np.all(np.isfinite(w)) or w.max() <= 0:
        raise InputError(f"box widths must be finite with at least one positive, got {widths!r}",
                         field="widths")
    w = w[w > 1e-6 * w.max()]
    k = w.size - 1
    out = np.zeros_like(t)
    for signs in itertools.product((1.0, -1.0), repeat=w.size):
        x = t + 0.5 * float(np.dot(signs, w))
        if k == 0:
            term = np.where(x > 0, 1.0, np.where(x == 0, 0.5, 0.0))
        else:
            term = np.where(x > 0, x, 0.0) ** k / math.factorial(k)
        out += float(np.prod(signs)) * term
    out /= float(np.prod(w))
    out[np.abs(t) > 0.5 * w.sum()] = 0.0  # exact zero outside the support (no round-off)
    return out


def _ellipse_mean_chord(u, sigma, w):
    """Mean over ``[u - w/2, u + w/2]`` of ``sqrt(sigma^2 - v^2)`` (zero outside)."""
    def antiderivative(v):
        v = np.clip(v, -sigma, sigma)
        return 0.5 * (v * np.sqrt(np.maximum(sigma ** 2 - v ** 2, 0.0))
                      + sigma ** 2 * np.arcsin(v / sigma))
    return (antiderivative(u + w / 2) - antiderivative(u - w / 2)) / w


def parallel_integrals(objects, *, angles_deg, t_mm, aperture_mm: float = 0.0) -> np.ndarray:
    """Exact parallel-beam line integrals of a set of primitives.

    Parameters
    ----------
    objects : sequence of Primitive2D
    angles_deg : (n_views,) array_like
        Line normal angles, degrees (section frame).
    t_mm : (n_t,) array_like
        Detector coordinates ``t = x cos(theta) + y sin(theta)`` of the lines, mm.
    aperture_mm : float
        0 for ideal lines; otherwise the mean of the line integral over
        ``[t - aperture/2, t + aperture/2]`` (a detector bin of that width), exactly.

    Returns
    -------
    (n_views, n_t) ndarray
        Sum over objects of ``value_per_mm`` times the chord length (unitless).

    Notes
    -----
    Ellipse with semi-axes ``a, b`` turned by ``phi``, ``alpha = theta - phi``,
    ``sigma^2 = a^2 cos^2 alpha + b^2 sin^2 alpha`` and ``u = t - c . n``: chord
    ``2 a b / sigma^2 * sqrt(sigma^2 - u^2)``; a disk gives ``2 sqrt(r^2 - u^2)``. Its bin
    mean uses ``int sqrt(s^2 - v^2) dv = (v sqrt(s^2 - v^2) + s^2 asin(v / s)) / 2``.
    Rectangle with sides ``2a, 2b``: ``4ab (B_{2a|cos alpha|} * B_{2b|sin alpha|})(u)``,
    and one more box of the aperture's width for the bin mean (:func:`box_spline`).

    References
    ----------
    .. [1] Kak & Slaney, "Principles of Computerized Tomographic Imaging", IEEE Press
           1988, section 3.2 (projections of an ellipse).
    """
    theta = np.deg2rad(np.atleast_1d(np.asarray(angles_deg, dtype=float)))[:, None]
    t = np.atleast_1d(np.asarray(t_mm, dtype=float))[None, :]
    if aperture_mm < 0 or not math.isfinite(aperture_mm):
        raise InputError(f"aperture must be a length >= 0 in mm, got {aperture_mm!r}",
                         field="aperture_mm")
    out = np.zeros((theta.shape[0], t.shape[1]))
    for obj in objects:
        a, b = obj.half_axes_mm
        alpha = theta - math.radians(obj.rotation_deg)
        u = t - (obj.centre_xy_mm[0] * np.cos(theta) + obj.centre_xy_mm[1] * np.sin(theta))
        if obj.kind == "ellipse":
            sigma = np.sqrt((a * np.cos(alpha)) ** 2 + (b * np.sin(alpha)) ** 2)
            if aperture_mm > 1e-9 * min(a, b):
                root = _ellipse_mean_chord(u, sigma, aperture_mm)
            else:
                root = np.sqrt(np.maximum(sigma ** 2 - u ** 2, 0.0))
            out += obj.value_per_mm * 2.0 * a * b / sigma ** 2 * root
        else:
            for i in range(theta.shape[0]):
                widths = [2 * a * abs(math.cos(alpha[i, 0])), 2 * b * abs(math.sin(alpha[i, 0]))]
                if aperture_mm > 0:
                    widths.append(aperture_mm)
                out[i] += obj.value_per_mm * 4.0 * a * b * box_spline(u[i], widths)
    return out


def ray_integrals(objects, *, points_xy_mm, directions_xy) -> np.ndarray:
    """Exact line integrals along arbitrary straight lines.

    Parameters
    ----------
    objects : sequence of Primitive2D
    points_xy_mm : (..., 2) array_like
        A point ``(x, y)`` on each line, mm.
    directions_xy : (..., 2) array_like
        Direction of each line (normalised here), broadcast against ``points_xy_mm``.

    Returns
    -------
    ndarray of the broadcast shape without the last axis
        Sum over objects of ``value_per_mm`` times the chord length.

    Notes
    -----
    Ellipse: in the object's frame scaled to the unit circle, ``|q + s e|^2 = 1`` with
    ``A = e.e``, ``B = q.e``, ``C = q.q - 1`` gives the chord ``2 sqrt(B^2 - A C) / A``.
    Rectangle: the slab method, chord ``max(0, min_i s_far,i - max_i s_near,i)``.

    References
    ----------
    .. [1] Kay & Kajiya, "Ray tracing complex scenes", SIGGRAPH Computer Graphics 20(4),
           1986 (slab intersection).
    """
    p = np.asarray(points_xy_mm, dtype=float)
    d = np.asarray(directions_xy, dtype=float)
    p, d = np.broadcast_arrays(p, d)
    norm = np.linalg.norm(d, axis=-1, keepdims=True)
    if p.shape[-1] != 2 or np.any(norm == 0):
        raise InputError("rays need (x, y) points and non-zero (x, y) directions",
                         field="directions_xy")
    d = d / norm
    out = np.zeros(p.shape[:-1])
    for obj in objects:
        qx, qy = obj._to_local(p[..., 0], p[..., 1])
        phi = math.radians(obj.rotation_deg)
        ex = d[..., 0] * math.cos(phi) + d[..., 1] * math.sin(phi)
        ey = -d[..., 0] * math.sin(phi) + d[..., 1] * math.cos(phi)
        a, b = obj.half_axes_mm
        if obj.kind == "ellipse":
            qx, qy, ex, ey = qx / a, qy / b, ex / a, ey / b
            aa, bb, cc = ex * ex + ey * ey, qx * ex + qy * ey, qx * qx + qy * qy - 1.0
            chord = 2.0 * np.sqrt(np.maximum(bb * bb - aa * cc, 0.0)) / aa
        else:
            near = np.full(out.shape, -np.inf)
            far = np.full(out.shape, np.inf)
            for q, e, h in ((qx, ex, a), (qy, ey, b)):
                parallel = np.abs(e) < 1e-15
                with np.errstate(divide="ignore", invalid="ignore"):
                    s1, s2 = (-h - q) / e, (h - q) / e
                lo = np.where(parallel, np.where(np.abs(q) <= h, -np.inf, np.inf),
                              np.minimum(s1, s2))
                hi = np.where(parallel, np.where(np.abs(q) <= h, np.inf, -np.inf),
                              np.maximum(s1, s2))
                near, far = np.maximum(near, lo), np.minimum(far, hi)
            chord = np.where(far > near, far - near, 0.0)
        out += obj.value_per_mm * chord
    return out


def rasterize(objects, *, shape, pixel_mm: float, supersample: int = 8) -> np.ndarray:
    """Pixel-area means of the phantom, estimated on ``supersample^2`` points per pixel.

    Parameters
    ----------
    objects : sequence of Primitive2D
    shape : (ny, nx)
    pixel_mm : float
    supersample : int
        Sub-samples per pixel side. The area fraction of a pixel cut by an edge is
        then known to about ``1 / supersample`` of one pixel.

    Returns
    -------
    (ny, nx) ndarray of float64, 1/mm
    """
    check_length(pixel_mm, "pixel_mm")
    if int(supersample) < 1:
        raise InputError(f"supersample must be >= 1, got {supersample!r}", field="supersample")
    s = int(supersample)
    x, y = pixel_centres_mm(shape, pixel_mm)
    sub = ((np.arange(s) + 0.5) / s - 0.5) * pixel_mm
    xs = (x[:, None] + sub[None, :]).ravel()  # column-major sub-samples along x
    image = np.zeros((len(y), len(x)))
    rows_per_chunk = max(1, 2_000_000 // (len(xs) * s))
    for start in range(0, len(y), rows_per_chunk):
        ys = (y[start:start + rows_per_chunk, None] + sub[None, :]).ravel()
        acc = np.zeros((len(ys), len(xs)))
        for obj in objects:
            acc += obj.value_per_mm * obj.contains(xs[None, :], ys[:, None])
        n_rows = len(ys) // s
        image[start:start + n_rows] = acc.reshape(n_rows, s, len(x), s).mean(axis=(1, 3))
    return image
