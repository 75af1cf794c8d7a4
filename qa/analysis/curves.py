"""Reading widths and crossings off sampled curves."""

from __future__ import annotations

import numpy as np
from scipy.interpolate import PchipInterpolator


def half_max_width(x: np.ndarray, y: np.ndarray, *, level: float = 0.5,
                   upsample: int = 50) -> tuple[float, float, float] | None:
    """Width of a single-peaked curve at ``level`` times its maximum.

    The samples are interpolated with a monotone cubic (PCHIP; Fritsch & Carlson,
    SIAM J. Numer. Anal. 17, 1980), which follows a bell shape more closely than
    straight lines between samples and never overshoots; the crossings on each side of
    the maximum are then located on a grid ``upsample`` times finer.

    Returns
    -------
    (width, left, right) or None
        ``None`` when the curve does not fall below the level on both sides.
    """
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    k = int(np.argmax(y))
    target = level * y[k]
    left_idx = np.nonzero(y[:k] < target)[0]
    right_idx = np.nonzero(y[k + 1:] < target)[0]
    if left_idx.size == 0 or right_idx.size == 0:
        return None
    i0, i1 = left_idx[-1], k + 1 + right_idx[0]
    f = PchipInterpolator(x[i0:i1 + 1], y[i0:i1 + 1])

    def crossing(a, b, rising):
        xs = np.linspace(a, b, upsample * max(1, int(round(abs(b - a) / abs(x[1] - x[0])))) + 1)
        ys = f(xs) - target
        idx = np.nonzero(np.diff(np.sign(ys)) != 0)[0]
        if idx.size == 0:
            return None
        j = idx[-1] if rising else idx[0]
        return xs[j] - ys[j] * (xs[j + 1] - xs[j]) / (ys[j + 1] - ys[j])

    left = crossing(x[i0], x[k], True)
    right = crossing(x[k], x[i1], False)
    if left is None or right is None:
        return None
    return float(right - left), float(left), float(right)


def parabolic_peak(x: np.ndarray, y: np.ndarray) -> float:
    """Position of the maximum, refined by a parabola through the top three samples."""
    k = int(np.argmax(y))
    if k == 0 or k == len(y) - 1:
        return float(x[k])
    y0, y1, y2 = y[k - 1], y[k], y[k + 1]
    denom = y0 - 2 * y1 + y2
    shift = 0.0 if denom == 0 else 0.5 * (y0 - y2) / denom
    return float(x[k] + np.clip(shift, -0.5, 0.5) * (x[k + 1] - x[k]))
