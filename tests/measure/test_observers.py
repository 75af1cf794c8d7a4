"""Tests of qa.analysis.observers against closed forms of the NPW observer (ICRU 54)."""

import math

import numpy as np
import pytest

from qa.analysis.nps import nps_2d
from qa.analysis.observers import (disk_signal, dprime_npw, dprime_npwe, eye_filter,
                                   radial_frequency, template_shape)
from qa.errors import InputError

SPACING = (0.1, 0.1)


def binary_disk(diameter_mm, contrast, spacing=SPACING, shape=(128, 128)):
    signal = disk_signal(diameter_mm=diameter_mm, contrast=contrast, spacing_mm=spacing,
                         shape=shape, supersample=1)
    return signal, int(np.count_nonzero(signal))


@pytest.mark.parametrize("spacing", [(0.1, 0.1), (0.1, 0.085)])
def test_npw_in_exact_white_noise_is_contrast_root_n_over_sigma(spacing):
    # Closed form (ICRU Report 54): d' = dC sqrt(N) / sigma for a disk of N pixels.
    contrast, sigma = 0.7, 2.5
    signal, n = binary_disk(3.0, contrast, spacing)
    nps = np.full(signal.shape, sigma ** 2 * spacing[0] * spacing[1])
    expected = contrast * math.sqrt(n) / sigma
    # An identity of the discrete sums: rounding only (1e-9).
    assert dprime_npw(signal, nps, spacing_mm=spacing) == pytest.approx(expected, rel=1e-9)


@pytest.mark.parametrize("diameter_mm", [1.0, 2.0, 4.0])
def test_npw_with_measured_nps_of_white_noise_within_5_percent(diameter_mm):
    contrast, sigma = 0.4, 1.5
    plane = np.random.default_rng(11).normal(0.0, sigma, (384, 384))
    spec = nps_2d(plane, spacing_mm=SPACING, roi_px=64)
    shape = template_shape(diameter_mm, SPACING, (64, 64))
    signal, n = binary_disk(diameter_mm, contrast, shape=shape)
    d = dprime_npw(signal, spec.on_grid(shape), spacing_mm=SPACING)
    # Brief's tolerance, 5 %: the measured NPS from 121 ROIs carries ~1-3 % noise at the
    # low frequencies a 4 mm disk weights.
    assert d == pytest.approx(contrast * math.sqrt(n) / sigma, rel=0.05)


def test_npwe_never_beats_npw_in_white_noise():
    # Cauchy-Schwarz: in white noise the matched filter (NPW) is the best linear template,
    # so any eye filter can only lower d' (equality only for E constant).
    signal, _ = binary_disk(2.0, 1.0)
    nps = np.full(signal.shape, 0.01)
    npw = dprime_npw(signal, nps, spacing_mm=SPACING)
    npwe = dprime_npwe(signal, nps, spacing_mm=SPACING)
    assert 0 < npwe < npw


def test_eye_filter_peaks_at_its_stated_frequency():
    distance = 500.0
    f_peak = 4.0 / (distance * math.tan(math.radians(1.0)))   # 4 cycles/degree in cycles/mm
    f = np.linspace(0.0, 3.0, 30001)
    e = eye_filter(f, viewing_distance_mm=distance)
    assert f[np.argmax(e)] == pytest.approx(f_peak, abs=2e-4)   # grid step 1e-4
    assert eye_filter(f_peak, viewing_distance_mm=distance) == pytest.approx(1.0, rel=1e-12)
    assert eye_filter(0.0) == 0.0


def test_dprime_scales_with_contrast_and_inverse_noise():
    signal, _ = binary_disk(2.0, 1.0)
    nps = np.full(signal.shape, 0.02)
    base = dprime_npwe(signal, nps, spacing_mm=SPACING)
    # d' is linear in the signal and inversely proportional to the noise amplitude.
    assert dprime_npwe(3 * signal, nps, spacing_mm=SPACING) == pytest.approx(3 * base)
    assert dprime_npwe(signal, 4 * nps, spacing_mm=SPACING) == pytest.approx(base / 2)


def test_supersampled_disk_has_the_disk_area():
    d, c = 2.3, 1.0
    signal = disk_signal(diameter_mm=d, contrast=c, spacing_mm=SPACING, shape=(64, 64),
                         supersample=8)
    area_px = math.pi * (d / 2) ** 2 / (SPACING[0] * SPACING[1])
    # Area weighting at 8 x 8 sub-samples: edge error well under 1 % of 415 px.
    assert signal.sum() == pytest.approx(area_px, rel=0.01)


def test_grid_mismatch_and_bad_inputs_are_refused():
    signal, _ = binary_disk(2.0, 1.0)
    with pytest.raises(InputError, match="must share one grid"):
        dprime_npw(signal, np.ones((64, 64)), spacing_mm=SPACING)
    with pytest.raises(InputError, match="no noise under the signal"):
        dprime_npw(signal, np.zeros(signal.shape), spacing_mm=SPACING)
    with pytest.raises(InputError, match="diameter must be positive"):
        disk_signal(diameter_mm=0.0, contrast=1.0, spacing_mm=SPACING, shape=(8, 8))
    assert radial_frequency((4, 4), SPACING)[0, 0] == 0.0
