"""Noise power spectrum (NPS) of 2-D planes by the IEC 62220-1-1 method.

Square regions of interest (ROIs) are laid over a region of a plane, the low-frequency
trend is removed with a low-order 2-D polynomial, and the squared moduli of the ROIs'
discrete Fourier transforms are averaged and scaled by the pixel area over the number of
pixels of an ROI. Spectra are held in numpy's FFT order (``numpy.fft.fftfreq``), in
value² · mm² at frequencies in cycles/mm; :func:`shifted` reorders them for display.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import InputError, NotMeasurable


@dataclass(frozen=True)
class NoisePowerSpectrum:
    """A measured 2-D NPS and the per-ROI spectra it was averaged from.

    Attributes
    ----------
    nps : (ny, nx) ndarray
        Mean NPS in value² · mm², FFT order.
    periodograms : (n_rois, ny, nx) ndarray
        The scaled ``|DFT|²`` of each ROI (their mean is ``nps``).
    spacing_mm : (dy, dx)
        Pixel spacing in mm.
    n_independent : float
        Number of statistically independent ROIs: the area covered by the ROIs (overlaps
        counted once) over the area of one ROI. Standard errors divide by its root.
    corners : tuple of (iy, ix)
        Upper-left pixel of each ROI in the analysed plane.
    detrend_order : int
        Total degree of the polynomial that was removed.
    """

    nps: np.ndarray
    periodograms: np.ndarray
    spacing_mm: tuple[float, float]
    n_independent: float
    corners: tuple[tuple[int, int], ...] = ()
    detrend_order: int = 2

    @property
    def roi_px(self) -> int:
        return int(self.nps.shape[0])

    @property
    def freq_y_per_mm(self) -> np.ndarray:
        return np.fft.fftfreq(self.nps.shape[0], self.spacing_mm[0])

    @property
    def freq_x_per_mm(self) -> np.ndarray:
        return np.fft.fftfreq(self.nps.shape[1], self.spacing_mm[1])

    @property
    def variance(self) -> float:
        """Integral of the NPS over frequency (value²): the detrended pixel variance."""
        ny, nx = self.nps.shape
        du_dv = 1.0 / (ny * self.spacing_mm[0] * nx * self.spacing_mm[1])
        return float(self.nps.sum() * du_dv)

    def on_grid(self, shape) -> np.ndarray:
        """The mean NPS resampled onto the DFT grid of an array of ``shape`` (same pixels)."""
        return resample_periodic(self.nps, self.spacing_mm, shape)


def polynomial_trend(values: np.ndarray, mask: np.ndarray | None = None, *,
                     order: int = 2) -> np.ndarray:
    """Least-squares 2-D polynomial of total degree ``order`` fitted to ``values``.

    Parameters
    ----------
    values : (ny, nx) ndarray
    mask : (ny, nx) bool ndarray, optional
        Pixels that take part in the fit (default: all).
    order : int
        Total degree: 0 removes the mean, 1 a plane, 2 the second-order surface of
        IEC 62220-1-1.

    Returns
    -------
    (ny, nx) ndarray
        The fitted surface, evaluated on every pixel.
    """
    if order < 0 or order > 4:
        raise InputError(f"detrending order must be 0 to 4, got {order}", field="detrend_order")
    ny, nx = values.shape
    yy, xx = np.meshgrid(np.linspace(-1, 1, ny), np.linspace(-1, 1, nx), indexing="ij")
    terms = [xx ** i * yy ** j for i in range(order + 1) for j in range(order + 1 - i)]
    basis = np.stack(terms, axis=-1)
    sel = np.ones(values.shape, bool) if mask is None else np.asarray(mask, bool)
    coef, *_ = np.linalg.lstsq(basis[sel], values[sel].astype(float), rcond=None)
    return basis @ coef


def tile_rois(mask: np.ndarray, *, roi_px: int, overlap: float = 0.5) -> list[tuple[int, int]]:
    """Upper-left corners of square ROIs lying wholly inside ``mask``.

    ROIs are stepped by ``roi_px * (1 - overlap)`` pixels along both axes. The grid's
    offset from the mask's bounding box is the one (of the ``step x step`` possible)
    that fits the most ROIs, so a region turned against the pixel axes is tiled as
    fully as an upright one (ties go to the smallest offset).
    """
    if not 0.0 <= overlap < 1.0:
        raise InputError(f"ROI overlap must be in [0, 1), got {overlap}", field="overlap")
    mask = np.asarray(mask, bool)
    if roi_px < 2 or not mask.any():
        return []
    outside = np.pad(np.cumsum(np.cumsum(~mask, 0), 1), ((1, 0), (1, 0)))
    rows, cols = np.nonzero(mask)
    step = max(1, int(round(roi_px * (1.0 - overlap))))
    r0, r1 = rows.min(), rows.max() - roi_px + 2
    c0, c1 = cols.min(), cols.max() - roi_px + 2
    if r1 <= r0 or c1 <= c0:
        return []
    # fits[iy, ix]: the ROI with upper-left corner (r0 + iy, c0 + ix) lies inside the mask.
    iy = np.arange(r0, r1)[:, None]
    ix = np.arange(c0, c1)[None, :]
    bad = (outside[iy + roi_px, ix + roi_px] - outside[iy, ix + roi_px]
           - outside[iy + roi_px, ix] + outside[iy, ix])
    fits = bad == 0
    best, best_count = (0, 0), -1
    for oy in range(min(step, fits.shape[0])):
        for ox in range(min(step, fits.shape[1])):
            count = int(fits[oy::step, ox::step].sum())
            if count > best_count:
                best, best_count = (oy, ox), count
    oy, ox = best
    sub = fits[oy::step, ox::step]
    return [(int(r0 + oy + a * step), int(c0 + ox + b * step)) for a, b in zip(*np.nonzero(sub))]


def nps_2d(plane: np.ndarray, *, spacing_mm, mask: np.ndarray | None = None,
           roi_px: int = 64, overlap: float = 0.5, detrend_order: int = 2,
           detrend: str = "area") -> NoisePowerSpectrum:
    """Noise power spectrum of a region of a plane.

    Parameters
    ----------
    plane : (ny, nx) ndarray
        Pixel values.
    spacing_mm : (dy, dx)
        Pixel spacing in mm.
    mask : (ny, nx) bool ndarray, optional
        The region to analyse (default: the whole plane).
    roi_px : int
        Side of the square ROIs in pixels.
    overlap : float
        Fraction by which neighbouring ROIs overlap (0.5 = half, as in IEC 62220-1-1).
    detrend_order : int
        Total degree of the polynomial removed (2 in IEC 62220-1-1).
    detrend : {"area", "roi"}
        Fit the polynomial once over all ROI pixels ("area", the standard's way) or
        within each ROI ("roi", for regions made of separate patches).

    Returns
    -------
    NoisePowerSpectrum

    Raises
    ------
    NotMeasurable
        When no ROI fits inside the region.

    Notes
    -----
    For ROIs :math:`I_k` of :math:`N_x \\times N_y` pixels of size
    :math:`\\Delta x \\Delta y` with fitted trend :math:`S`,

    .. math:: \\mathrm{NPS}(u_i, v_j) = \\frac{\\Delta x\\,\\Delta y}{N_x N_y}
              \\Big\\langle \\big|\\mathrm{DFT}\\{I_k - S\\}(u_i, v_j)\\big|^2 \\Big\\rangle_k

    so that :math:`\\sum_{ij} \\mathrm{NPS}\\,\\Delta u\\,\\Delta v` equals the mean
    variance of the detrended ROIs (Parseval), with :math:`\\Delta u = 1/(N_x\\Delta x)`.
    Detrending over the area takes as many degrees of freedom as the polynomial has
    terms (6 for order 2); the power at the lowest frequencies (the ROI means) drops by
    roughly that number over the number of independent ROIs, so small areas call for a
    lower order.

    References
    ----------
    IEC 62220-1-1:2015, Medical electrical equipment - Characteristics of digital X-ray
    imaging devices - Part 1-1: Determination of the detective quantum efficiency -
    Detectors used in radiographic imaging (noise power spectrum clause).
    J. T. Dobbins III et al., "DQE(f) of four generations of computed radiography
    acquisition devices", Med. Phys. 22 (1995) 1581-1593.
    """
    plane = np.asarray(plane, dtype=float)
    if plane.ndim != 2:
        raise InputError(f"an NPS needs a 2-D plane, got shape {plane.shape}", field="plane")
    dy, dx = (float(s) for s in spacing_mm)
    region = np.ones(plane.shape, bool) if mask is None else np.asarray(mask, bool)
    region = region & np.isfinite(plane)
    corners = tile_rois(region, roi_px=roi_px, overlap=overlap)
    if not corners:
        raise NotMeasurable(f"no ROI of {roi_px} x {roi_px} px fits inside the noise region")
    if detrend not in ("area", "roi"):
        raise InputError(f"detrend must be 'area' or 'roi', got {detrend!r}", field="detrend")
    used = np.zeros(plane.shape, bool)
    for iy, ix in corners:
        used[iy:iy + roi_px, ix:ix + roi_px] = True
    residual = plane
    if detrend == "area":
        rows, cols = np.nonzero(used)
        window = (slice(rows.min(), rows.max() + 1), slice(cols.min(), cols.max() + 1))
        residual = plane.copy()
        residual[window] -= polynomial_trend(plane[window], used[window], order=detrend_order)
    stack = np.empty((len(corners), roi_px, roi_px))
    for k, (iy, ix) in enumerate(corners):
        roi = residual[iy:iy + roi_px, ix:ix + roi_px]
        if detrend == "roi":
            roi = roi - polynomial_trend(roi, order=detrend_order)
        stack[k] = roi
    spectra = np.abs(np.fft.fft2(stack)) ** 2 * (dx * dy / (roi_px * roi_px))
    return NoisePowerSpectrum(spectra.mean(axis=0), spectra, (dy, dx),
                              float(used.sum()) / roi_px ** 2, tuple(corners), detrend_order)


def shifted(spectrum: np.ndarray) -> np.ndarray:
    """Reorder a spectrum from FFT order to zero frequency in the middle (for display)."""
    return np.fft.fftshift(spectrum, axes=(-2, -1))


def resample_periodic(spectrum: np.ndarray, spacing_mm, shape) -> np.ndarray:
    """Bilinear resampling of a spectrum (FFT order) onto the DFT grid of ``shape``.

    The spectrum of a sampled image is periodic with period ``1 / spacing``, so the
    interpolation wraps around. Leading axes (a stack of spectra) are kept.
    """
    out = np.asarray(spectrum, dtype=float)
    for axis, (n_to, step) in enumerate(zip(shape, spacing_mm)):
        ax = out.ndim - 2 + axis
        n_from = out.shape[ax]
        if n_from == n_to:
            continue
        pos = np.fft.fftfreq(int(n_to), step) * n_from * step   # fractional source index
        lo = np.floor(pos).astype(int)
        w = (pos - lo).reshape([-1 if a == ax else 1 for a in range(out.ndim)])
        out = (np.take(out, lo % n_from, axis=ax) * (1 - w)
               + np.take(out, (lo + 1) % n_from, axis=ax) * w)
    return out


def nps_cut(spec: NoisePowerSpectrum, *, axis: str, n_lines: int = 7):
    """One-dimensional NPS along the frequency axis of ``x`` or ``y``.

    Following IEC 62220-1-1, the ``n_lines`` rows (or columns) on each side of the axis,
    the axis itself excluded, are gathered; each value is placed at its radial frequency
    :math:`\\sqrt{u^2 + v^2}` and averaged in bins one frequency step wide.

    Returns
    -------
    freq_per_mm, nps, sem : 1-D ndarrays
        Bin centres (cycles/mm, 0 to Nyquist), mean NPS (value² · mm²) and its standard
        error from the spread between ROIs.
    """
    if axis not in ("x", "y"):
        raise InputError(f"axis must be 'x' or 'y', got {axis!r}", field="axis")
    data = spec.periodograms if axis == "x" else np.swapaxes(spec.periodograms, 1, 2)
    f_along = spec.freq_x_per_mm if axis == "x" else spec.freq_y_per_mm
    f_across = spec.freq_y_per_mm if axis == "x" else spec.freq_x_per_mm
    n_lines = max(1, min(int(n_lines), len(f_across) // 2 - 1))
    rows = np.r_[1:n_lines + 1, -n_lines:0] % len(f_across)
    radial = np.hypot(f_along[None, :], f_across[rows, None])
    step = abs(f_along[1] - f_along[0])
    n_bins = len(f_along) // 2 + 1
    index = np.rint(radial / step).astype(int).ravel()
    keep = index < n_bins
    per_roi = data[:, rows, :].reshape(len(data), -1)[:, keep]
    counts = np.bincount(index[keep], minlength=n_bins)
    sums = np.stack([np.bincount(index[keep], weights=p, minlength=n_bins) for p in per_roi])
    with np.errstate(invalid="ignore", divide="ignore"):
        binned = sums / counts
    good = counts > 0
    mean = binned[:, good].mean(axis=0)
    sem = binned[:, good].std(axis=0, ddof=1) / np.sqrt(spec.n_independent) \
        if len(data) > 1 else np.full(mean.shape, np.nan)
    return np.arange(n_bins)[good] * step, mean, sem


def nps_radial(spec: NoisePowerSpectrum, *, bin_width_per_mm: float | None = None):
    """Radially averaged NPS: mean over annuli of width ``bin_width_per_mm``.

    Returns bin centres (cycles/mm) and the mean NPS (value² · mm²) in each.
    """
    fy, fx = np.meshgrid(spec.freq_y_per_mm, spec.freq_x_per_mm, indexing="ij")
    radial = np.hypot(fy, fx).ravel()
    width = bin_width_per_mm or max(abs(fx[0, 1]), abs(fy[1, 0]))
    index = np.floor(radial / width + 0.5).astype(int)
    counts = np.bincount(index)
    sums = np.bincount(index, weights=spec.nps.ravel())
    good = counts > 0
    return np.nonzero(good)[0] * width, sums[good] / counts[good]
