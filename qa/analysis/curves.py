"""Reading peaks and widths off sampled curves, for one curve or many at once."""

from __future__ import annotations

import numpy as np
from scipy.interpolate import CubicSpline

UPSAMPLE = 100  # evaluation points per sample interval


def peaks_and_widths(x: np.ndarray, y: np.ndarray, *, level: float = 0.5):
    """Peak position, peak height and width at ``level`` × peak of sampled curves.

    The samples are interpolated by a not-a-knot cubic spline evaluated ``UPSAMPLE``
    times finer; the peak is the spline's maximum (between samples, where Wu et al.
    2004 would take the in-focus plane) and the width runs between the last crossing of
    the level before the peak and the first after it. On a Gaussian sampled at 1 mm
    this recovers FWHMs of 3 to 12 mm within 1 % whatever the phase of the sampling
    (tests/measure/test_asf.py).

    Parameters
    ----------
    x : (n,) increasing sample positions.
    y : (n,) or (n, m) samples; each column is one curve.

    Returns
    -------
    x_peak, y_peak, width, left, right : float or (m,) arrays
        ``width``, ``left`` and ``right`` are NaN where the curve does not fall below
        the level on both sides.
    """
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    single = y.ndim == 1
    y2 = y[:, None] if single else y
    xs = np.linspace(x[0], x[-1], UPSAMPLE * (len(x) - 1) + 1)
    fine = CubicSpline(x, y2, axis=0, bc_type="not-a-knot")(xs)
    # The peak is searched next to the largest sample, so that an overshoot of the
    # spline elsewhere cannot win.
    k = np.argmax(y2, axis=0)
    idx = np.arange(len(xs))[:, None]
    near = np.abs(idx - k[None, :] * UPSAMPLE) <= UPSAMPLE
    p = np.argmax(np.where(near, fine, -np.inf), axis=0)
    cols = np.arange(fine.shape[1])
    y_peak = fine[p, cols]
    target = level * y_peak
    below = fine < target[None, :]
    li = np.where(below & (idx < p[None, :]), idx, -1).max(axis=0)
    ri = np.where(below & (idx > p[None, :]), idx, len(xs)).min(axis=0)
    ok = (li >= 0) & (ri < len(xs))
    li_c, ri_c = np.clip(li, 0, len(xs) - 2), np.clip(ri, 1, len(xs) - 1)

    def cross(i0, i1):
        f0, f1 = fine[i0, cols], fine[i1, cols]
        with np.errstate(divide="ignore", invalid="ignore"):
            t = np.where(f1 != f0, (target - f0) / (f1 - f0), 0.0)
        return xs[i0] + t * (xs[i1] - xs[i0])

    left = np.where(ok, cross(li_c, li_c + 1), np.nan)
    right = np.where(ok, cross(ri_c - 1, ri_c), np.nan)
    out = (xs[p], y_peak, right - left, left, right)
    return tuple(float(v[0]) for v in out) if single else out


def half_max_width(x: np.ndarray, y: np.ndarray, *, level: float = 0.5):
    """``(width, left, right)`` of one curve at ``level`` × its peak, or ``None``."""
    _, _, width, left, right = peaks_and_widths(x, y, level=level)
    return None if np.isnan(width) else (width, left, right)


def spline_peak(x: np.ndarray, y: np.ndarray) -> tuple[float, float]:
    """Position and height of the interpolated maximum of one curve."""
    x_peak, y_peak, *_ = peaks_and_widths(x, y)
    return x_peak, y_peak
