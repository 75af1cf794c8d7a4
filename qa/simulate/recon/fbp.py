"""Filtered backprojection for DBT.

Each projection row is filtered along the direction of source travel with a ramp,
a spectral apodisation window and a slice-thickness filter, then backprojected with the
same separable plane-to-detector mapping as shift-and-add. The filter design follows
Mertelmeier, Orman, Haerer & Dudam, "Optimizing filtered backprojection reconstruction
for a breast tomosynthesis prototype device", Proc. SPIE 6142 (2006); the ramp is the
band-limited spatial ramp of Kak & Slaney, Principles of Computerized Tomographic
Imaging (IEEE Press, 1988), eq. 3.61, which avoids the DC error of a sampled |f|.
"""

from __future__ import annotations

import numpy as np

from ..acquire import Projections
from . import register
from .grid import ReconGrid, plane_taps, sample
from .planes import by_plane


def ramp_kernel_response(n_pad: int, pitch_mm: float) -> np.ndarray:
    """Frequency response of the band-limited spatial ramp (Kak & Slaney eq. 3.61)."""
    n = np.concatenate([np.arange(0, n_pad // 2 + 1), np.arange(-(n_pad // 2) + 1, 0)])
    h = np.zeros(n_pad)
    h[0] = 1.0 / (4.0 * pitch_mm ** 2)
    odd = n % 2 == 1
    h[odd] = -1.0 / (np.pi * n[odd] * pitch_mm) ** 2
    return np.real(np.fft.fft(h)) * pitch_mm


def dbt_filter(n_pad: int, pitch_mm: float, *, apodisation_cutoff: float = 1.0,
               slice_thickness_cutoff: float = 0.5, ramp_floor: float = 0.05) -> np.ndarray:
    """The combined filter along u, sampled at the FFT frequencies of ``n_pad`` points.

    Parameters
    ----------
    apodisation_cutoff : float
        Cut-off of the Hann spectral apodisation, as a fraction of Nyquist.
    slice_thickness_cutoff : float
        Cut-off of the Hann slice-thickness filter as a fraction of Nyquist (1: off).
    ramp_floor : float
        The ramp is not allowed below this fraction of its value at Nyquist (0: a
        pure ramp, which removes each plane's mean and the contrast of large objects;
        0.05, the default, keeps part of the low frequencies, as the spectral shaping of Mertelmeier
        et al. 2006 does).
    """
    f = np.abs(np.fft.fftfreq(n_pad, d=pitch_mm))
    nyq = 0.5 / pitch_mm
    ramp = ramp_kernel_response(n_pad, pitch_mm)

    def hann(cut):
        fc = cut * nyq
        return np.where(f < fc, 0.5 * (1.0 + np.cos(np.pi * f / fc)), 0.0)

    window = hann(apodisation_cutoff) * (hann(slice_thickness_cutoff)
                                         if slice_thickness_cutoff < 1.0 else 1.0)
    return np.maximum(ramp, ramp_floor * nyq) * window


@register("fbp", "filtered backprojection (floored ramp, Hann apodisation, slice-thickness filter)")
def filtered_backprojection(projections: Projections, grid: ReconGrid, *,
                            apodisation_cutoff: float = 1.0,
                            slice_thickness_cutoff: float = 0.5,
                            ramp_floor: float = 0.05) -> np.ndarray:
    """FBP; values approximate attenuation (1/mm) with the angular step of the arc.

    Notes
    -----
    ``f(x, y, z) = Δθ Σ_i q_i(u_i, v_i)`` with ``q_i`` the filtered projection and
    ``Δθ`` the angular step in radians, the discrete form of the parallel-beam
    inversion formula. Over a limited arc the result lacks the low frequencies that
    the arc does not sample, so it is not a quantitative attenuation map.
    """
    g = projections.geometry
    cols_n = g.detector.columns
    n_pad = 1 << int(np.ceil(np.log2(2 * cols_n)))
    h = dbt_filter(n_pad, g.detector.pitch_mm, apodisation_cutoff=apodisation_cutoff,
                   slice_thickness_cutoff=slice_thickness_cutoff, ramp_floor=ramp_floor)
    spec = np.fft.rfft(projections.data, n=n_pad, axis=2)
    filtered = np.fft.irfft(spec * h[: n_pad // 2 + 1], n=n_pad, axis=2)[:, :, :cols_n]
    d_theta = np.radians((max(g.angles_deg) - min(g.angles_deg)) / max(g.n_views - 1, 1))
    sources = g.nominal_sources()

    def plane(z: float) -> np.ndarray:
        acc = np.zeros(grid.shape[1:])
        for i, src in enumerate(sources):
            cols, rows = plane_taps(src, z, grid, g.detector)
            acc += sample(filtered[i], cols, rows)
        return d_theta * acc

    return by_plane(plane, grid)
