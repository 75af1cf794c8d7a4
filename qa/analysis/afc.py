"""M-alternative forced choice (M-AFC): percent correct from d' and back.

An unbiased observer sees M alternatives, one holding the signal; each gives a normal
decision variable of unit variance, the signal's with mean d', and the observer picks
the largest. Threshold contrast in this suite is the contrast at which a model observer
reaches the 62.5 % point of a 4-AFC task (half-way between chance, 25 %, and 100 %).
"""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np
from scipy import integrate, optimize, special

from ..errors import InputError

#: d' range searched by :func:`dprime_mafc`.
_D_LOW, _D_HIGH = -10.0, 15.0


def _check_m(m) -> int:
    if int(m) != m or m < 2:
        raise InputError(f"the number of alternatives M must be an integer >= 2, got {m}",
                         field="M")
    return int(m)


def _pc_scalar(d: float, m: int) -> float:
    def integrand(x):
        return math.exp(-0.5 * (x - d) ** 2 + (m - 1) * special.log_ndtr(x)) \
            / math.sqrt(2.0 * math.pi)

    # Split at the signal's mean so that quad sees the peak of the integrand.
    lo, _ = integrate.quad(integrand, -np.inf, d, epsabs=1e-13, epsrel=1e-12, limit=200)
    hi, _ = integrate.quad(integrand, d, np.inf, epsabs=1e-13, epsrel=1e-12, limit=200)
    return lo + hi


def pc_mafc(dprime, m: int):
    """Probability of a correct response in M-AFC for detectability ``dprime``.

    Parameters
    ----------
    dprime : float or array_like
        Detectability index (dimensionless).
    m : int
        Number of alternatives, >= 2.

    Returns
    -------
    float or ndarray
        Proportion correct, between 0 and 1 (1/M at d' = 0).

    Notes
    -----
    .. math:: P_c(d', M) = \\int_{-\\infty}^{\\infty} \\varphi(x - d')\\,
              \\Phi(x)^{M-1}\\,dx

    with :math:`\\varphi`, :math:`\\Phi` the standard normal density and distribution.
    For M = 2 it reduces to :math:`\\Phi(d'/\\sqrt{2})`; the integral is evaluated
    for every M (adaptive quadrature, split at x = d'), so that closed form stays an
    independent check.

    References
    ----------
    D. M. Green and J. A. Swets, Signal Detection Theory and Psychophysics, Wiley (1966).
    M. J. Hacker and R. Ratcliff, "A revised table of d' for M-alternative forced
    choice", Perception & Psychophysics 26 (1979) 168-170.

    Examples
    --------
    >>> round(pc_mafc(0.0, 4), 6)
    0.25
    """
    m = _check_m(m)
    d = np.asarray(dprime, float)
    out = np.vectorize(lambda v: _pc_scalar(float(v), m), otypes=[float])(d)
    return float(out) if out.ndim == 0 else out


def dprime_mafc(pc: float, m: int) -> float:
    """Detectability d' that gives proportion correct ``pc`` in M-AFC.

    The inverse of :func:`pc_mafc`, solved by Brent's method on d' in [-10, 15].

    Raises
    ------
    InputError
        When ``pc`` is outside the range that d' in [-10, 15] reaches.
    """
    m = _check_m(m)
    pc = float(pc)
    lo, hi = _pc_scalar(_D_LOW, m), _pc_scalar(_D_HIGH, m)
    if not lo < pc < hi:
        raise InputError(f"proportion correct must lie in ({lo:.3g}, {hi:.12g}) for "
                         f"{m}-AFC, got {pc}", field="percent_correct")
    return float(optimize.brentq(lambda d: _pc_scalar(d, m) - pc, _D_LOW, _D_HIGH,
                                 xtol=1e-12, rtol=1e-12))


@lru_cache(maxsize=16)
def threshold_dprime(*, m: int = 4, percent_correct: float = 62.5) -> float:
    """The d' at which an M-AFC observer reaches ``percent_correct`` (4-AFC 62.5 %: 1.235)."""
    return dprime_mafc(percent_correct / 100.0, m)
