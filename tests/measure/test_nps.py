"""Tests of qa.analysis.nps against closed-form results (Parseval, white noise)."""

import numpy as np
import pytest

from qa.analysis.nps import (nps_2d, nps_cut, nps_radial, polynomial_trend,
                             resample_periodic, tile_rois)
from qa.errors import NotMeasurable

SPACING = (0.1, 0.15)   # (dy, dx) mm; unequal on purpose so the axes cannot be swapped


def white_plane(sigma, shape=(256, 384), seed=1):
    return np.random.default_rng(seed).normal(50.0, sigma, shape)


def test_white_noise_nps_integrates_to_variance():
    # Parseval / IEC 62220-1-1 normalisation: sum(NPS) du dv = variance of the ROIs.
    sigma = 2.0
    spec = nps_2d(white_plane(sigma), spacing_mm=SPACING, roi_px=64)
    # Within 3 % of the true variance (the brief's tolerance); the sampling SD of a
    # variance from ~98,000 pixels is about sqrt(2/N) = 0.5 %, far inside it.
    assert spec.variance == pytest.approx(sigma ** 2, rel=0.03)


def test_white_noise_nps_is_flat_at_sigma2_dx_dy():
    # Closed form: white noise of variance s^2 has NPS = s^2 dx dy at every frequency.
    sigma = 2.0
    spec = nps_2d(white_plane(sigma), spacing_mm=SPACING, roi_px=64)
    level = sigma ** 2 * SPACING[0] * SPACING[1]
    for axis in ("x", "y"):
        f, values, sem = nps_cut(spec, axis=axis)
        nyquist = 0.5 / (SPACING[1] if axis == "x" else SPACING[0])
        # Off-axis lines start at one step across the axis, so the first bins (radial
        # frequency below that step) stay empty; the cut runs up to the Nyquist frequency.
        assert 0.0 < f[0] <= 0.5 / (SPACING[0] if axis == "x" else SPACING[1]) / 32 * 1.5
        assert f[-1] == pytest.approx(nyquist)
        # Mean over all bins: within 3 % of the level (averaged over thousands of values).
        assert values.mean() == pytest.approx(level, rel=0.03)
        # Every bin within 5 of its own standard errors: flat, no shape (5 SE so that
        # none of ~33 bins fails by chance, p < 1e-5 each).
        assert np.all(np.abs(values - level) < 5 * sem)
    f_r, radial = nps_radial(spec)
    # Full annuli only, and from 3 ROI frequency steps up: the area-wide quadratic takes
    # 6 degrees of freedom from ~24 independent ROI areas, which lowers the ROI means'
    # power (the lowest bins) by about 6/24 = 25 %, a known property of the method.
    band = (f_r <= 0.5 / max(SPACING)) & (f_r >= 3 / (64 * SPACING[0]))
    # Each annulus holds >= 30 values x 35 ROIs: 10 % is over 4 standard errors.
    assert band.sum() > 15
    assert np.allclose(radial[band], level, rtol=0.10)


def test_cosine_power_sits_at_its_frequency_and_sums_to_half_amplitude_squared():
    # Closed form: a cosine of amplitude A has mean square A^2/2, all at +-f0.
    ny, nx, amp, cycles = 128, 128, 3.0, 10
    x = np.arange(nx) * SPACING[1]
    f0 = cycles / (64 * SPACING[1])     # 10 cycles per 64-px ROI: on the DFT grid
    plane = np.tile(amp * np.cos(2 * np.pi * f0 * x), (ny, 1))
    spec = nps_2d(plane, spacing_mm=SPACING, roi_px=64, detrend_order=0)
    assert spec.variance == pytest.approx(amp ** 2 / 2, rel=1e-9)   # exact up to rounding
    peak = np.unravel_index(np.argmax(spec.nps), spec.nps.shape)
    assert peak[0] == 0 and abs(spec.freq_x_per_mm[peak[1]]) == pytest.approx(f0)


def test_second_order_detrending_removes_a_quadratic_trend():
    sigma = 1.0
    ny, nx = 256, 256
    yy, xx = np.mgrid[0:ny, 0:nx] / 256.0
    trend = 40.0 * (xx - 0.3) ** 2 + 25.0 * xx * yy - 30.0 * yy
    plane = white_plane(sigma, (ny, nx), seed=3) + trend
    detrended = nps_2d(plane, spacing_mm=SPACING, roi_px=64, detrend_order=2)
    assert detrended.variance == pytest.approx(sigma ** 2, rel=0.03)   # as above
    raw = nps_2d(plane, spacing_mm=SPACING, roi_px=64, detrend_order=0)
    assert raw.variance > 5 * sigma ** 2    # the trend dominates without detrending


def test_polynomial_trend_reproduces_an_exact_quadratic():
    yy, xx = np.mgrid[0:40, 0:50].astype(float)
    surface = 2.0 + 0.5 * xx - 0.25 * yy + 0.01 * xx * yy + 0.003 * yy ** 2
    # A degree-2 fit of a degree-2 surface is exact (rounding only: 1e-9).
    assert np.allclose(polynomial_trend(surface, order=2), surface, atol=1e-9)


def test_tile_rois_counts_and_stays_inside_the_mask():
    mask = np.zeros((200, 300), bool)
    mask[10:138, 20:212] = True        # 128 x 192 px
    corners = tile_rois(mask, roi_px=64, overlap=0.5)
    # Arithmetic: steps of 32 px give 3 rows x 5 columns of ROIs.
    assert len(corners) == 15
    yy, xx = np.mgrid[0:400, 0:400]
    disk = np.hypot(yy - 200, xx - 200) <= 150
    for iy, ix in tile_rois(disk, roi_px=64, overlap=0.5):
        assert disk[iy:iy + 64, ix:ix + 64].all()


def test_no_roi_fits_is_not_measurable():
    with pytest.raises(NotMeasurable, match="no ROI of 64 x 64 px fits"):
        nps_2d(np.zeros((40, 40)), spacing_mm=SPACING, roi_px=64)


def test_resampling_keeps_flat_spectra_and_grid_points():
    flat = np.full((32, 48), 7.0)
    assert np.allclose(resample_periodic(flat, SPACING, (128, 96)), 7.0)
    rng = np.random.default_rng(5)
    spectrum = rng.random((32, 48))
    same = resample_periodic(spectrum, SPACING, (32, 48))
    assert np.array_equal(same, spectrum)
    # Doubling the grid puts every other target point on a source point (FFT order).
    fine = resample_periodic(spectrum, SPACING, (64, 96))
    assert np.allclose(fine[::2, ::2], spectrum)
