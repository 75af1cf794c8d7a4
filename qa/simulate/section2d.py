"""Parallel-beam projection, matched backprojection, FBP and SIRT of a 2D section.

Frame of :mod:`qa.simulate.exact2d`: image ``[y, x]``, origin at its geometric centre,
``y`` growing with the row index; view ``theta`` (degrees from ``+x`` towards ``+y``)
measures the lines ``x cos(theta) + y sin(theta) = t``. Sinograms are ``[view, bin]``,
bin ``k`` of ``n_det`` centred at ``t_k = (k - (n_det - 1) / 2) * det_mm``.

scikit-image: ``skimage.transform.radon(image, theta=a)`` turns about pixel
``(n // 2, n // 2)``, puts bin ``k`` at ``t = k - n // 2`` pixels and measures
``t = x cos(a) - y sin(a)``: its column ``a`` is our view ``-a``. For even ``n`` its
centre is half a pixel off ours; one zero row and column appended to the image (and one
zero bin to the sinogram) map one onto the other.

The projector
-------------
At one view all pixels share one detector footprint, so a projection is the histogram
of pixel-centre positions convolved with one kernel. Centres go on a grid of ``1/FINE``
bin (``t`` rounded separately in ``x`` and ``y``: error at most ``1/FINE`` bin), are
histogrammed by ``np.bincount`` and convolved with the kernel sampled on that grid; the
backprojector is the exact transpose of the same sums. Kernels (:data:`KERNELS`), with
``a = pixel_mm / det_mm`` and ``B_w`` a unit box of ``w`` bins:

- ``"cubic"`` (default): line integrals at the bin centres through the image
  interpolated along the rows (or columns) the rays cross by cubic convolution: Joseph's
  method (IEEE Trans Med Imaging 1, 1982) with Keys' interpolator (IEEE Trans Acoust
  Speech Signal Process 29, 1981): ``a^2 det K(tau / w) / w``, ``w = a max(|cos|,
  |sin|)``. Its negative lobes make sharp edges ring slightly.
- ``"joseph"``: the same with linear interpolation, ``a^2 det (B_w * B_w)``.
- ``"strip"``: ``a^2 det (B_{a|cos|} * B_{a|sin|} * B_1)``: square pixels, line
  integrals averaged over the bin (Long, Fessler & Balter, IEEE Trans Med Imaging 29, 2010).
- ``"linear"``: ``B_1 * B_1``, linear interpolation weights (the backprojection of FBP).

On pixel-area images of disks ``"cubic"`` comes closest to the exact integrals, closer
than ``skimage.transform.radon`` (``tests/benchmarks/bench_section2d_speed.py``).
"""

from __future__ import annotations

import functools
import inspect
import math
from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from .exact2d import box_spline, check_angles, check_length, check_sinogram, pixel_centres_mm

#: Sub-bin grid of pixel-centre positions (1/FINE of a bin). 1/32 left a position noise
#: that doubled the interior error of the Joseph kernel on a disk phantom; 1/128 costs
#: little more at 512 x 512 (the histogram, not the kernel, dominates).
FINE = 128


def _keys(x):
    """Keys' cubic convolution kernel (a = -1/2), support |x| < 2."""
    x = np.abs(x)
    return np.where(x <= 1, (1.5 * x - 2.5) * x * x + 1,
                    np.where(x < 2, ((-0.5 * x + 2.5) * x - 4) * x + 2, 0.0))


def _width(a, c, s):
    return a * max(c, s)


#: Projector kernels: name -> (half support in bins, kernel of tau in bins, whether it
#: carries the factor pixel_mm^2 / det_mm of a line integral), as functions of
#: ``a = pixel_mm / det_mm``, ``c = |cos theta|``, ``s = |sin theta|``. Module notes.
KERNELS = {
    "cubic": (lambda a, c, s: 2 * _width(a, c, s),
              lambda t, a, c, s: _keys(t / _width(a, c, s)) / _width(a, c, s), True),
    "joseph": (lambda a, c, s: _width(a, c, s),
               lambda t, a, c, s: box_spline(t, [_width(a, c, s)] * 2), True),
    "strip": (lambda a, c, s: (a * c + a * s + 1) / 2,
              lambda t, a, c, s: box_spline(t, [a * c, a * s, 1.0]), True),
    "linear": (lambda a, c, s: 1.0, lambda t, a, c, s: box_spline(t, [1.0, 1.0]), False),
}

#: Apodisation windows of the ramp filter, as functions of frequency in cycles per bin
#: (|nu| <= 1/2): Kak & Slaney 1988, section 3.3; Shepp & Logan, IEEE Trans Nucl Sci 21, 1974.
WINDOWS = {
    "ramp": lambda nu: np.ones_like(nu),
    "shepp-logan": lambda nu: np.sinc(nu),
    "cosine": lambda nu: np.cos(np.pi * nu),
    "hamming": lambda nu: 0.54 + 0.46 * np.cos(2 * np.pi * nu),
    "hann": lambda nu: 0.5 + 0.5 * np.cos(2 * np.pi * nu),
}


def angular_weights_rad(angles_deg, *, period_deg: float = 180.0) -> np.ndarray:
    """Angular interval (radians) each view stands for in a filtered backprojection.

    A view stands for half the gap to each neighbour; an end view also for half its
    inner gap beyond the end (so a limited arc ``[a, b]`` with spacing ``s`` counts as
    ``[a - s/2, b + s/2]``), capped where the arc closes on itself modulo ``period_deg``
    (180 degrees for parallel lines, 360 for a fan). Views spread over more than one
    period would measure lines twice and are refused.
    """
    a = check_angles(angles_deg)
    if a.size < 2:
        raise InputError("a filtered backprojection needs at least two views",
                         field="angles_deg")
    order = np.argsort(a)
    s = a[order]
    gaps = np.diff(s)
    span = s[-1] - s[0]
    if np.any(gaps <= 0) or span > period_deg * (1 + 1e-9):
        raise InputError(f"views must be distinct and lie within {period_deg:g} degrees "
                         f"(got a span of {span:g})", field="angles_deg")
    wrap = period_deg - span
    half = np.concatenate(([min(gaps[0], wrap) / 2], gaps / 2)) + \
        np.concatenate((gaps / 2, [min(gaps[-1], wrap) / 2]))
    out = np.empty_like(half)
    out[order] = half
    return np.deg2rad(out)


def ramp_filter(sinogram, *, det_mm: float, filter_name: str = "ramp") -> np.ndarray:
    """Ramp-filter each row of a ``[view, bin]`` sinogram, with an apodisation window.

    Returns ``q = det_mm * (p * h)``, ``h`` the band-limited ramp kernel sampled at the
    bin pitch ``tau``: ``h(0) = 1 / (4 tau^2)``, ``h(n) = -1 / (n pi tau)^2`` for odd
    ``n``, 0 for even ``n`` (Kak & Slaney 1988, eq. 3.61), applied by FFT after zero
    padding to at least twice the row length and multiplied by ``WINDOWS[filter_name]``.
    Unit: the sinogram's unit per mm.
    """
    if filter_name not in WINDOWS:
        raise InputError(f"unknown filter '{filter_name}'; expected one of "
                         f"{', '.join(WINDOWS)}", field="filter_name")
    p = np.asarray(sinogram, dtype=float)
    n = p.shape[-1]
    size = max(64, 1 << int(math.ceil(math.log2(2 * n))))
    k = np.minimum(np.arange(size), size - np.arange(size))
    h = np.where(k == 0, 0.25, np.where(k % 2 == 1, -1.0 / (np.pi * np.maximum(k, 1)) ** 2, 0.0))
    response = np.real(np.fft.rfft(h)) * WINDOWS[filter_name](np.fft.rfftfreq(size))
    q = np.fft.irfft(np.fft.rfft(p, n=size, axis=-1) * response, n=size, axis=-1)[..., :n]
    return q / check_length(det_mm, "det_mm")


@dataclass(frozen=True, eq=False, kw_only=True)
class ParallelBeam:
    """A parallel-beam projector and its exact transpose for one geometry.

    Parameters
    ----------
    shape : (ny, nx)
        Image shape.
    pixel_mm : float
        Pixel side, mm.
    angles_deg : (n_views,) array_like
        View angles, degrees.
    n_det : int, optional
        Number of detector bins; default: enough to hold the image at every angle.
    det_mm : float, optional
        Bin pitch, mm; default ``pixel_mm``.
    kernel : {"cubic", "joseph", "strip", "linear"}
        See :data:`KERNELS` and the module notes.

    Notes
    -----
    ``p_v[k] = sum_m g_v(k - s_m) h_v[m]``: ``h_v`` the histogram of pixel values at the
    quantised centre positions ``s_m`` (bins), ``g_v`` the kernel. Adjoint: reversed sums.

    References
    ----------
    .. [1] Joseph, "An improved algorithm for reprojecting rays through pixel images",
           IEEE Trans Med Imaging 1, 1982.
    .. [2] Keys, "Cubic convolution interpolation for digital image processing", IEEE
           Trans Acoust Speech Signal Process 29, 1981.
    .. [3] Long, Fessler & Balter, "3D forward and back-projection for X-ray CT using
           separable footprints", IEEE Trans Med Imaging 29, 2010.
    .. [4] Kak & Slaney, "Principles of Computerized Tomographic Imaging", IEEE Press
           1988, chapter 3.
    """

    shape: tuple[int, int]
    pixel_mm: float
    angles_deg: np.ndarray
    n_det: int | None = None
    det_mm: float | None = None
    kernel: str = "cubic"

    def __post_init__(self):
        shape = tuple(int(s) for s in self.shape)
        if len(shape) != 2 or min(shape) < 1:
            raise InputError(f"shape must be two positive sizes (ny, nx), got {self.shape!r}",
                             field="shape")
        if self.kernel not in KERNELS:
            raise InputError(f"unknown projector kernel '{self.kernel}'; expected one of "
                             f"{', '.join(KERNELS)}", field="kernel")
        d = check_length(self.pixel_mm, "pixel_mm")
        det = d if self.det_mm is None else check_length(self.det_mm, "det_mm")
        n_det = self.n_det
        if n_det is None:
            n_det = int(math.ceil(math.hypot(*shape) * d / det)) + 2
        if int(n_det) < 1:
            raise InputError(f"n_det must be a positive count, got {n_det!r}", field="n_det")
        angles = check_angles(self.angles_deg)
        for name, value in (("shape", shape), ("pixel_mm", d), ("det_mm", det),
                            ("n_det", int(n_det)), ("angles_deg", angles)):
            object.__setattr__(self, name, value)
        self._plan()

    def _plan(self):
        theta = np.deg2rad(self.angles_deg)
        x, y = pixel_centres_mm(self.shape, self.pixel_mm)
        mx = np.rint(FINE * np.outer(np.cos(theta), x) / self.det_mm).astype(np.intp)
        my = np.rint(FINE * (np.outer(np.sin(theta), y) / self.det_mm
                             + (self.n_det - 1) / 2)).astype(np.intp)
        support, kernel, scaled = KERNELS[self.kernel]
        a = self.pixel_mm / self.det_mm
        cs = [(a, abs(math.cos(t)), abs(math.sin(t))) for t in theta]
        q_half = int(math.ceil(FINE * max(support(*v) for v in cs))) + 1
        m0 = q_half + max(0, -int((mx.min(axis=1) + my.min(axis=1)).min()))
        hi = int((mx.max(axis=1) + my.max(axis=1)).max())
        tau = -np.arange(-q_half, q_half + 1) / FINE
        scale = self.pixel_mm ** 2 / self.det_mm if scaled else 1.0
        # taps[v, j] = g_v((q_half - j) / FINE): bin k reads fine cells start + FINE k + j.
        taps = np.stack([scale * kernel(tau, *v) for v in cs])
        for name, value in (("_mx", mx), ("_my", my + m0), ("_taps", taps),
                            ("_start", m0 - q_half),
                            ("_n_fine", max(m0 + hi + q_half + 1,
                                            m0 + q_half + FINE * self.n_det))):
            object.__setattr__(self, name, value)

    def _index(self, v: int, out: np.ndarray) -> np.ndarray:
        """Fine-grid cell of every pixel centre at view ``v``, written into ``out``.

        Buffers are reused across views: a fresh multi-megabyte array per view costs
        more in page faults than the arithmetic.
        """
        return np.add(self._my[v][:, None], self._mx[v][None, :], out=out)

    def _blocks(self, fine: np.ndarray, v: int):
        """Pairs (cells, taps): ``cells[k, j] = fine[start + j0 + FINE k + j]`` and the taps
        ``taps[v, j0 + j]``, for ``j0 = 0, FINE, ...``; blocks of one bin do not overlap."""
        taps = self._taps[v]
        for j0 in range(0, taps.size, FINE):
            block = taps[j0:j0 + FINE]
            start = self._start + j0
            cells = fine[start:start + FINE * self.n_det].reshape(self.n_det, FINE)
            yield cells[:, :block.size], block

    def _read_bins(self, fine: np.ndarray, v: int) -> np.ndarray:
        """``p[k] = sum_j taps[v, j] fine[start + FINE k + j]``: the kernel, read per bin."""
        return sum(cells @ block for cells, block in self._blocks(fine, v))

    def _spread_bins(self, values: np.ndarray, v: int) -> np.ndarray:
        """The transpose of :meth:`_read_bins`."""
        fine = np.zeros(self._n_fine)
        for cells, block in self._blocks(fine, v):
            cells += np.outer(values, block)
        return fine

    def project(self, image) -> np.ndarray:
        """Sinogram ``[view, bin]`` of ``image`` (unitless line integrals if 1/mm)."""
        f = np.asarray(image, dtype=float)
        if f.shape != self.shape:
            raise InputError(f"image shape {f.shape} differs from the projector's "
                             f"{self.shape}", field="image")
        flat = f.ravel()
        out = np.empty((len(self.angles_deg), self.n_det))
        index = np.empty(self.shape, dtype=np.intp)
        for v in range(len(self.angles_deg)):
            hist = np.bincount(self._index(v, index).ravel(), weights=flat,
                               minlength=self._n_fine)
            out[v] = self._read_bins(hist, v)
        return out

    def backproject(self, sinogram) -> np.ndarray:
        """The transpose of :meth:`project` applied to a ``[view, bin]`` array."""
        s = check_sinogram(sinogram, len(self.angles_deg), self.n_det)
        out = np.zeros(self.shape)
        index, values = np.empty(self.shape, dtype=np.intp), np.empty(self.shape)
        for v in range(len(self.angles_deg)):
            fine = self._spread_bins(s[v], v)
            out += fine.take(self._index(v, index), mode="clip", out=values)
        return out


def project_parallel(image, *, angles_deg, pixel_mm: float, n_det: int | None = None,
                     det_mm: float | None = None, model: str = "cubic") -> np.ndarray:
    """Parallel-beam sinogram ``[view, bin]`` of a 2D image (see :class:`ParallelBeam`).

    ``model`` is a projector kernel of :data:`KERNELS`: ``"cubic"`` and ``"joseph"``
    give line integrals at the bin centres, ``"strip"`` bin means of the square-pixel
    image. Unitless when the image is in 1/mm.
    """
    f = np.asarray(image, dtype=float)
    if f.ndim != 2:
        raise InputError(f"a section image is 2-D [y, x], got shape {f.shape}", field="image")
    return ParallelBeam(shape=f.shape, pixel_mm=pixel_mm, angles_deg=angles_deg, n_det=n_det,
                        det_mm=det_mm, kernel=model).project(f)


def backproject_parallel(sinogram, *, angles_deg, pixel_mm: float, shape,
                         det_mm: float | None = None, model: str = "cubic") -> np.ndarray:
    """The exact transpose of :func:`project_parallel` (same keywords)."""
    s = check_sinogram(sinogram, len(check_angles(angles_deg)))
    beam = ParallelBeam(shape=shape, pixel_mm=pixel_mm, angles_deg=angles_deg, n_det=s.shape[1],
                        det_mm=det_mm, kernel=model)
    return beam.backproject(s)


def fbp_parallel(sinogram, *, angles_deg, pixel_mm: float, shape, det_mm: float | None = None,
                 filter_name: str = "ramp") -> np.ndarray:
    """Filtered backprojection of a parallel-beam sinogram over any arc up to 180 degrees.

    Parameters
    ----------
    sinogram : (n_views, n_det) array_like
        Line integrals (unitless).
    angles_deg : (n_views,) array_like
    pixel_mm : float
        Pixel side of the reconstruction, mm.
    shape : (ny, nx)
    det_mm : float, optional
        Bin pitch, mm; default ``pixel_mm``.
    filter_name : {"ramp", "shepp-logan", "cosine", "hamming", "hann"}

    Returns
    -------
    (ny, nx) ndarray, 1/mm

    Notes
    -----
    ``f(x, y) = sum_i w_i Q_i(x cos theta_i + y sin theta_i)`` with ``Q_i`` the filtered
    projection (:func:`ramp_filter`) read by linear interpolation, and ``w_i`` the
    angular interval of view ``i`` (:func:`angular_weights_rad`; ``pi / N`` for ``N``
    views evenly over 180 degrees). Over a limited arc nothing is filled in: the result
    is the limited-angle FBP with its streaks.

    References
    ----------
    .. [1] Kak & Slaney, "Principles of Computerized Tomographic Imaging", IEEE Press
           1988, section 3.3.
    """
    angles = check_angles(angles_deg)
    s = check_sinogram(sinogram, len(angles))
    det = pixel_mm if det_mm is None else det_mm
    q = ramp_filter(s, det_mm=det, filter_name=filter_name)
    q *= angular_weights_rad(angles)[:, None]
    return ParallelBeam(shape=shape, pixel_mm=pixel_mm, angles_deg=angles, n_det=s.shape[1],
                        det_mm=det, kernel="linear").backproject(q)


def sirt_parallel(sinogram, *, angles_deg, pixel_mm: float, shape, det_mm: float | None = None,
                  n_iter: int = 100, relaxation: float = 1.0, rtol: float = 1e-4,
                  nonnegative: bool = False, model: str = "cubic"):
    """SIRT with a matched projector pair (:class:`ParallelBeam`, kernel ``model``).

    Returns ``(image, history)``: the image (1/mm) and ``history[k] = |b - A x_k| / |b|``,
    the relative residual before update ``k`` (``x_0 = 0``, so ``history[0] = 1``).

    Notes
    -----
    ``x <- x + lambda C A^T R (b - A x)`` with ``R = 1 / (A 1)`` (inverse row sums, i.e.
    path lengths) and ``C = 1 / (A^T 1)`` (inverse column sums): the normalisation of SART
    (Andersen & Kak 1984), applied to all views at once rather than view by view.
    Converges for ``0 < lambda < 2`` (Jiang & Wang 2003); ``nonnegative`` clips at zero
    after each update. Stopping rule: ``n_iter`` updates, or fewer when the relative
    residual falls by less than ``rtol`` (relative) from one iteration to the next.

    References
    ----------
    .. [1] Andersen & Kak, "Simultaneous algebraic reconstruction technique (SART)",
           Ultrasonic Imaging 6, 1984.
    .. [2] Jiang & Wang, "Convergence of the simultaneous algebraic reconstruction
           technique (SART)", IEEE Trans Image Process 12, 2003.
    """
    angles = check_angles(angles_deg)
    b = check_sinogram(sinogram, len(angles))
    beam = ParallelBeam(shape=shape, pixel_mm=pixel_mm, angles_deg=angles, n_det=b.shape[1],
                        det_mm=det_mm, kernel=model)
    return sirt_iterate(beam, b, n_iter=n_iter, relaxation=relaxation, rtol=rtol,
                        nonnegative=nonnegative)


def sirt_iterate(beam, b, *, n_iter: int, relaxation: float, rtol: float,
                 nonnegative: bool):
    """The SIRT loop of :func:`sirt_parallel` for any matched pair.

    ``beam`` has ``shape``, ``project(image)`` and ``backproject(sinogram)``, the exact
    transpose of ``project`` (:class:`ParallelBeam`, :class:`~qa.simulate.fan2d.FanBeam`);
    ``b`` is its sinogram. Returns ``(image, history)`` as :func:`sirt_parallel`.
    """
    if not 0 < relaxation < 2 or int(n_iter) < 1:
        raise InputError(f"SIRT needs 0 < relaxation < 2 and n_iter >= 1, got {relaxation!r}, "
                         f"{n_iter!r}", field="relaxation")
    rows, cols = beam.project(np.ones(beam.shape)), beam.backproject(np.ones(b.shape))
    r = np.divide(1.0, rows, out=np.zeros_like(rows), where=rows > 1e-12 * rows.max())
    c = np.divide(relaxation, cols, out=np.zeros_like(cols), where=cols > 1e-12 * cols.max())
    x = np.zeros(beam.shape)
    norm_b = float(np.linalg.norm(b)) or 1.0
    history = []
    for _ in range(int(n_iter)):
        residual = b - beam.project(x)
        history.append(float(np.linalg.norm(residual)) / norm_b)
        if len(history) > 1 and history[-2] - history[-1] < rtol * history[-2]:
            break
        x += c * beam.backproject(r * residual)
        if nonnegative:
            np.maximum(x, 0.0, out=x)
    return x, np.asarray(history)


@functools.wraps(sirt_parallel)
def _sirt_image(sinogram, **options):
    return sirt_parallel(sinogram, **options)[0]


#: Reconstruction methods for 2D parallel-beam sections: name -> function returning the
#: image. A new method is one entry here.
SECTION_METHODS = {"fbp": fbp_parallel, "sirt": _sirt_image}


def reconstruct_section(sinogram, *, angles_deg, pixel_mm: float, shape, method: str = "fbp",
                        **options) -> np.ndarray:
    """Reconstruct a parallel-beam section with a method of :data:`SECTION_METHODS`.

    Parameters
    ----------
    sinogram : (n_views, n_det) array_like
    angles_deg : (n_views,) array_like
    pixel_mm : float
    shape : (ny, nx)
    method : {"fbp", "sirt"}
    **options
        Keywords of the method (:func:`fbp_parallel`, :func:`sirt_parallel`).

    Raises
    ------
    InputError
        For an unknown method or an option the method does not take.
    """
    if method not in SECTION_METHODS:
        raise InputError(f"unknown reconstruction method '{method}'; expected one of "
                         f"{', '.join(SECTION_METHODS)}", field="method")
    function = SECTION_METHODS[method]
    allowed = set(inspect.signature(function).parameters) - {"sinogram"}
    unknown = sorted(set(options) - allowed)
    if unknown:
        raise InputError(f"method '{method}' takes no option {', '.join(unknown)}; "
                         f"it takes {', '.join(sorted(allowed))}", field=unknown[0])
    return function(sinogram, angles_deg=angles_deg, pixel_mm=pixel_mm, shape=shape, **options)
