"""Model observers computed from a noise power spectrum: NPW and NPWE detectability d'.

A signal template (the expected difference between signal-present and signal-absent
images, in the image's own value units) and an NPS on the same DFT grid (FFT order,
value² · mm², see :mod:`qa.analysis.nps`) give the detectability index d' of the
non-prewhitening matched filter (NPW) and of the same observer seen through an eye
filter (NPWE).
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import InputError

#: Defaults of the eye filter (see :func:`eye_filter`).
EYE_EXPONENT = 1.3
EYE_PEAK_CYCLES_PER_DEGREE = 4.0
VIEWING_DISTANCE_MM = 500.0


def disk_signal(*, diameter_mm: float, contrast: float, spacing_mm, shape,
                supersample: int = 4) -> np.ndarray:
    """An ideal disk of uniform ``contrast`` centred on pixel ``(ny // 2, nx // 2)``.

    Parameters
    ----------
    diameter_mm : float
        Disk diameter in mm.
    contrast : float
        Value inside the disk (background 0), in the image's value units.
    spacing_mm : (dy, dx)
        Pixel spacing in mm.
    shape : (ny, nx)
        Grid size in pixels.
    supersample : int
        Sub-samples per pixel and axis for the area-weighted edge pixels; 1 gives a
        binary disk of the pixels whose centres lie inside it.
    """
    if diameter_mm <= 0:
        raise InputError(f"disk diameter must be positive, got {diameter_mm} mm",
                         field="diameter_mm")
    ny, nx = (int(n) for n in shape)
    dy, dx = (float(s) for s in spacing_mm)
    k = max(1, int(supersample))
    sub = (np.arange(k) + 0.5) / k - 0.5
    y = ((np.arange(ny) - ny // 2)[:, None] + sub[None, :]).ravel() * dy
    x = ((np.arange(nx) - nx // 2)[:, None] + sub[None, :]).ravel() * dx
    # The relative 1e-9 keeps sample points exactly on the rim inside despite rounding.
    inside = (y[:, None] ** 2 + x[None, :] ** 2) <= (diameter_mm / 2.0) ** 2 * (1 + 1e-9)
    return contrast * inside.reshape(ny, k, nx, k).mean(axis=(1, 3))


def template_shape(diameter_mm: float, spacing_mm, minimum=(64, 64)) -> tuple[int, int]:
    """A grid (power-of-two sides) holding a disk with at least its diameter around it."""
    out = []
    for step, low in zip(spacing_mm, minimum):
        need = 3.0 * diameter_mm / float(step) + 8
        out.append(int(max(low, 2 ** math.ceil(math.log2(need)))))
    return tuple(out)


def eye_filter(freq_per_mm, *, viewing_distance_mm: float = VIEWING_DISTANCE_MM,
               exponent: float = EYE_EXPONENT,
               peak_cycles_per_degree: float = EYE_PEAK_CYCLES_PER_DEGREE,
               display_magnification: float = 1.0) -> np.ndarray:
    """Eye filter of the NPWE observer at radial image frequencies (cycles/mm).

    Parameters
    ----------
    freq_per_mm : array_like
        Radial spatial frequency in the image, cycles/mm.
    viewing_distance_mm : float
        Distance from eye to display.
    exponent : float
        The power ``n`` of the filter.
    peak_cycles_per_degree : float
        Frequency of the filter's maximum in cycles per degree of visual angle.
    display_magnification : float
        Size on the display over size in the image (1: shown at true size).

    Returns
    -------
    ndarray
        ``E``, scaled to 1 at its peak.

    Notes
    -----
    With :math:`\\rho` the frequency in cycles/degree,
    :math:`\\rho = f\\,D \\tan(1^\\circ) / m` for image frequency :math:`f`, viewing
    distance :math:`D` and display magnification :math:`m`,

    .. math:: E(\\rho) = \\rho^{n} \\exp(-c\\,\\rho^2), \\qquad c = n / (2\\rho_0^2),

    which peaks at :math:`\\rho_0`. This is the form of eye filter used for the NPWE
    observer by Burgess (1994) and in ICRU Report 54; the defaults n = 1.3 and a peak at
    4 cycles/degree are recalled from that literature (from memory, not read from the
    sources here) and are options of the metric family.

    References
    ----------
    A. E. Burgess, "Statistically defined backgrounds: performance of a modified
    nonprewhitening observer model", J. Opt. Soc. Am. A 11 (1994) 1237-1242.
    ICRU Report 54, Medical Imaging - The Assessment of Image Quality (1996).
    """
    if viewing_distance_mm <= 0 or exponent <= 0 or peak_cycles_per_degree <= 0 \
            or display_magnification <= 0:
        raise InputError("eye filter parameters must be positive", field="eye_filter")
    rho = np.abs(np.asarray(freq_per_mm, float)) * viewing_distance_mm \
        * math.tan(math.radians(1.0)) / display_magnification
    c = exponent / (2.0 * peak_cycles_per_degree ** 2)
    peak = peak_cycles_per_degree ** exponent * math.exp(-c * peak_cycles_per_degree ** 2)
    return rho ** exponent * np.exp(-c * rho ** 2) / peak


def observer_weights(signal: np.ndarray, *, spacing_mm,
                     eye: np.ndarray | None = None) -> tuple[float, np.ndarray]:
    """The parts of the NPW(E) integrals that do not depend on the NPS.

    Returns ``(A, W)``: ``A = ∫∫ |S|² E² du dv`` and the array ``W = |S|² E⁴ du dv`` with
    which the denominator is ``B = sum(W · NPS)`` (E = 1 without an eye filter). ``B`` is
    linear in the NPS, which lets a caller combine terms from separate ROIs.
    """
    signal = np.asarray(signal, float)
    dy, dx = (float(s) for s in spacing_mm)
    ny, nx = signal.shape
    du_dv = 1.0 / (ny * dy * nx * dx)
    power = np.abs(np.fft.fft2(signal) * (dx * dy)) ** 2
    weight = np.ones_like(power) if eye is None else np.asarray(eye, float) ** 2
    return float(np.sum(power * weight) * du_dv), power * weight ** 2 * du_dv


def observer_terms(signal: np.ndarray, nps: np.ndarray, *, spacing_mm,
                   eye: np.ndarray | None = None) -> tuple[float, float]:
    """Numerator and denominator integrals of the NPW(E) detectability.

    Returns ``(A, B)`` with ``A = ∫∫ |S|² E² du dv`` and ``B = ∫∫ |S|² E⁴ NPS du dv``
    (E = 1 without an eye filter), so that ``d' = A / sqrt(B)``.
    """
    nps = np.asarray(nps, float)
    if np.shape(signal) != nps.shape:
        raise InputError(f"signal {np.shape(signal)} and NPS {nps.shape} must share one "
                         "grid", field="nps")
    a, w = observer_weights(signal, spacing_mm=spacing_mm, eye=eye)
    return a, float(np.sum(w * nps))


def radial_frequency(shape, spacing_mm) -> np.ndarray:
    """Radial frequency (cycles/mm) of every point of a DFT grid, FFT order."""
    fy = np.fft.fftfreq(int(shape[0]), float(spacing_mm[0]))
    fx = np.fft.fftfreq(int(shape[1]), float(spacing_mm[1]))
    return np.hypot(fy[:, None], fx[None, :])


def dprime_npw(signal: np.ndarray, nps: np.ndarray, *, spacing_mm) -> float:
    """Detectability of the non-prewhitening matched filter (NPW) observer.

    Parameters
    ----------
    signal : (ny, nx) ndarray
        Expected signal difference in value units.
    nps : (ny, nx) ndarray
        NPS on the DFT grid of ``signal`` (FFT order), value² · mm².
    spacing_mm : (dy, dx)

    Notes
    -----
    With :math:`\\Delta S(u, v)` the Fourier transform of the signal,

    .. math:: d'^2_{\\mathrm{NPW}} = \\frac{\\left[\\iint |\\Delta S|^2\\,du\\,dv\\right]^2}
              {\\iint |\\Delta S|^2\\,\\mathrm{NPS}\\,du\\,dv}

    In white noise of variance :math:`\\sigma^2` (NPS = :math:`\\sigma^2 \\Delta x \\Delta y`)
    a disk of contrast :math:`\\Delta C` over N pixels gives
    :math:`d' = \\Delta C \\sqrt{N} / \\sigma`.

    References
    ----------
    ICRU Report 54, Medical Imaging - The Assessment of Image Quality (1996).
    A. E. Burgess, J. Opt. Soc. Am. A 11 (1994) 1237-1242.
    """
    a, b = observer_terms(signal, nps, spacing_mm=spacing_mm)
    return _ratio(a, b)


def dprime_npwe(signal: np.ndarray, nps: np.ndarray, *, spacing_mm,
                viewing_distance_mm: float = VIEWING_DISTANCE_MM,
                exponent: float = EYE_EXPONENT,
                peak_cycles_per_degree: float = EYE_PEAK_CYCLES_PER_DEGREE,
                display_magnification: float = 1.0) -> float:
    """Detectability of the non-prewhitening observer with eye filter (NPWE).

    Parameters are those of :func:`dprime_npw` and :func:`eye_filter`.

    Notes
    -----
    .. math:: d'^2_{\\mathrm{NPWE}} =
              \\frac{\\left[\\iint |\\Delta S|^2 E^2\\,du\\,dv\\right]^2}
              {\\iint |\\Delta S|^2 E^4\\,\\mathrm{NPS}\\,du\\,dv}

    with E from :func:`eye_filter`; no internal noise of the observer is added.

    References
    ----------
    A. E. Burgess, J. Opt. Soc. Am. A 11 (1994) 1237-1242.
    ICRU Report 54, Medical Imaging - The Assessment of Image Quality (1996).
    """
    eye = eye_filter(radial_frequency(np.shape(signal), spacing_mm),
                     viewing_distance_mm=viewing_distance_mm, exponent=exponent,
                     peak_cycles_per_degree=peak_cycles_per_degree,
                     display_magnification=display_magnification)
    a, b = observer_terms(signal, nps, spacing_mm=spacing_mm, eye=eye)
    return _ratio(a, b)


def _ratio(a: float, b: float) -> float:
    if not b > 0:
        raise InputError("the NPS gives no noise under the signal (denominator <= 0)",
                         field="nps")
    return a / math.sqrt(b)
