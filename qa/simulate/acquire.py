"""Simulated DBT projections: exact line integrals, detector aperture, source blur, noise.

For each view the detector signal of a pixel is the mean over its sub-rays (the square
pixel aperture sampled ``aperture_samples``² times, each source sub-position across the
focal spot and along the sweep of continuous motion) of ``exp(-∫mu dl)``. Quantum noise
is Poisson in the detected quanta, electronic noise Gaussian; the projection returned is
the log-normalised ``-ln(N / N0)``.
"""

from __future__ import annotations

from dataclasses import dataclass

from concurrent.futures import ThreadPoolExecutor

import numpy as np

from ..parallel import workers

from ..phantom.model import Phantom
from .geometry import DbtGeometry
from .raytrace import line_integrals


@dataclass(frozen=True)
class Projections:
    """Log-normalised projections ``(views, rows, columns)`` with their geometry."""

    data: np.ndarray
    geometry: DbtGeometry
    seed: int | None = None

    def __post_init__(self):
        arr = np.asarray(self.data, dtype=np.float32)
        if arr.ndim != 3 or arr.shape[0] != self.geometry.n_views \
                or arr.shape[1:] != self.geometry.detector.shape:
            raise ValueError(f"projections of shape {arr.shape} do not fit geometry "
                             f"{self.geometry.name} ({self.geometry.n_views} views, "
                             f"detector {self.geometry.detector.shape})")
        arr.flags.writeable = False
        object.__setattr__(self, "data", arr)


def _sub_offsets(n: int, width: float) -> np.ndarray:
    return width * ((np.arange(n) + 0.5) / n - 0.5)


def transmission(phantom: Phantom, geometry: DbtGeometry, view: int) -> np.ndarray:
    """Expected fraction of quanta reaching each pixel in one view, (rows, columns).

    The pixel aperture is integrated over ``aperture_samples``² sub-rays for every solid
    but the background, whose line integral is taken at the pixel centre: inside the
    slab it varies linearly across a pixel (by ~1e-4 of itself at 0.1 mm pixels), so the
    mean of ``exp(-p)`` over the aperture is ``exp(-p_bg(centre))`` times the mean over
    the sub-rays of the other solids, to second order. Only the background's own outer
    edges, which lie outside the reconstructed field, are not integrated.
    """
    det = geometry.detector
    n = geometry.aperture_samples
    offs = _sub_offsets(n, det.pitch_mm * det.fill_factor)
    u = (det.u_mm()[:, None] + offs[None, :]).ravel()
    v = (det.v_mm()[:, None] + offs[None, :]).ravel()
    terms = phantom.attenuating()
    bg = [(o, d) for o, d in terms if o.role == "background"]
    inserts = [(o, d) for o, d in terms if o.role != "background"]
    sources, weights = geometry.source_samples(view)
    total = np.zeros(det.shape)
    for src, w in zip(sources, weights):
        t = np.exp(-line_integrals(phantom, src, u, v, terms=inserts))
        t = t.reshape(det.rows, n, det.columns, n).mean(axis=(1, 3))
        if bg:
            t *= np.exp(-line_integrals(phantom, src, det.u_mm(), det.v_mm(), terms=bg))
        total += w * t
    return total


def expected_transmissions(phantom: Phantom, geometry: DbtGeometry, *,
                           progress: bool = False) -> np.ndarray:
    """Expected transmission of every view, ``(views, rows, columns)`` float32.

    This is the expensive, noiseless part of a simulation; :func:`detect` turns it into
    projections, so several exposures of one phantom (other seeds, doses or detector
    states) need it only once.
    """
    out = np.empty((geometry.n_views,) + geometry.detector.shape, dtype=np.float32)

    def one_view(i: int) -> None:
        out[i] = transmission(phantom, geometry, i)

    with ThreadPoolExecutor(max_workers=workers()) as pool:
        jobs = pool.map(one_view, range(geometry.n_views))
        if progress:
            from tqdm import tqdm
            jobs = tqdm(jobs, total=geometry.n_views, desc="projections", unit="view",
                        leave=False)
        for _ in jobs:
            pass
    return out


def detect(transmissions: np.ndarray, geometry: DbtGeometry, *, seed: int | None = 0,
           noise: bool = True) -> Projections:
    """Detected, log-normalised projections from expected transmissions.

    Notes
    -----
    With ``N0 = photons_per_pixel`` the absorbed quanta are ``Poisson(N0 T)``; the
    detector then spreads each pixel's signal by a Gaussian of SD
    ``detector.blur_sd_mm`` (light spread in a scintillator, which blurs the noise too)
    and adds ``Normal(0, electronic_sd)``. The signal is clipped below at 0.5 quanta so
    the logarithm stays finite, and ``-ln(N / N0)`` is returned. Without blur the
    variance of ``-ln(N/N0)`` is close to ``1 / (N0 T)`` for large counts (first-order
    error propagation, common practice). Noiseless projections are ``-ln`` of the
    (blurred) expected transmission.
    """
    from scipy.ndimage import gaussian_filter

    n0 = geometry.photons_per_pixel
    noisy = noise and n0 is not None
    blur_px = geometry.detector.blur_sd_mm / geometry.detector.pitch_mm
    # One independent stream per view: the result does not depend on thread scheduling.
    streams = np.random.SeedSequence(seed).spawn(geometry.n_views)
    out = np.empty(transmissions.shape, dtype=np.float32)

    def one_view(i: int) -> None:
        t = transmissions[i].astype(np.float64)
        if not noisy:
            if blur_px > 0:
                t = gaussian_filter(t, blur_px, mode="nearest")
            out[i] = -np.log(np.maximum(t, 1e-300))
            return
        rng = np.random.default_rng(streams[i])
        counts = rng.poisson(n0 * t).astype(np.float64)
        if blur_px > 0:
            counts = gaussian_filter(counts, blur_px, mode="nearest")
        if geometry.electronic_sd > 0:
            counts += rng.normal(0.0, geometry.electronic_sd, size=counts.shape)
        out[i] = -np.log(np.maximum(counts, 0.5) / n0)

    with ThreadPoolExecutor(max_workers=workers()) as pool:
        list(pool.map(one_view, range(geometry.n_views)))
    return Projections(out, geometry, seed if noisy else None)


def simulate_projections(phantom: Phantom, geometry: DbtGeometry, *, seed: int | None = 0,
                         noise: bool = True, progress: bool = False) -> Projections:
    """Simulate every view of a DBT acquisition of ``phantom``.

    Parameters
    ----------
    phantom : Phantom
    geometry : DbtGeometry
    seed : int or None
        Seed of the noise generator (results are reproducible for a given seed).
    noise : bool
        Add quantum and electronic noise when the geometry states a photon count.
    progress : bool
        Show a progress bar (tqdm) over the views.

    Returns
    -------
    Projections
        ``-ln(N / N0)`` per pixel, see :func:`detect`.
    """
    return detect(expected_transmissions(phantom, geometry, progress=progress), geometry,
                  seed=seed, noise=noise)
