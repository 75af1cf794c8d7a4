"""Exact line integrals through the phantom's solids (chord lengths), not a voxel copy.

Each ray runs from a source point ``s`` to a detector point ``d``; its chord through a
solid is found in the solid's local frame: ellipsoids by the roots of a quadratic after
scaling to the unit sphere, boxes by the slab method (Kay & Kajiya, SIGGRAPH 1986),
cylinders by intersecting the quadratic of the mantle with the slab of the end caps.
The line integral is ``sum_k delta_mu_k * chord_k`` (see
:meth:`qa.phantom.model.Phantom.attenuating`).

Rays are parameterised ``p(t) = s + t (d - s)``, ``t`` in [0, 1]. Inside one view all
rays share the source, so the local origin is a single point and the local directions
are affine in the detector coordinates; :func:`line_integrals` exploits that by
broadcasting rows against columns instead of building an array of rays.
"""

from __future__ import annotations

import numpy as np

from ..phantom.model import Phantom, Shape


def _slab(o, d, half):
    """t interval inside |o + t d| <= half along one axis.

    A ray parallel to the slab (d = 0) gets (-inf, inf) inside it and an empty
    interval outside, through the signed infinities of 1/d.
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        inv = 1.0 / d
        t1 = (-half - o) * inv
        t2 = (half - o) * inv
    return np.minimum(t1, t2), np.maximum(t1, t2)


def _roots(a, b, c):
    """t interval where a t^2 + b t + c <= 0 (a >= 0); empty as (inf, -inf)."""
    disc = b * b - 4.0 * a * c
    ok = (disc > 0) & (a > 0)
    root = np.sqrt(np.where(ok, disc, 0.0))
    with np.errstate(divide="ignore", invalid="ignore"):
        inv = 0.5 / a
        lo = np.where(ok, (-b - root) * inv, np.inf)
        hi = np.where(ok, (-b + root) * inv, -np.inf)
    # A ray along the axis of a cylinder (a == 0) is inside the mantle when c <= 0.
    along = (a == 0) & (c <= 0)
    if np.any(along):
        lo = np.where(along, -np.inf, lo)
        hi = np.where(along, np.inf, hi)
    return lo, hi


def _interval(shape: Shape, o, d):
    """Entry and exit t of rays with local origin ``o`` and direction ``d``.

    ``o`` and ``d`` are sequences of three arrays (x, y, z components) that broadcast
    against each other.
    """
    h = shape.half_xyz_mm
    if shape.kind == "ellipsoid":
        os_ = [o[k] / h[k] for k in range(3)]
        ds = [d[k] / h[k] for k in range(3)]
        a = ds[0] * ds[0] + ds[1] * ds[1] + ds[2] * ds[2]
        b = 2.0 * (os_[0] * ds[0] + os_[1] * ds[1] + os_[2] * ds[2])
        c = os_[0] * os_[0] + os_[1] * os_[1] + os_[2] * os_[2] - 1.0
        return _roots(a, b, c)
    if shape.kind == "box":
        lo, hi = _slab(o[0], d[0], h[0])
        for k in (1, 2):
            k_lo, k_hi = _slab(o[k], d[k], h[k])
            lo, hi = np.maximum(lo, k_lo), np.minimum(hi, k_hi)
        return lo, hi
    if shape.kind == "cylinder":
        a = d[0] * d[0] + d[1] * d[1]
        b = 2.0 * (o[0] * d[0] + o[1] * d[1])
        c = o[0] * o[0] + o[1] * o[1] - h[0] ** 2
        lo, hi = _roots(a, b, c)
        z_lo, z_hi = _slab(o[2], d[2], h[2])
        return np.maximum(lo, z_lo), np.minimum(hi, z_hi)
    raise ValueError(f"unknown shape kind {shape.kind!r}")  # pragma: no cover


def _chord(lo, hi, length):
    lo, hi = np.clip(lo, 0.0, 1.0), np.clip(hi, 0.0, 1.0)
    with np.errstate(invalid="ignore"):
        inside = hi > lo          # False for NaN (a ray grazing a face exactly)
    return np.where(inside, hi - lo, 0.0) * length


def chord_lengths(shape: Shape, sources, targets) -> np.ndarray:
    """Length in mm of each segment ``sources[i] -> targets[i]`` inside ``shape``.

    Parameters
    ----------
    shape : Shape
    sources, targets : (N, 3) or (3,) array_like
        Segment ends in world coordinates (mm); broadcast against each other.

    Returns
    -------
    (N,) ndarray
        Chord lengths, clipped to the segments.

    Examples
    --------
    >>> from qa.phantom.model import Shape
    >>> ball = Shape("ellipsoid", (0, 0, 0), (2, 2, 2))
    >>> round(float(chord_lengths(ball, [[-5, 1, 0]], [[5, 1, 0]])[0]), 12)  # 2 sqrt(4 - 1)
    3.464101615138
    """
    s, t = np.broadcast_arrays(np.atleast_2d(np.asarray(sources, float)),
                               np.atleast_2d(np.asarray(targets, float)))
    rot = shape.rotation
    o = (s - shape.centre_xyz_mm) @ rot      # row vectors: R^T (p - c)
    d = (t - s) @ rot
    lo, hi = _interval(shape, o.T, d.T)
    return _chord(lo, hi, np.linalg.norm(t - s, axis=1))


def footprint(shape: Shape, source, *, margin_mm: float = 0.0) -> tuple[float, float, float, float]:
    """Bounding rectangle ``(x0, x1, y0, y1)`` on the detector plane z = 0 of the shadow
    of ``shape`` cast from ``source`` (the projected corners of a cube around its
    bounding sphere; the shadow of a convex solid lies within them)."""
    r = shape.bounding_radius_mm
    c = np.asarray(shape.centre_xyz_mm, float)
    corners = c + r * np.array([[i, j, k] for i in (-1, 1) for j in (-1, 1) for k in (-1, 1)])
    s = np.asarray(source, float)
    scale = s[2] / np.maximum(s[2] - corners[:, 2], 1e-9)
    xy = s[:2] + (corners[:, :2] - s[:2]) * scale[:, None]
    return (xy[:, 0].min() - margin_mm, xy[:, 0].max() + margin_mm,
            xy[:, 1].min() - margin_mm, xy[:, 1].max() + margin_mm)


def grid_chords(shape: Shape, source, u_mm: np.ndarray, v_mm: np.ndarray) -> np.ndarray:
    """Chords ``(len(v_mm), len(u_mm))`` of rays from ``source`` to detector points
    ``(u, v, 0)``, computed by broadcasting rows against columns."""
    s = np.asarray(source, float)
    rot = shape.rotation
    o = rot.T @ (s - np.asarray(shape.centre_xyz_mm, float))
    du = (u_mm - s[0])[None, :]            # world direction components
    dv = (v_mm - s[1])[:, None]
    dz = -s[2]
    d = [rot[0, k] * du + rot[1, k] * dv + rot[2, k] * dz for k in range(3)]
    lo, hi = _interval(shape, o, d)
    length = np.sqrt(du * du + dv * dv + dz * dz)
    return _chord(lo, hi, length)


def line_integrals(phantom: Phantom, source, u_mm: np.ndarray, v_mm: np.ndarray, *,
                   terms=None) -> np.ndarray:
    """Line integrals of attenuation from one source point to a grid of detector points.

    Parameters
    ----------
    phantom : Phantom
    source : (3,) array_like
        Source position (mm).
    u_mm, v_mm : 1-D ndarray, increasing
        x positions of the detector columns and y positions of its rows (z = 0).
    terms : sequence of (PhantomObject, delta_mu), optional
        The solids to include (default: all, :meth:`Phantom.attenuating`).

    Returns
    -------
    (len(v_mm), len(u_mm)) ndarray
        Dimensionless line integrals ``∫ mu dl``. Each solid is evaluated only for the
        detector points inside its shadow.
    """
    u_mm, v_mm = np.asarray(u_mm, float), np.asarray(v_mm, float)
    out = np.zeros((v_mm.size, u_mm.size))
    s = np.asarray(source, float)
    for obj, delta in (phantom.attenuating() if terms is None else terms):
        x0, x1, y0, y1 = footprint(obj.shape, s, margin_mm=1e-6)
        c0, c1 = np.searchsorted(u_mm, [x0, x1], side="left")[0], np.searchsorted(u_mm, x1, "right")
        r0, r1 = np.searchsorted(v_mm, y0, "left"), np.searchsorted(v_mm, y1, "right")
        if c1 <= c0 or r1 <= r0:
            continue
        out[r0:r1, c0:c1] += delta * grid_chords(obj.shape, s, u_mm[c0:c1], v_mm[r0:r1])
    return out
