"""Presampled MTF of a slanted edge, on plain 2D arrays (no volumes, no phantoms).

References
----------
.. [1] IEC 62220-1-1:2015, Characteristics of digital X-ray imaging devices - Part 1-1:
   Determination of the detective quantum efficiency (presampled MTF from an edge).
.. [2] E. Samei, M. J. Flynn, D. A. Reimann, "A method for measuring the presampled MTF of
   digital radiographic systems using an edge test device", Med. Phys. 25 (1998) 102-113.
.. [3] E. Buhr, S. Günther-Kohfahl, U. Neitzel, "Accuracy of a simple method for
   deriving the presampled modulation transfer function of a digital radiographic
   system from an edge image", Med. Phys. 30 (2003) 2323-2331 (oversampled ESF).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import InputError, NotMeasurable

#: Largest ESF half-range used, in pixels across the edge (beyond it only noise is added).
MAX_HALF_RANGE_PX = 64
#: Classes over (-1, 1) bin for the spread of the samples about their bin's mean distance.
_N_PHASES = 64
#: Normalisations of the curve: at f = 0 (IEC 62220-1-1) or at its maximum up to Nyquist.
NORMALISATIONS = ("zero", "peak")
#: A curve normalised at f = 0 that peaks above this is called edge-enhanced.
ENHANCED_ABOVE = 1.05


@dataclass(frozen=True)
class EdgeLine:
    """Edge line ``across_mm = offset_mm + slope * along_mm`` from pixel [0, 0] of the
    oriented region; ``polarity`` +1 when values rise across it with the index (dark to
    bright), else -1; ``slope_se`` is the standard error of the slope."""

    offset_mm: float
    slope: float
    polarity: int
    rows_used: int
    slope_se: float

    @property
    def angle_deg(self) -> float:
        """Angle between the edge and the axis it runs along, in degrees (signed)."""
        return float(np.degrees(np.arctan(self.slope)))


@dataclass(frozen=True)
class EdgeMTF:
    """The presampled MTF of one edge (cycles/mm), its ESF and windowed LSF. ``*_sd`` are
    standard uncertainties (k = 1), nan when ``n_segments`` is 0; a crossing not reached
    within the curve's range is nan. ``mtf`` is normalised as ``normalise`` says; ``peak``
    is the largest value up to Nyquist of the curve normalised at f = 0, whatever
    ``normalise`` (above 1 for an edge-enhanced response), at ``peak_frequency_per_mm``."""

    frequency_per_mm: np.ndarray
    mtf: np.ndarray
    mtf_sd: np.ndarray
    mtf50_per_mm: float
    mtf50_sd: float
    mtf10_per_mm: float
    mtf10_sd: float
    angle_deg: float
    angle_sd_deg: float
    line: EdgeLine
    distance_mm: np.ndarray
    esf: np.ndarray
    lsf_distance_mm: np.ndarray
    lsf: np.ndarray
    bin_mm: float
    cnr: float
    n_segments: int
    normalise: str
    peak: float
    peak_sd: float
    peak_frequency_per_mm: float

    @property
    def edge_enhanced(self) -> bool:
        """Whether the curve normalised at f = 0 peaks above :data:`ENHANCED_ABOVE`."""
        return self.peak > ENHANCED_ABOVE


def first_crossing(frequency_per_mm, mtf, level: float, *, start: int = 0) -> float:
    """Lowest frequency from index ``start`` on (a peak's, for a curve that rises first)
    at which ``mtf`` falls below ``level`` (linear interpolation).

    Returns ``nan`` when the curve stays at or above ``level`` from ``start`` to its end,
    or is already below it at ``start``.
    """
    f, m = np.asarray(frequency_per_mm, dtype=float), np.asarray(mtf, dtype=float)
    below = int(start) + np.nonzero(m[int(start):] < level)[0]
    if below.size == 0 or below[0] == start:
        return float("nan")
    i = below[0]
    return float(f[i - 1] + (m[i - 1] - level) * (f[i] - f[i - 1]) / (m[i - 1] - m[i]))


def edge_mtf(image, *, pitch_mm, profile_axis: int = 1, bin_fraction: float = 0.25,
             n_segments: int = 16, n_frequencies: int = 129, min_angle_deg: float = 1.0,
             max_angle_deg: float = 15.0, min_cnr: float = 2.0,
             min_margin_px: float = 6.0, normalise: str = "zero") -> EdgeMTF:
    """Presampled MTF of the slanted edge in a 2D region.

    Parameters
    ----------
    image : (n0, n1) ndarray
        The region, holding one straight edge that crosses it from side to side.
    pitch_mm : float or tuple of 2 floats
        Pixel pitch along axis 0 and axis 1, in mm.
    profile_axis : {0, 1}
        Axis the profile across the edge runs along (the edge runs nearly parallel to the
        other axis); the MTF is that of this axis.
    bin_fraction : float
        ESF bin width as a fraction of the pixel pitch across the edge; at most 1/4.
    n_segments : int
        Segments of the edge (contiguous groups of rows) for the jackknife uncertainty;
        0 gives no uncertainty (faster, for searches).
    n_frequencies : int
        Points of the curve from 0 to the sampling frequency ``1 / a`` (twice Nyquist).
    min_angle_deg, max_angle_deg : float
        Accepted range of ``|angle|`` between the edge and the axis it runs along.
    min_cnr, min_margin_px : float
        Smallest step across the edge in pixel noise SDs; smallest distance in pixels from
        the fitted edge to the region's border across it (the smallest ESF half-range).
    normalise : {"zero", "peak"}
        Divide the curve by its value at f = 0 (IEC 62220-1-1), or by its maximum up to
        Nyquist (for an edge-enhanced response, such as an FBP reconstruction's along
        the direction of its filter); MTF50 and MTF10 are then sought after the peak.

    Returns
    -------
    EdgeMTF
        The line is given in the oriented frame (along = the other axis).

    Raises
    ------
    NotMeasurable
        The region is flat or too noisy, holds no straight edge, the angle is out of
        range, the edge is too close to the border, or ESF bins stay empty.
    InputError
        For a bad option.

    Notes
    -----
    Edge: per row, the centroid of ``g_j = p (v_{j+1} - v_j)`` at ``j + 1/2`` (``p`` the
    polarity) in a window about the current line, twice re-centred; the line is a least-
    squares fit rejecting rows beyond 3 robust SD (1.4826 MAD). The pixel noise SD is
    1.4826 MAD of differences between adjacent rows, over sqrt(2).

    ESF: each pixel centre ``(u, v)`` (along, across, mm) lies at
    ``d = p (v - v0 - s u) / sqrt(1 + s^2)`` from the line ``v = v0 + s u``. The ESF is the
    mean in bins of ``Δ = bin_fraction · a`` over ``|d| < R`` ([2]_, [3]_), ``R`` the
    smallest distance from line to border (at most 64 pixels); each bin mean is moved to
    the bin centre to first order, ``E_k = mean v - E'(c_k) (mean d - c_k)``, which
    removes the beat between bins and sample spacing at angles such as atan(1/4).

    LSF and MTF: the central difference ``L_k = (E_{k+1} - E_{k-1}) / 2Δ`` is multiplied by
    a Tukey window, flat over ``|d| < R/2`` and a raised cosine to 0 at ``R``: it quiets
    the noisy tails but leaves the LSF core untouched (a full-width Hann window narrows a
    wide LSF and raises its MTF). Then

    ``MTF(f) = |Σ w_k L_k exp(-2πi f d_k)| / Σ w_k L_k / (sinc(2Δf) B(f))``

    divides out the transfer of the central difference (``sinc(x) = sin(πx)/(πx)``) and
    of the binning, ``B(f) = sinc(Δf)`` for samples spread evenly over their bins (taken
    from their actual spread). MTF50 and MTF10 are the first crossings of 0.5 and 0.1
    (linear interpolation). ``normalise="peak"`` divides by ``P = max MTF(f)`` over
    ``0 <= f <= 1/2a`` and seeks the crossings from the peak's frequency on.

    Uncertainty: line fit and curve are repeated without each of ``K`` contiguous
    segments of the edge in turn (keeping noise correlated along the edge together); the
    delete-one jackknife gives ``u²(f) = (K-1)/K Σ (MTF_i(f) - mean MTF(f))²``. A crossing
    has ``u(f_c) = u(MTF(f_c)) / |slope|``, the slope of a line fitted to the curve over
    ``f_c ± 25 %`` (after the peak): steadier than a jackknife of the crossing, which
    noise makes jump. Normalised at the peak, each replicate is divided by its own
    maximum, so ``u(MTF(f_c))`` carries the peak's uncertainty and its correlation with
    the curve, to first order ``u²(M/P) = (M/P)² (u²(M)/M² + u²(P)/P² - 2 u(M,P)/(M P))``
    (the peak's frequency moving between replicates does not matter: the curve is flat
    there).
    """
    if not 0.0 < bin_fraction <= 0.25:
        raise InputError(f"bin_fraction must be in (0, 0.25] (a quarter pixel or finer), "
                         f"got {bin_fraction}", field="bin_fraction")
    if n_frequencies < 8:
        raise InputError(f"n_frequencies must be at least 8, got {n_frequencies}",
                         field="n_frequencies")
    if normalise not in NORMALISATIONS:
        raise InputError(f"normalise must be 'zero' or 'peak', got {normalise!r}",
                         field="normalise")
    img, (p_along, p_across) = _oriented(image, pitch_mm, profile_axis)
    line, centroids, cnr = _find(img, p_along, p_across, min_angle_deg, max_angle_deg,
                                 min_cnr)
    margin_mm = _margin_mm(img.shape, line, p_along, p_across)
    if margin_mm < min_margin_px * p_across:
        raise NotMeasurable(f"edge too close to the region's border: "
                            f"{max(margin_mm, 0) / p_across:.1f} pixels "
                            f"(need at least {min_margin_px:g})")
    half_range_mm = min(margin_mm, MAX_HALF_RANGE_PX * p_across)
    rows, bin_mm = np.arange(img.shape[0]), bin_fraction * p_across
    freq = np.linspace(0.0, 1.0 / p_across, int(n_frequencies))
    esf_x, esf, phases = _binned_esf(img, rows, line, p_along, p_across, half_range_mm,
                                     bin_mm)
    dft = _dft_matrix(freq, esf_x[1:-1], bin_mm, phases)
    n_nyq = int(np.sum(freq <= 0.5 / p_across * (1 + 1e-9)))
    mtf0, lsf_x, lsf = _spectrum(esf_x, esf, dft)
    mtf, start, peak = _normalised(mtf0, n_nyq, normalise)
    f50, f10 = (first_crossing(freq, mtf, v, start=start) for v in (0.5, 0.1))

    jack, peaks, angles = [], [], []
    if n_segments >= 2:
        for seg in np.array_split(rows, int(n_segments)):
            keep = np.setdiff1d(rows, seg)
            ok = keep[np.isfinite(centroids[keep])]
            seg_line = _fit_line(ok * p_along, centroids[ok], line.polarity)
            x_i, esf_i, _ = _binned_esf(img, keep, seg_line, p_along, p_across,
                                        half_range_mm, bin_mm)
            rep_i, _, peak_i = _normalised(_spectrum(x_i, esf_i, dft)[0], n_nyq, normalise)
            jack.append(rep_i)
            peaks.append(peak_i)
            angles.append(seg_line.angle_deg)
    mtf_sd = _jackknife_sd(jack, freq.shape)
    return EdgeMTF(
        frequency_per_mm=freq, mtf=mtf, mtf_sd=mtf_sd,
        mtf50_per_mm=f50, mtf50_sd=_crossing_sd(freq, mtf, mtf_sd, f50, start),
        mtf10_per_mm=f10, mtf10_sd=_crossing_sd(freq, mtf, mtf_sd, f10, start),
        angle_deg=line.angle_deg, angle_sd_deg=float(_jackknife_sd(angles, ())),
        line=line, distance_mm=esf_x, esf=esf, lsf_distance_mm=lsf_x, lsf=lsf,
        bin_mm=bin_mm, cnr=cnr, n_segments=len(jack), normalise=normalise, peak=peak,
        peak_sd=float(_jackknife_sd(peaks, ())),
        peak_frequency_per_mm=float(freq[np.argmax(mtf0[:n_nyq])]))


def _normalised(mtf, n_nyq, normalise):
    """Curve as ``normalise`` says, index to seek crossings from, peak up to ``n_nyq``."""
    i = int(np.argmax(mtf[:n_nyq]))
    return (mtf / mtf[i], i, float(mtf[i])) if normalise == "peak" else (mtf, 0, float(mtf[i]))


def _jackknife_sd(replicates, shape):
    """Delete-one jackknife SD ``sqrt((K-1)/K Σ (θ_i - mean θ)²)``; nan for K < 2."""
    k = len(replicates)
    if k < 2:
        return np.full(shape, np.nan)
    v = np.asarray(replicates, dtype=float)
    return np.sqrt((k - 1) / k * np.sum((v - v.mean(axis=0)) ** 2, axis=0))


def _crossing_sd(freq, mtf, mtf_sd, f_c, start=0, band=0.25):
    """Uncertainty of a crossing frequency: ``u(MTF(f_c)) / |dMTF/df (f_c)|``.

    The slope is that of a straight line fitted to the curve over ``f_c (1 ± band)`` (at
    least three points each side, none before index ``start``, the peak): steadier than
    the slope between two noisy grid points.
    """
    if not (np.isfinite(f_c) and np.all(np.isfinite(mtf_sd))):
        return float("nan")
    i = int(np.searchsorted(freq, f_c))
    sel = (freq >= f_c * (1 - band)) & (freq <= f_c * (1 + band))
    sel[max(i - 3, 0):i + 3] = True
    sel[:start] = False
    slope = np.polyfit(freq[sel], mtf[sel], 1)[0]
    if not slope < 0:
        return float("nan")
    return float(np.interp(f_c, freq, mtf_sd) / -slope)


# --- the steps -------------------------------------------------------------------------

def _oriented(image, pitch_mm, profile_axis):
    """The region as (along, across) with the profile on axis 1, and its two pitches."""
    img = np.asarray(image, dtype=float)
    pitch = np.broadcast_to(np.asarray(pitch_mm, float), (2,))
    if img.ndim != 2:
        raise InputError(f"an edge region must be 2D, got shape {img.shape}", field="image")
    if not np.all(np.isfinite(pitch) & (pitch > 0)):
        raise InputError(f"pitch_mm must be two positive numbers, got {pitch_mm!r}",
                         field="pitch_mm")
    if profile_axis not in (0, 1):
        raise InputError(f"profile_axis must be 0 or 1, got {profile_axis!r}",
                         field="profile_axis")
    if not np.all(np.isfinite(img)):
        raise NotMeasurable("the edge region holds non-finite values")
    p0, p1 = float(pitch[0]), float(pitch[1])
    return (img.T, (p1, p0)) if profile_axis == 0 else (img, (p0, p1))


def _find(img, p_along, p_across, min_angle_deg, max_angle_deg, min_cnr):
    n_rows, n_cols = img.shape
    if n_rows < 16 or n_cols < 16:
        raise NotMeasurable(f"edge region of {n_rows} x {n_cols} pixels is too small "
                            "(need at least 16 x 16)")
    dif = np.diff(img, axis=0)            # along the edge: robust to the few edge pixels
    noise = 1.4826 * np.median(np.abs(dif - np.median(dif))) / np.sqrt(2.0)
    side = max(2, n_cols // 5)
    step = float(np.mean(img[:, -side:]) - np.mean(img[:, :side]))
    scale = max(1.0, float(np.max(np.abs(img))))
    if abs(step) <= 1e-9 * scale and noise <= 1e-9 * scale:
        raise NotMeasurable("no edge in the region: it is flat")
    cnr = abs(step) / noise if noise > 0 else float("inf")
    if cnr < min_cnr:
        raise NotMeasurable(f"no usable edge: the step across the region is {cnr:.2f} "
                            f"times the pixel noise SD (need at least {min_cnr:g})")
    polarity = 1 if step > 0 else -1
    grad = polarity * np.diff(img, axis=1)                 # at column j + 1/2
    pos_px = np.arange(n_cols - 1) + 0.5

    # Coarse line: peak of the derivative of block-averaged rows.
    blocks = np.array_split(np.arange(n_rows), min(8, n_rows // 4))
    rb = np.array([b.mean() for b in blocks])
    peaks = np.array([pos_px[np.argmax(np.convolve(grad[b].mean(axis=0), np.ones(3), "same"))]
                      for b in blocks])
    line = _fit_line(rb * p_along, peaks * p_across, polarity, 1.5 * p_across)
    if abs(line.angle_deg) > 3.0 * max_angle_deg:     # far off: stop before refining
        _check_angle(line, 0.0, max_angle_deg)

    # Window half-width from the rough 10-90 % rise distance of the coarsely aligned ESF.
    rows = np.arange(n_rows)
    rough_mm = max(_margin_mm(img.shape, line, p_along, p_across), 3.0 * p_across)
    rough = _binned_esf(img, rows, line, p_along, p_across, rough_mm, 0.5 * p_across,
                        0.0)[1]
    tail = max(1, rough.size // 6)
    lo, hi = rough[:tail].mean(), rough[-tail:].mean()
    frac = (rough - lo) / (hi - lo) if hi != lo else np.zeros_like(rough)
    rise_px = 0.5 * max(1, np.sum((frac > 0.1) & (frac < 0.9)))
    half_window = np.clip(2.0 * rise_px + 3.0, 4.0, 0.4 * n_cols)

    for _ in range(3):
        centre = (line.offset_mm + line.slope * rows * p_along) / p_across
        inside = np.abs(pos_px[None, :] - centre[:, None]) <= half_window
        mass = np.sum(grad * inside, axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            centroids = np.where(mass > 0, p_across * np.sum(grad * inside * pos_px, axis=1)
                                 / mass, np.nan)
        ok = np.isfinite(centroids)
        if ok.sum() < max(8, n_rows // 2):
            break
        line = _fit_line(rows[ok] * p_along, centroids[ok], polarity)
    if ok.sum() < max(8, n_rows // 2) or line.rows_used < max(8, n_rows // 2):
        raise NotMeasurable(f"no usable edge: only {min(ok.sum(), line.rows_used)} of "
                            f"{n_rows} rows show a rise on a straight line (edge too noisy, "
                            "not straight, or not along this axis)")
    _check_angle(line, min_angle_deg, max_angle_deg)
    length_mm = (n_rows - 1) * p_along
    if line.slope_se * length_mm > 0.5 * p_across:
        raise NotMeasurable(f"edge too noisy to align: the fitted line is uncertain by "
                            f"{line.slope_se * length_mm / p_across:.2g} pixel over the region "
                            "(need at most 0.5)")
    shift_px = abs(line.slope) * length_mm / p_across
    if shift_px < 1.0:
        raise NotMeasurable(f"the edge shifts only {shift_px:.2g} pixel along the region, "
                            "less than the 1 needed to sample every sub-pixel phase")
    return line, centroids, cnr


def _fit_line(along_mm, across_mm, polarity, floor_mm=0.0):
    """Least-squares line, rejecting points beyond max(3 robust SD, ``floor_mm``)."""
    u, v = np.asarray(along_mm, float), np.asarray(across_mm, float)
    keep = np.ones(u.size, bool)
    for _ in range(4):
        if keep.sum() < 3:
            raise NotMeasurable("no usable edge: too few rows to fit a line")
        slope, offset = np.polyfit(u[keep], v[keep], 1)
        res = v - (offset + slope * u)
        mad = 1.4826 * np.median(np.abs(res[keep] - np.median(res[keep])))
        new = np.abs(res) <= max(3.0 * mad, floor_mm, 1e-12)
        if np.array_equal(new, keep):
            break
        keep = new
    n = int(keep.sum())
    su = np.sum((u[keep] - u[keep].mean()) ** 2)
    se = np.sqrt(np.sum(res[keep] ** 2) / max(n - 2, 1) / su) if su > 0 else np.inf
    return EdgeLine(float(offset), float(slope), int(polarity), n, float(se))


def _check_angle(line, min_deg, max_deg):
    a = abs(line.angle_deg)
    if a < min_deg:
        raise NotMeasurable(f"edge angle {line.angle_deg:.2f} deg is below {min_deg:g} deg "
                            "from the axis: too few sub-pixel phases")
    if a > max_deg:
        raise NotMeasurable(f"edge angle {line.angle_deg:.1f} deg is above {max_deg:g} deg "
                            "from the axis")


def _margin_mm(shape, line, p_along, p_across):
    """Smallest distance, normal to the line, from the line to the region's side borders."""
    n_rows, n_cols = shape
    ends = line.offset_mm + line.slope * np.array([0.0, (n_rows - 1) * p_along])
    cos = 1.0 / np.sqrt(1.0 + line.slope ** 2)
    return min(ends.min() + 0.5 * p_across, (n_cols - 0.5) * p_across - ends.max()) * cos


def _binned_esf(img, rows, line, p_along, p_across, half_range_mm, bin_mm, min_filled=0.9):
    n_bins = 2 * int(np.floor(half_range_mm / bin_mm))
    r = rows[:, None] * p_along
    c = np.arange(img.shape[1])[None, :] * p_across
    d = line.polarity * (c - line.offset_mm - line.slope * r) / np.sqrt(1 + line.slope ** 2)
    vals = img[rows]
    idx = np.floor(d / bin_mm).astype(int) + n_bins // 2
    ok = (idx >= 0) & (idx < n_bins)
    idx, d, vals = idx[ok], d[ok], vals[ok]
    counts = np.bincount(idx, minlength=n_bins)
    filled = counts > 0
    if filled.sum() < max(min_filled * n_bins, 1):
        raise NotMeasurable(f"{n_bins - filled.sum()} of {n_bins} ESF bins are empty: "
                            "the edge angle does not sample every sub-pixel phase")
    centres = (np.arange(n_bins) - n_bins // 2 + 0.5) * bin_mm
    n = np.maximum(counts, 1)
    mean_d = np.where(filled, np.bincount(idx, weights=d, minlength=n_bins) / n, centres)
    mean_v = np.bincount(idx, weights=vals, minlength=n_bins) / n
    esf = np.interp(centres, mean_d[filled], mean_v[filled])
    # First-order move of each bin's mean from its samples' mean distance to its centre.
    esf = np.where(filled, mean_v - np.gradient(esf, bin_mm) * (mean_d - centres), esf)
    spread = (d - mean_d[idx]) / bin_mm                         # in bins, within (-1, 1)
    phases = np.bincount(np.clip(((spread + 1.0) * _N_PHASES / 2).astype(int), 0,
                                 _N_PHASES - 1), minlength=_N_PHASES) / spread.size
    return centres, esf, phases


def _spectrum(x, esf, dft):
    """Spectrum of the windowed central-difference LSF of a binned ESF, normalised at
    f = 0; the LSF's distances and values."""
    bin_mm = x[1] - x[0]
    lsf = (esf[2:] - esf[:-2]) / (2.0 * bin_mm)
    xl = x[1:-1]
    r_w = np.max(np.abs(xl))
    t = np.clip((np.abs(xl) - 0.5 * r_w) / (0.5 * r_w), 0.0, 1.0)
    wl = 0.5 * (1.0 + np.cos(np.pi * t)) * lsf
    area = np.sum(wl)
    if not area > 0:
        raise NotMeasurable("no usable edge: the windowed LSF has no positive area")
    # einsum, not @: a BLAS call this small only costs thread start-up on a busy machine
    return np.abs(np.einsum("ij,j->i", dft, wl)) / area, xl, wl


def _dft_matrix(freq, x_mm, bin_mm, phases):
    """Fourier kernel over the central-difference and binning transfers; the latter is
    ``|Σ_h p_h exp(-2πi f Δ t_h)|`` for a fraction ``p_h`` of samples ``t_h`` bins from their
    bin's mean distance: sinc(Δf) for an even spread, near 1 at angles such as atan(1/4)."""
    t = 2.0 * (np.arange(_N_PHASES) + 0.5) / _N_PHASES - 1.0
    binning = np.abs(np.einsum("ij,j->i", np.exp(-2j * np.pi * np.outer(freq * bin_mm, t)),
                               phases))
    correction = np.sinc(2.0 * bin_mm * freq) * binning
    return np.exp(-2j * np.pi * np.outer(freq, x_mm)) / correction[:, None]
