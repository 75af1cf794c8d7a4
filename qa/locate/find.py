"""Finding test objects in a volume: bead candidates in 3-D, beads, edge plates, footprints.

Beads are bright compact blobs. Each plane is filtered with the scale-normalised
Laplacian of Gaussian at the scale of a disk of the bead's radius (``sigma = r / sqrt 2``,
Lindeberg 1998 [1]_); responses whose Hessian is elongated (the ratio test of Lowe 2004
[2]_, ``tr^2 / det < (q + 1)^2 / q`` with ``q = 10``) are dropped, which removes edges and
most of a DBT bead's out-of-focus copies, which spread along x. A bead's in-focus plane
is the plane of peak response; its out-of-focus copies are weaker and lie inside a cone
``|dx| <= r_s + |dz| tan(alpha)`` about it, so candidates inside a stronger candidate's
cone are suppressed.

Edge plates are refined by locating each side of the plate along profiles across it
(steepest descent of a Gaussian-smoothed profile, parabolic sub-sample peak) and fitting
a line per side; disks and markers by matching their footprint (mean inside minus mean
of a surrounding ring) over a small search window.

References
----------
.. [1] T. Lindeberg, "Feature detection with automatic scale selection", International
       Journal of Computer Vision 30(2), 79-116, 1998.
.. [2] D. G. Lowe, "Distinctive image features from scale-invariant keypoints",
       International Journal of Computer Vision 60(2), 91-110, 2004.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from ..phantom.model import Shape
from ..volume import Volume
from .blobs import (_BLOCK_ROWS, _binned, _blob_rows, _clean, _kernel, _smooth_rows,
                    blob_response)

_MAD = 1.4826  # MAD to SD for normal noise (common practice)


@dataclass(frozen=True)
class Candidates:
    """Bead candidates: centres ``(x, y, z)`` mm, blob strengths and the noise of the
    response (same units), strongest first."""

    xyz_mm: np.ndarray
    strength: np.ndarray
    noise: float


@dataclass(frozen=True)
class Found:
    """One object found: its centre ``(x, y, z)`` mm and its strength over the noise."""

    xyz_mm: tuple[float, float, float]
    strength: float
    snr: float


def _robust_sd(values) -> float:
    v = np.array(values, dtype=float).ravel()  # a copy, worked on in place
    if not v.size:
        return 0.0
    v -= np.median(v)
    return float(_MAD * np.median(np.abs(v, out=v), overwrite_input=True))


def _scan(volume: Volume, planes, b: int, sig, polarity: float):
    """Largest blob strength over ``planes`` per binned pixel, its plane, and the robust
    SD of each plane's raw response (on every other row and column)."""
    ny_b, nx_b = volume.shape[1] // b, volume.shape[2] // b
    best = np.zeros((ny_b, nx_b))
    where = np.zeros((ny_b, nx_b), int)
    sample = np.empty(((ny_b + 1) // 2, (nx_b + 1) // 2), np.float32)  # raw[::2, ::2]
    wy, wx = _kernel(sig[0]), _kernel(sig[1])
    noise = []
    for k in planes:
        plane = _binned(_clean(volume.data[k, :ny_b * b, :nx_b * b], np.float32), b)
        # Centred first: the response is a difference of nearly equal smoothed values,
        # and float32 keeps more of it about 0 than about the slab's level (the second
        # differences of a constant are exactly 0, so the response is the same).
        plane = plane - np.float32(plane.mean(dtype=np.float64))
        if polarity != 1.0:
            plane *= np.float32(polarity)
        padded = np.pad(plane, ((len(wy) // 2,) * 2, (len(wx) // 2,) * 2), mode="symmetric")
        for r0 in range(0, ny_b, _BLOCK_ROWS):  # even, so the noise sample's rows line up
            r1 = min(ny_b, r0 + _BLOCK_ROWS)
            a, z = max(r0 - 1, 0), min(r1 + 1, ny_b)   # one more row each side
            g = _smooth_rows(padded, a, z, wy, wx)
            strength, raw = _blob_rows(g, r0, r1, sig, first=a, ny=ny_b)
            sample[r0 // 2:(r1 + 1) // 2] = raw[::2, ::2]
            where[r0:r1][strength > best[r0:r1]] = k  # the first plane of the largest wins
            np.maximum(best[r0:r1], strength, out=best[r0:r1])
        noise.append(_robust_sd(sample))
    return best, where, noise


def bead_candidates(volume: Volume, *, radius_mm: float, polarity: float = 1.0,
                    min_snr: float = 5.0, cone_half_angle_deg: float = 30.0,
                    max_candidates: int = 40) -> Candidates:
    """Bright compact blobs anywhere in ``volume`` (module notes).

    For speed, planes are block-averaged in-plane so that the filter scale is still at
    least 1.5 binned pixels (0.05-0.1 mm detector pixels), and planes closer than 1 mm
    are taken every other one (a bead's in-focus peak is several mm deep in DBT, and a
    rod's is the whole stack). A candidate's height is its plane of peak response, its
    position the binned pixel's centre: both are refined later at full size.
    """
    dz, dy, dx = volume.spacing_mm
    sigma_mm = radius_mm / np.sqrt(2.0)
    b = max(1, int(sigma_mm / (1.5 * max(dy, dx))))
    nz = volume.shape[0]
    sig = (sigma_mm / (b * dy), sigma_mm / (b * dx))
    planes = list(range(0, nz, max(1, int(1.0 / dz))))
    best, where, noise = _scan(volume, planes, b, sig, polarity)
    m = int(np.ceil(3 * max(sig))) + 2  # filter margin at the volume's sides
    best[:m], best[-m:], best[:, :m], best[:, -m:] = 0, 0, 0, 0
    noise_level = float(np.median(noise))
    r_nms_mm = max(2.0 * radius_mm, 1.5)
    size = (max(3, int(2 * r_nms_mm / (b * dy)) | 1), max(3, int(2 * r_nms_mm / (b * dx)) | 1))
    thr = max(min_snr * noise_level, 0.02 * float(best.max()))
    peaks = np.argwhere((best == ndimage.maximum_filter(best, size=size)) & (best > thr))
    s = best[peaks[:, 0], peaks[:, 1]]
    order = np.argsort(-s)[: 8 * max_candidates]
    iy, ix = peaks[order, 0] * b + (b - 1) / 2.0, peaks[order, 1] * b + (b - 1) / 2.0
    iz = where[peaks[order, 0], peaks[order, 1]]
    xyz = volume.to_mm(np.stack([iz, iy, ix], axis=1))[:, ::-1] if len(order) else np.zeros((0, 3))
    tan_a = np.tan(np.radians(cone_half_angle_deg))
    keep = []
    for i in range(len(xyz)):
        d = xyz[keep] - xyz[i] if keep else np.zeros((0, 3))
        inside = ((np.abs(d[:, 1]) <= r_nms_mm)
                  & (np.abs(d[:, 0]) <= r_nms_mm + np.abs(d[:, 2]) * tan_a))
        if not inside.any():
            keep.append(i)
        if len(keep) >= max_candidates:
            break
    return Candidates(xyz[keep], s[order][keep], noise_level)


def _window(volume: Volume, xyz_mm, half_mm):
    """Index slices of the block of ``half_mm = (hz, hy, hx)`` about a point (clipped to the
    volume) and the point's fractional index."""
    x, y, z = xyz_mm
    centre = volume.to_index((z, y, x))
    out = []
    for c, h, step, n in zip(centre, half_mm, volume.spacing_mm, volume.shape):
        lo, hi = int(max(0, np.floor(c - h / step))), int(min(n, np.ceil(c + h / step) + 1))
        out.append(slice(lo, hi))
    return out, centre


def _centroid(plane, iy, ix, radius_px):
    """Centroid of the top half of a blob (values above half its peak over background)."""
    yy, xx = np.indices(plane.shape)
    cy, cx = float(iy), float(ix)
    w = max(radius_px, 2.0) + 2.0
    for _ in range(3):
        r = np.hypot(yy - cy, xx - cx)
        inner, ring = r <= w, (r > w) & (r <= w + 3)
        if not ring.any() or not inner.any():
            break
        bg = np.median(plane[ring])
        top = plane[inner].max()
        wts = np.clip(plane - bg - 0.5 * (top - bg), 0.0, None) * inner
        if wts.sum() <= 0:
            break
        cy, cx = float((wts * yy).sum() / wts.sum()), float((wts * xx).sum() / wts.sum())
    return cy, cx


def _parabola(p, k) -> float:
    """Sub-sample offset of the peak at ``k`` of ``p`` from a parabola through 3 samples."""
    if 0 < k < len(p) - 1:
        den = p[k - 1] - 2 * p[k] + p[k + 1]
        if den < 0:
            return float(np.clip(0.5 * (p[k - 1] - p[k + 1]) / den, -0.5, 0.5))
    return 0.0


def _focus(raw, cy, cx, h, dy_mm):
    """In-focus plane and sub-plane offset of a bead centred at ``(cy, cx)`` (pixels).

    Per plane, the response is read at the bead's column and taken at its largest over
    rows within 0.3 mm of the bead's: the depth axis of a bead's image is the ray from
    the source, which leans along y by y / (source height) (about 0.1 mm per mm of
    height 60 mm from the chest wall), while along x the out-of-focus copies spread and
    must not be caught. A parabola is fitted by least squares over ``h`` planes either
    side of the maximum (the caller takes 2.5 mm: about half the width of a DBT bead's
    in-focus peak, whose top is too flat for three planes to place it).
    """
    nz = raw.shape[0]
    rows = cy + np.linspace(-0.3, 0.3, 13) / dy_mm
    kk, rr = np.meshgrid(np.arange(nz), rows, indexing="ij")
    prof = ndimage.map_coordinates(raw, [kk.ravel(), rr.ravel(), np.full(kk.size, cx)],
                                   order=1).reshape(kk.shape).max(axis=1)
    k = int(np.argmax(prof))
    ks = np.arange(max(0, k - h), min(nz, k + h + 1))
    if len(ks) < 3:
        return k, 0.0
    a, b, _ = np.polyfit(ks - k, prof[ks], 2)
    return k, (float(np.clip(-b / (2 * a), -h, h)) if a < 0 else 0.0)


def find_bead(volume: Volume, expected_xyz_mm, *, radius_mm: float, search_radius_mm: float,
              half_depth_mm: float, polarity: float = 1.0, min_snr: float = 8.0,
              min_strength: float = 0.0, rod: bool = False) -> tuple[Found | None, str]:
    """Search for one bead within ``search_radius_mm`` (in-plane) and ``half_depth_mm``
    (in height) of where it is expected.

    A rod (``rod=True``: a bead through a stack of 2-D sections) is searched in the mean
    of the planes of the window and keeps the expected height.

    Returns
    -------
    (Found or None, reason)
        ``reason`` says why nothing was found (empty when found).
    """
    dz, dy, dx = volume.spacing_mm
    sigma_mm = radius_mm / np.sqrt(2.0)
    pad = 4.0 * sigma_mm + 3.0 * max(dx, dy)
    (sz, sy, sx), centre = _window(volume, expected_xyz_mm,
                                   (half_depth_mm, search_radius_mm + pad, search_radius_mm + pad))
    if any(s.stop - s.start < 3 for s in (sy, sx)) or sz.stop <= sz.start:
        return None, "outside the volume"
    block = _clean(volume.data[sz, sy, sx]) * polarity
    if rod:
        block = block.mean(axis=0, keepdims=True)
    strength, raw = blob_response(block, (sigma_mm / dy, sigma_mm / dx))
    yy, xx = np.indices(block.shape[1:])
    dist = np.hypot((yy + sy.start - centre[1]) * dy, (xx + sx.start - centre[2]) * dx)
    masked = np.where(dist <= search_radius_mm, strength, 0.0)
    k, iy, ix = np.unravel_index(int(np.argmax(masked)), masked.shape)
    peak = float(masked[k, iy, ix])
    noise = _robust_sd(raw)
    snr = peak / noise if noise > 0 else (np.inf if peak > 0 else 0.0)
    if peak <= 0 or snr < min_snr:
        return None, f"no blob above {min_snr:g} x noise (best {snr:.1f})"
    if peak < min_strength:
        return None, (f"strongest blob only {peak / min_strength:.0%} of the strength "
                      "expected from the other beads")
    cy, cx = _centroid(block[k], iy, ix, radius_mm / max(dx, dy))
    if rod:
        z_mm = float(expected_xyz_mm[2])
    else:
        k, offset = _focus(raw, cy, cx, max(1, int(round(2.5 / dz))), dy)
        cy, cx = _centroid(block[k], cy, cx, radius_mm / max(dx, dy))
        z_mm = float(volume.to_mm((sz.start + k + offset, 0, 0))[0])
    _, y_mm, x_mm = volume.to_mm((0, sy.start + cy, sx.start + cx))
    return Found((float(x_mm), float(y_mm), z_mm), peak, float(snr)), ""


def _footprint(shape: Shape, x_mm, y_mm, grow_mm: float) -> np.ndarray:
    """Pixels ``(x_mm, y_mm)`` (offsets from the centre) inside the shape's footprint grown
    in-plane by ``grow_mm``."""
    h = shape.half_xyz_mm
    half = (h[0] + grow_mm, h[1] + grow_mm, h[2])
    if min(half) <= 0:
        return np.zeros(np.shape(x_mm), bool)
    grown = Shape(shape.kind, (0.0, 0.0, 0.0), half, shape.rotation_deg)
    return grown.contains(np.stack([x_mm, y_mm, np.zeros_like(x_mm)], axis=-1))


@dataclass(frozen=True)
class Footprint:
    """Result of a footprint search: best centre ``(x, y)`` mm, its contrast over the
    noise, and the contrast over the noise at the expected centre."""

    xy_mm: tuple[float, float]
    snr: float
    snr_at_expected: float


def footprint_search(volume: Volume, shape: Shape, *, search_mm: float, polarity: float = 1.0,
                     inner_grow_mm: float = 0.0, ring_mm=(0.5, 2.0)) -> Footprint | None:
    """Match an object's footprint in its plane around its expected centre.

    The template is the mean over the footprint (grown by ``inner_grow_mm``) minus the mean
    over the ring between the footprint grown by ``ring_mm[0]`` and by ``ring_mm[1]``; it
    is correlated (by FFT) with the plane over offsets up to ``search_mm``. The noise is
    the robust SD of the same contrast at offsets away from the object. None when the
    object's plane or window is outside the volume.
    """
    x0, y0, z0 = shape.centre_xyz_mm
    dz, dy, dx = volume.spacing_mm
    reach = shape.bounding_radius_mm + ring_mm[1]
    half = 2.0 * reach + search_mm + 2.0 * max(dx, dy)
    (sz, sy, sx), centre = _window(volume, (x0, y0, z0), (0.0, half, half))
    if not (0 <= round(centre[0]) < volume.shape[0]):
        return None
    ky, kx = int(np.ceil(reach / dy)), int(np.ceil(reach / dx))
    if sy.stop - sy.start <= 2 * ky + 2 or sx.stop - sx.start <= 2 * kx + 2:
        return None
    plane = _clean(volume.data[volume.plane_index(z0), sy, sx]) * polarity
    ty, tx = np.meshgrid(np.arange(-ky, ky + 1) * dy, np.arange(-kx, kx + 1) * dx, indexing="ij")
    inner = _footprint(shape, tx, ty, inner_grow_mm)
    ring = _footprint(shape, tx, ty, ring_mm[1]) & ~_footprint(shape, tx, ty, ring_mm[0])
    if not inner.any() or not ring.any():
        return None
    from scipy.signal import fftconvolve  # imported here: scipy.signal is slow to import

    kernel = inner / inner.sum() - ring / ring.sum()
    c = fftconvolve(plane, kernel[::-1, ::-1], mode="valid")
    oy = (np.arange(c.shape[0]) + ky + sy.start - centre[1]) * dy
    ox = (np.arange(c.shape[1]) + kx + sx.start - centre[2]) * dx
    dist = np.hypot(oy[:, None], ox[None, :])
    near, far = dist <= search_mm + 0.71 * max(dy, dx), dist > search_mm + reach
    if not near.any():
        return None
    noise = max(_robust_sd(c[far]) if far.sum() > 20 else _robust_sd(c),
                1e-4 * float(np.ptp(plane)) + 1e-30)  # floored for noiseless volumes
    at = np.unravel_index(int(np.argmin(np.where(dist <= max(dy, dx), dist, np.inf))), c.shape)
    best = np.unravel_index(int(np.argmax(np.where(near, c, -np.inf))), c.shape)
    fy = _parabola(c[:, best[1]], best[0])
    fx = _parabola(c[best[0], :], best[1])
    xy = (x0 + float(ox[best[1]]) + fx * dx, y0 + float(oy[best[0]]) + fy * dy)
    return Footprint(xy, float(c[best] / noise), float(c[at] / noise))


def find_edge_plate(volume: Volume, shape: Shape, *, search_mm: float = 2.0,
                    polarity: float = 1.0, min_snr: float = 5.0,
                    refine_turn: bool = True) -> tuple[Shape | None, str]:
    """Refine a flat plate's centre and turn about z from its four sides (module notes).

    Profiles across each side, over the middle 70 % of its length, put the side at the
    steepest fall from inside to outside; a line through those points gives its offset
    ``a`` (along the outward normal) and slope ``b``. The turn is the mean of ``-atan(b)``
    over the sides, weighted by the inverse variance of each slope (a side a limited arc
    renders streaked counts less); the centre is where the mid-lines of opposite sides
    cross (one side's offset stands for a pair when its opposite is not found).
    ``refine_turn=False`` keeps the expected turn (a small marker's short sides fix it
    poorly). Returns (Shape or None, reason).
    """
    dz, dy, dx = volume.spacing_mm
    step = 0.5 * min(dx, dy)
    x0, y0, z0 = shape.centre_xyz_mm
    iz = volume.plane_index(z0)
    if not (0 <= volume.to_index((z0, 0, 0))[0] + 0.5 <= volume.shape[0]):
        return None, "its plane is outside the volume"
    # Work on a window about the plate: its half-diagonal, the search and a margin.
    reach_mm = float(np.hypot(*shape.half_xyz_mm[:2])) + search_mm + 2.0
    (_, sy, sx), _ = _window(volume, (x0, y0, z0), (0.0, reach_mm, reach_mm))
    if sy.stop - sy.start < 3 or sx.stop - sx.start < 3:
        return None, "outside the volume"
    plane = _clean(volume.data[iz, sy, sx]) * polarity
    oy, ox = volume.origin_mm[1] + sy.start * dy, volume.origin_mm[2] + sx.start * dx
    phi = np.radians(shape.rotation_deg[2])
    u, v = np.array([np.cos(phi), np.sin(phi)]), np.array([-np.sin(phi), np.cos(phi)])
    hx, hy = shape.half_xyz_mm[:2]
    sides = {"+u": (u, hx, v, hy), "-u": (-u, hx, -v, hy),
             "+v": (v, hy, -u, hx), "-v": (-v, hy, u, hx)}
    found, noise = {}, []
    for name, (n, h, t, ht) in sides.items():
        reach = min(search_mm, 0.8 * h)
        delta = np.arange(-reach, reach + step / 2, step)
        tau = np.linspace(-0.7 * ht, 0.7 * ht, int(np.clip(1.4 * ht / (2 * step), 5, 40)))
        pts = (np.array([x0, y0])[None, None, :] + n[None, None, :] * (h + delta)[None, :, None]
               + t[None, None, :] * tau[:, None, None])
        iy, ix = (pts[..., 1] - oy) / dy, (pts[..., 0] - ox) / dx
        inside = (iy >= 0) & (iy <= plane.shape[0] - 1) & (ix >= 0) & (ix <= plane.shape[1] - 1)
        rows = inside.all(axis=1)
        if rows.sum() < 3:
            continue
        prof = ndimage.map_coordinates(plane, [iy[rows], ix[rows]], order=1)
        grad = ndimage.gaussian_filter1d(prof, max(dx, dy) / step, axis=1, order=1)
        quarter = len(delta) // 4
        contrast = prof[:, :quarter].mean(axis=1) - prof[:, -quarter:].mean(axis=1)
        outer = prof[:, -quarter:]
        noise.append(_robust_sd(outer - np.median(outer, axis=1, keepdims=True)))
        k = np.argmin(grad, axis=1)
        e = np.array([delta[j] + step * _parabola(-g, j) for g, j in zip(grad, k)])
        tt = tau[rows]
        keep = np.ones(len(e), bool)
        for _ in range(2):
            b, a = np.polyfit(tt[keep], e[keep], 1)
            res = e - (a + b * tt)
            keep = np.abs(res) <= max(3 * _robust_sd(res[keep]), 2 * step)
            if keep.sum() < 3:
                break
        if keep.sum() >= 3 and abs(a) < reach:
            # Inverse variance of the slope (scatter floored at a tenth of a sample).
            spread = max(float(np.std(res[keep])), 0.1 * step)
            found[name] = (a, b, float(np.median(contrast)),
                           np.sum((tt[keep] - tt[keep].mean()) ** 2) / spread ** 2)
    # Noise of the plane (floored for noiseless volumes at 1e-4 of the plane's range).
    sd = max(float(np.median(noise)) if noise else 0.0, 1e-4 * float(np.ptp(plane)))
    good = {k: f for k, f in found.items() if f[2] > 0 and f[2] >= min_snr * sd}
    if not good:
        return None, "no side stands out from the noise"
    eps = (np.average([-np.arctan(f[1]) for f in good.values()],
                      weights=[f[3] for f in good.values()]) if refine_turn else 0.0)

    def shift(plus, minus):  # (a+ - a-) / 2, or one side's offset
        a = ([good[plus][0]] if plus in good else []) + ([-good[minus][0]] if minus in good else [])
        return float(np.mean(a)) if a else 0.0

    # Mid-lines through c + s_u u and c + s_v v, along the sides turned by eps, cross at:
    s_u, s_v = shift("+u", "-u"), shift("+v", "-v")
    alpha = s_u * np.sin(eps) + s_v * np.cos(eps)
    centre = np.array([x0, y0]) + (s_u - alpha * np.sin(eps)) * u + alpha * np.cos(eps) * v
    rx, ry, rz = shape.rotation_deg
    return Shape(shape.kind, (float(centre[0]), float(centre[1]), z0), shape.half_xyz_mm,
                 (rx, ry, float(rz + np.degrees(eps)))), ""
