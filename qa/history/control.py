"""Statistical control rules for trend views: Shewhart individuals chart, run rules, EWMA.

A QA metric measured once per session is a series of individual values. Its control
limits come from a baseline period: the centre is the mean of the baseline values and
sigma is estimated from their moving ranges. New sessions are then checked with the
Western Electric run rules and with an EWMA chart, which reacts earlier to a slow drift.

Every function takes plain 1-D arrays (in session order) and returns arrays or small
records; nothing here reads the database.

References
----------
.. [1] D. C. Montgomery, *Introduction to Statistical Quality Control*, 6th ed., Wiley,
   2009: the individuals chart (section 6.4), the sensitizing (run) rules (section 5.3.6)
   and the EWMA chart (section 9.2). Section numbers from memory.
.. [2] Western Electric Company, *Statistical Quality Control Handbook*, Indianapolis,
   1956: the tests for unnatural patterns on a control chart.
.. [3] J. M. Lucas and M. S. Saccucci, "Exponentially weighted moving average control
   schemes: properties and enhancements", Technometrics 32(1), 1990: the run lengths
   behind Montgomery's table of EWMA designs (from memory).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.signal import lfilter

from ..errors import InputError

#: d2 for subgroups of two (the moving range of consecutive values), Montgomery [1],
#: appendix table of factors for variables control charts.
D2 = 1.128

#: EWMA weight and limit width: the pair lambda = 0.2, L = 2.962 that Montgomery [1]
#: tabulates (after Lucas & Saccucci [3]) with an in-control ARL of about 500 (from memory;
#: checked by simulation in the tests).
EWMA_LAMBDA = 0.2
EWMA_L = 2.962

BEYOND_3 = "beyond 3 sigma"
TWO_OF_THREE = "2 of 3 beyond 2 sigma"
FOUR_OF_FIVE = "4 of 5 beyond 1 sigma"
EIGHT_ONE_SIDE = "8 on one side"
EWMA_BEYOND = "EWMA beyond limit"

#: Every rule name :func:`apply_rules` can report, in the order it reports them.
RULES = (BEYOND_3, TWO_OF_THREE, FOUR_OF_FIVE, EIGHT_ONE_SIDE, EWMA_BEYOND)


@dataclass(frozen=True)
class ControlLimits:
    """Centre and sigma of an individuals chart, and the baseline size they came from."""

    centre: float
    sigma: float
    n_baseline: int

    def zone(self, k: float) -> tuple[float, float]:
        """``(centre - k sigma, centre + k sigma)``; ``zone(3)`` gives the control limits."""
        return (self.centre - k * self.sigma, self.centre + k * self.sigma)


@dataclass(frozen=True)
class EwmaChart:
    """EWMA statistic ``z`` with its lower and upper limits and the points beyond them."""

    z: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    beyond: np.ndarray


def _series(values, name: str) -> np.ndarray:
    x = np.asarray(values, dtype=float)
    if x.ndim != 1:
        raise InputError(f"expected a 1-D series, got shape {x.shape}", field=name)
    if not np.all(np.isfinite(x)):
        raise InputError("the series holds a value that is not a finite number; leave "
                         "not-measured sessions out", field=name)
    return x


def _check_sigma(sigma: float) -> float:
    sigma = float(sigma)
    if not np.isfinite(sigma) or sigma <= 0:
        raise InputError(f"sigma must be a positive number, got {sigma!r}", field="sigma")
    return sigma


def moving_ranges(values) -> np.ndarray:
    """``|x_i - x_{i-1}|`` for i = 1 .. n-1 (moving ranges of span 2)."""
    return np.abs(np.diff(_series(values, "values")))


def individuals_limits(baseline, *, sigma: float | None = None) -> ControlLimits:
    """Centre and sigma of a Shewhart individuals chart from the baseline period.

    Parameters
    ----------
    baseline : (n,) array_like
        The metric's values over the baseline sessions, in session order.
    sigma : float, optional
        A known process sigma (same unit); by default it is estimated from the
        moving ranges of ``baseline``, which then needs at least two values.

    Returns
    -------
    ControlLimits

    Raises
    ------
    InputError
        Fewer than two values (and no ``sigma``), or values with no spread at all.

    Notes
    -----
    Centre :math:`\\bar{x} = \\frac{1}{n}\\sum x_i`; sigma
    :math:`\\hat\\sigma = \\overline{MR}/d_2` with
    :math:`\\overline{MR} = \\frac{1}{n-1}\\sum_{i=2}^{n} |x_i - x_{i-1}|` and
    :math:`d_2 = 1.128` (span 2). Control limits :math:`\\bar{x} \\pm 3\\hat\\sigma`,
    zones at 1 and 2 sigma ([1], section 6.4).

    Examples
    --------
    >>> lim = individuals_limits([10.0, 12.0, 11.0, 13.0, 9.0])
    >>> round(lim.centre, 3), round(lim.sigma, 4)
    (11.0, 1.9947)
    """
    x = _series(baseline, "baseline")
    if x.size == 0:
        raise InputError("the baseline period holds no values", field="baseline")
    if sigma is None:
        if x.size < 2:
            raise InputError("sigma from moving ranges needs at least 2 baseline values, "
                             f"got {x.size}; give sigma", field="baseline")
        mean_mr = float(np.mean(np.abs(np.diff(x))))
        if mean_mr <= 0:
            raise InputError("the baseline values do not vary (mean moving range 0); "
                             "give sigma", field="baseline")
        sigma = mean_mr / D2
    return ControlLimits(float(np.mean(x)), _check_sigma(sigma), int(x.size))


def _trailing_count(mask: np.ndarray, window: int) -> np.ndarray:
    """Number of True values among the last ``window`` points ending at each point."""
    c = np.cumsum(mask.astype(int))
    out = c.copy()
    out[window:] -= c[:-window]
    return out


def western_electric(values, *, centre: float, sigma: float) -> dict[str, np.ndarray]:
    """The four Western Electric run rules, as one boolean array per rule.

    A point is flagged when the pattern is complete at that point, and it is itself one of
    the pattern's points (so one run is not reported again at every later point that
    merely stays inside the window).

    Parameters
    ----------
    values : (n,) array_like
        The series, in session order.
    centre, sigma : float
        Centre line and sigma of the chart (same unit as ``values``).

    Returns
    -------
    dict
        ``{rule name: (n,) bool array}`` for :data:`BEYOND_3`, :data:`TWO_OF_THREE`,
        :data:`FOUR_OF_FIVE` and :data:`EIGHT_ONE_SIDE`.

    Notes
    -----
    With :math:`u_i = (x_i - c)/\\sigma` ([2]; [1], section 5.3.6): one point with
    :math:`|u_i| > 3`; two of three consecutive points with :math:`u > 2` (or all with
    :math:`u < -2`); four of five consecutive with :math:`u > 1` (or :math:`< -1`);
    eight consecutive with :math:`u > 0` (or :math:`< 0`). "Beyond" is strict; a point
    exactly on the centre line breaks a run.
    """
    x = _series(values, "values")
    u = (x - float(centre)) / _check_sigma(sigma)
    flags = {BEYOND_3: np.abs(u) > 3}
    for name, level, window, needed in ((TWO_OF_THREE, 2.0, 3, 2),
                                        (FOUR_OF_FIVE, 1.0, 5, 4),
                                        (EIGHT_ONE_SIDE, 0.0, 8, 8)):
        hit = np.zeros(x.size, dtype=bool)
        for side in (1.0, -1.0):
            beyond = side * u > level
            hit |= beyond & (_trailing_count(beyond, window) >= needed)
        flags[name] = hit
    return flags


def ewma(values, *, centre: float, sigma: float, lam: float = EWMA_LAMBDA,
         L: float = EWMA_L) -> EwmaChart:
    """Exponentially weighted moving average chart with exact (time-varying) limits.

    Parameters
    ----------
    values : (n,) array_like
        The series, in session order.
    centre, sigma : float
        Centre line and sigma of the individual values (from the baseline period).
    lam : float
        Weight of the newest value, 0 < lam <= 1 (default 0.2).
    L : float
        Width of the limits in sigma of the EWMA statistic (default 2.962).

    Returns
    -------
    EwmaChart

    Notes
    -----
    :math:`z_i = \\lambda x_i + (1-\\lambda) z_{i-1}`, :math:`z_0 = c`; limits
    :math:`c \\pm L\\sigma\\sqrt{\\frac{\\lambda}{2-\\lambda}
    [1-(1-\\lambda)^{2i}]}` for i = 1 .. n ([1], section 9.2). A point is beyond when
    :math:`z_i` lies strictly outside its limits.
    """
    x = _series(values, "values")
    sigma = _check_sigma(sigma)
    if not 0.0 < lam <= 1.0:
        raise InputError(f"lam must be in (0, 1], got {lam!r}", field="lam")
    if not L > 0:
        raise InputError(f"L must be positive, got {L!r}", field="L")
    c = float(centre)
    if x.size == 0:
        empty = np.zeros(0)
        return EwmaChart(empty, empty, empty, np.zeros(0, dtype=bool))
    z, _ = lfilter([lam], [1.0, -(1.0 - lam)], x, zi=[(1.0 - lam) * c])
    i = np.arange(1, x.size + 1)
    half = L * sigma * np.sqrt(lam / (2.0 - lam) * (1.0 - (1.0 - lam) ** (2 * i)))
    lower, upper = c - half, c + half
    return EwmaChart(z, lower, upper, (z < lower) | (z > upper))


def apply_rules(values, limits: ControlLimits, *, lam: float = EWMA_LAMBDA,
                L: float = EWMA_L) -> tuple[tuple[str, ...], ...]:
    """Check every point of a series with all rules; one tuple of rule names per point.

    Parameters
    ----------
    values : (n,) array_like
        The series, in session order (the baseline period included or not, as the trend
        view chooses; the EWMA starts at the first value given).
    limits : ControlLimits
        From :func:`individuals_limits` on the baseline period.
    lam, L : float
        EWMA design (see :func:`ewma`).

    Returns
    -------
    tuple of tuple of str
        For each point, the names from :data:`RULES` it breaks (empty when in control).

    Examples
    --------
    >>> lim = ControlLimits(centre=0.0, sigma=1.0, n_baseline=20)
    >>> apply_rules([0.0, 3.5, 0.0], lim)
    ((), ('beyond 3 sigma',), ())
    """
    x = _series(values, "values")
    flags = western_electric(x, centre=limits.centre, sigma=limits.sigma)
    flags[EWMA_BEYOND] = ewma(x, centre=limits.centre, sigma=limits.sigma, lam=lam,
                              L=L).beyond
    return tuple(tuple(rule for rule in RULES if flags[rule][k]) for k in range(x.size))
