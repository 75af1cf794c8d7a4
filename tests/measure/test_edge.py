"""Slanted-edge presampled MTF (qa.analysis.edge) against closed-form edges.

Outside check: an edge blurred by a Gaussian of SD sigma and integrated over square pixels
of pitch a has the presampled MTF exp(-2 pi^2 sigma^2 f^2) |sinc(a f)| (Gaussian transfer
times the square-aperture transfer, both closed form; the square aperture alone gives
sinc(1/2) = 2/pi at Nyquist). Samei, Flynn & Reimann, Med Phys 25 (1998) and
IEC 62220-1-1:2015 define the presampled MTF measured here. The edge images below are built
independently of the code under test: the value of each pixel is the exact integral of
the blurred step over the pixel square (error function, integrated twice in closed form).
"""

import numpy as np
import pytest
from scipy.optimize import brentq, minimize_scalar
from scipy.special import ndtr

from qa.analysis.edge import edge_mtf, first_crossing
from qa.errors import InputError, NotMeasurable

PITCH_MM = 0.1


def _twice_integrated_step(u, sigma):
    """F with F'' = Phi(u / sigma): sigma^2 ((t^2 + 1) Phi(t) + t phi(t)) / 2, t = u / sigma."""
    if sigma == 0:
        return 0.5 * np.maximum(u, 0.0) ** 2
    t = u / sigma
    phi = np.exp(-0.5 * t * t) / np.sqrt(2 * np.pi)
    return 0.5 * sigma ** 2 * ((t * t + 1) * ndtr(t) + t * phi)


def edge_image(n_rows, n_cols, angle_deg, sigma_px, centre=None, boost_px2=0.0):
    """Pixel means of E(d) = Phi(d / sigma) - c g'(d), d the signed distance (pixels) from a
    line through ``centre`` (row, col) at ``angle_deg`` from axis 0; bright on the
    high-column side. g is the Gaussian density of SD sigma and c = boost / (4 pi^2), so
    the LSF g - c g'' has the transfer (1 + boost f^2) exp(-2 pi^2 sigma^2 f^2) (f in
    cycles/pixel; the Fourier transform of g'' is -(2 pi f)^2 G): an edge-enhancing
    response rising above 1 before it falls, as a reconstruction filter gives.

    The double integral of E(A x + B y + C) over a square is the mixed second difference
    of F at its corners divided by A B, F'' = E (exact; needs angle_deg != 0); the
    enhancing term has F = -c Phi(d / sigma), since the double integral of g' is Phi.
    """
    th = np.radians(angle_deg)
    a, b = np.cos(th), -np.sin(th)
    yc, xc = centre if centre is not None else ((n_rows - 1) / 2, (n_cols - 1) / 2)
    y = np.arange(n_rows)[:, None] - yc
    x = np.arange(n_cols)[None, :] - xc

    def f(dx, dy):
        u = a * (x + dx) + b * (y + dy)
        enhance = boost_px2 / (4 * np.pi ** 2) * ndtr(u / sigma_px) if boost_px2 else 0.0
        return _twice_integrated_step(u, sigma_px) - enhance

    return (f(.5, .5) - f(.5, -.5) - f(-.5, .5) + f(-.5, -.5)) / (a * b)


def closed_form(f_cyc_per_px, sigma_px, boost_px2=0.0, angle_deg=None):
    """Presampled MTF of ``edge_image``: the blur's transfer times the square pixel's,
    |sinc(f)| (or, along the normal of an edge at ``angle_deg``, its exact form
    |sinc(f cos t) sinc(f sin t)|: the square projected on the normal is the
    convolution of two rectangles of widths cos t and sin t)."""
    f = f_cyc_per_px
    if angle_deg is None:
        aperture = np.abs(np.sinc(f))
    else:
        t = np.radians(angle_deg)
        aperture = np.abs(np.sinc(f * np.cos(t)) * np.sinc(f * np.sin(t)))
    return (1 + boost_px2 * f ** 2) * np.exp(-2 * np.pi ** 2 * sigma_px ** 2 * f ** 2) * aperture


def closed_form_crossing_per_mm(level, sigma_px):
    f = brentq(lambda v: closed_form(v, sigma_px) - level, 1e-6, 0.999)
    return f / PITCH_MM


def test_edge_image_matches_brute_force_supersampling():
    # The generator itself, checked against 64 x 64 point sampling of each pixel: the
    # point sampling is good to about 1/64 of a pixel's area where the edge crosses it.
    ss, n, ang = 64, 12, 5.0
    th = np.radians(ang)
    t = (np.arange(n * ss) + 0.5) / ss - 0.5
    u = np.cos(th) * (t[None, :] - 5.7) - np.sin(th) * (t[:, None] - 5.3)
    for sigma, boost in ((0.0, 0.0), (0.8, 0.0), (1.5, 200.0)):
        brute = (u > 0).astype(float) if sigma == 0 else ndtr(u / sigma)
        if boost:   # - c g'(u) = c u / sigma^2 g(u), g the Gaussian density of SD sigma
            g = np.exp(-0.5 * (u / sigma) ** 2) / (sigma * np.sqrt(2 * np.pi))
            brute = brute + boost / (4 * np.pi ** 2) * u / sigma ** 2 * g
        brute = brute.reshape(n, ss, n, ss).mean(axis=(1, 3))
        exact = edge_image(n, n, ang, sigma, centre=(5.3, 5.7), boost_px2=boost)
        assert np.max(np.abs(exact - brute)) < 2e-3


@pytest.mark.parametrize("angle_deg", [1.5, 3.0, 5.0, 8.0])
@pytest.mark.parametrize("sigma_px", [0.5, 1.0, 2.0])
def test_gaussian_edge_matches_closed_form(angle_deg, sigma_px):
    img = 10.0 + 100.0 * edge_image(120, 64, angle_deg, sigma_px)
    res = edge_mtf(img, pitch_mm=PITCH_MM)
    f_px = res.frequency_per_mm * PITCH_MM
    upto = f_px <= 0.5 + 1e-9
    # Tolerance 0.02 (brief): the measured curve follows the edge normal, which adds
    # |sinc(a f sin(angle))| >= 0.997 at Nyquist for 8 deg; the rest is method error.
    assert np.max(np.abs(res.mtf[upto] - closed_form(f_px[upto], sigma_px))) < 0.02
    assert upto.sum() >= 65 and f_px[upto][-1] == pytest.approx(0.5)
    # MTF50 within 3 % (brief); MTF10 held to the same.
    assert res.mtf50_per_mm == pytest.approx(closed_form_crossing_per_mm(0.5, sigma_px), rel=0.03)
    assert res.mtf10_per_mm == pytest.approx(closed_form_crossing_per_mm(0.1, sigma_px), rel=0.03)
    assert res.angle_deg == pytest.approx(angle_deg, abs=0.01)
    assert res.mtf[0] == pytest.approx(1.0)


@pytest.mark.parametrize("angle_deg", [2.0, 5.0, -7.0])
def test_sharp_edge_gives_square_aperture_two_over_pi_at_nyquist(angle_deg):
    img = edge_image(120, 64, angle_deg, 0.0)
    res = edge_mtf(img, pitch_mm=PITCH_MM)
    nyquist = 0.5 / PITCH_MM
    # |sinc(1/2)| = 2/pi (closed form); tolerance 0.02 as for the curve above.
    assert np.interp(nyquist, res.frequency_per_mm, res.mtf) == pytest.approx(2 / np.pi, abs=0.02)
    # First zero of the aperture transfer is at 1/a; the curve must head there.
    assert np.interp(0.9 / PITCH_MM, res.frequency_per_mm, res.mtf) < 0.15


@pytest.mark.parametrize("profile_axis", [0, 1])
@pytest.mark.parametrize("tilt", [1, -1])
@pytest.mark.parametrize("polarity", [1, -1])
def test_orientation_tilt_and_polarity(profile_axis, tilt, polarity):
    sigma = 1.0
    img = edge_image(120, 64, tilt * 4.0, sigma)
    img = 50.0 + polarity * 40.0 * img          # polarity -1: bright-to-dark
    if profile_axis == 0:                       # edge nearly parallel to the rows
        img = img.T
    res = edge_mtf(img, pitch_mm=PITCH_MM, profile_axis=profile_axis)
    assert res.line.polarity == polarity
    assert abs(res.angle_deg) == pytest.approx(4.0, abs=0.01)
    # Same closed form and 3 % tolerance as above, whatever the orientation.
    assert res.mtf50_per_mm == pytest.approx(closed_form_crossing_per_mm(0.5, sigma), rel=0.03)
    assert np.all(np.diff(res.esf[::8]) >= -1e-9)   # the ESF is turned to rise


def test_finer_bins_give_the_same_curve():
    img = edge_image(160, 64, 3.0, 1.0)
    quarter = edge_mtf(img, pitch_mm=PITCH_MM, bin_fraction=0.25)
    eighth = edge_mtf(img, pitch_mm=PITCH_MM, bin_fraction=0.125)
    upto = quarter.frequency_per_mm <= 0.5 / PITCH_MM
    # Both estimate the same presampled MTF; tolerance as for the closed-form check.
    assert np.max(np.abs(quarter.mtf[upto] - eighth.mtf[upto])) < 0.02
    assert eighth.bin_mm == pytest.approx(PITCH_MM / 8)


def test_uncertainty_of_mtf50_covers_the_error_in_noisy_repeats():
    # 50 seeded repeats; step 100, noise SD 5 (contrast-to-noise 20 per pixel: the edge is
    # plainly measurable, MTF50 scatters by about 3 %). The stated standard uncertainty,
    # expanded with k = 2 (about 95 % for a normal error), must cover |error| against the
    # closed form in at least 90 % of repeats, and it must not be inflated: its RMS stays
    # within a factor 1.6 of the observed scatter (50 repeats pin an SD to about 10 %).
    sigma, truth = 1.0, closed_form_crossing_per_mm(0.5, 1.0)
    clean = 10.0 + 100.0 * edge_image(120, 64, 3.0, sigma)
    rng = np.random.default_rng(20240611)
    values, uncert = [], []
    for _ in range(50):
        res = edge_mtf(clean + rng.normal(0.0, 5.0, clean.shape), pitch_mm=PITCH_MM)
        values.append(res.mtf50_per_mm)
        uncert.append(res.mtf50_sd)
    err, u = np.asarray(values) - truth, np.asarray(uncert)
    assert np.all(u > 0)
    assert np.mean(np.abs(err) <= 2 * u) >= 0.90
    ratio = np.sqrt(np.mean(u ** 2)) / np.std(err, ddof=1)
    assert 1 / 1.6 < ratio < 1.6


def test_noise_free_edge_has_small_stated_uncertainty():
    res = edge_mtf(edge_image(120, 64, 3.0, 1.0), pitch_mm=PITCH_MM)
    assert res.n_segments == 16
    assert 0 <= res.mtf50_sd < 0.005 * res.mtf50_per_mm
    assert np.all(np.isfinite(res.mtf_sd))


def test_no_segments_gives_no_uncertainty():
    res = edge_mtf(edge_image(120, 64, 3.0, 1.0), pitch_mm=PITCH_MM, n_segments=0)
    assert np.isnan(res.mtf50_sd) and res.n_segments == 0


@pytest.mark.parametrize("make, message", [
    (lambda rng: np.full((120, 64), 7.0), "flat"),
    (lambda rng: 7.0 + rng.normal(0, 1, (120, 64)), "times the pixel noise"),
    (lambda rng: 100 * edge_image(120, 64, 4.0, 1.0) + rng.normal(0, 70, (120, 64)),
     "times the pixel noise"),
    (lambda rng: 100 * edge_image(120, 64, 4.0, 1.0) + rng.normal(0, 25, (120, 64)),
     "too noisy"),
    (lambda rng: edge_image(120, 64, 0.5, 1.0), "below 1 deg"),
    (lambda rng: edge_image(120, 64, 20.0, 1.0), "above 15 deg"),
    (lambda rng: edge_image(120, 120, 45.0, 1.0), "above 15 deg"),
    (lambda rng: edge_image(120, 64, 3.0, 1.0, centre=(59.5, 5.0)), "too close to the"),
    (lambda rng: edge_image(120, 64, 3.0, 1.0, centre=(59.5, 58.0)), "too close to the"),
    (lambda rng: edge_image(30, 64, 1.2, 1.0), "shifts only"),
    (lambda rng: edge_image(64, 120, 3.0, 1.0).T[:, :64], "rows"),
    (lambda rng: edge_image(8, 64, 3.0, 1.0), "too small"),
])
def test_unusable_regions_are_not_measurable(make, message):
    img = make(np.random.default_rng(7))
    with pytest.raises(NotMeasurable, match=message):
        edge_mtf(img, pitch_mm=PITCH_MM)


def test_bad_options_are_input_errors():
    img = edge_image(120, 64, 3.0, 1.0)
    with pytest.raises(InputError, match="bin_fraction"):
        edge_mtf(img, pitch_mm=PITCH_MM, bin_fraction=0.5)
    with pytest.raises(InputError, match="pitch_mm"):
        edge_mtf(img, pitch_mm=(0.1, -1.0))
    with pytest.raises(InputError, match="2D"):
        edge_mtf(img[None], pitch_mm=PITCH_MM)
    with pytest.raises(InputError, match="profile_axis"):
        edge_mtf(img, pitch_mm=PITCH_MM, profile_axis=2)


def test_first_crossing_interpolates_linearly():
    # Worked by hand: between (1, 0.6) and (2, 0.4) the level 0.5 is crossed at 1.5; a
    # later crossing does not count; a curve that never falls below gives nan.
    f = np.array([0.0, 1.0, 2.0, 3.0, 4.0])
    m = np.array([1.0, 0.6, 0.4, 0.7, 0.2])
    assert first_crossing(f, m, 0.5) == pytest.approx(1.5)
    assert first_crossing(f, m, 0.3) == pytest.approx(3.8)
    assert np.isnan(first_crossing(f, m, 0.1))


def test_first_crossing_from_a_start_index():
    # Worked by hand on a curve that rises to a peak at index 2 before it falls: from the
    # start the level 0.5 is already crossed between (0, 0.6) and (1, 0.4) at 0.5; from
    # the peak on, between (3, 0.8) and (4, 0.2) at 3.5. A start already below the level,
    # or a curve that stays above it, gives nan.
    f = np.array([0.0, 1.0, 2.0, 3.0, 4.0])
    m = np.array([0.6, 0.4, 1.0, 0.8, 0.2])
    assert first_crossing(f, m, 0.5) == pytest.approx(0.5)
    assert first_crossing(f, m, 0.5, start=2) == pytest.approx(3.5)
    assert np.isnan(first_crossing(f, m, 0.5, start=1))
    assert np.isnan(first_crossing(f, m, 0.1, start=2))


# Edge-enhanced response: sigma 1.5 px and boost 200 px^2 give a transfer that peaks near
# 2.0 at about 0.13 cycles/pixel (1.3 lp/mm at 0.1 mm), like the in-plane response of a
# filtered backprojection along its filter.
ENH_SIGMA_PX, ENH_BOOST_PX2 = 1.5, 200.0


def enhanced_closed_form(angle_deg):
    """Peak (value, cycles/mm) of the closed form over 0 to Nyquist, and the crossings
    after it of 0.5 and 0.1 of the curve divided by its peak (cycles/mm)."""
    def h(f):
        return closed_form(f, ENH_SIGMA_PX, ENH_BOOST_PX2, angle_deg)
    best = minimize_scalar(lambda f: -h(f), bounds=(0.01, 0.4), method="bounded",
                           options={"xatol": 1e-8})
    f_pk, peak = best.x, h(best.x)
    crossings = [brentq(lambda f: h(f) / peak - level, f_pk, 0.5) / PITCH_MM
                 for level in (0.5, 0.1)]
    return peak, f_pk / PITCH_MM, crossings


@pytest.mark.parametrize("angle_deg", [2.0, 5.0, -8.0])
def test_peak_normalisation_matches_closed_form_of_an_enhanced_edge(angle_deg):
    img = 10.0 + 100.0 * edge_image(120, 64, angle_deg, ENH_SIGMA_PX,
                                    boost_px2=ENH_BOOST_PX2)
    zero = edge_mtf(img, pitch_mm=PITCH_MM)
    peak = edge_mtf(img, pitch_mm=PITCH_MM, normalise="peak")
    h_peak, f_peak, (f50, f10) = enhanced_closed_form(angle_deg)
    f_px = zero.frequency_per_mm * PITCH_MM
    upto = f_px <= 0.5 + 1e-9
    truth = closed_form(f_px, ENH_SIGMA_PX, ENH_BOOST_PX2, angle_deg)
    # Normalised at f = 0 the curve follows the closed form (tolerance 0.02 as above; the
    # curve here rises to about 2, so 1 % of its peak) and peaks as it does: value within
    # 1 % (the sampled maximum lies below the true one by at most |H''| (df/2)^2 / 2, about
    # 0.1 % at the grid step df = 1/128 cycles/pixel), frequency within one grid step.
    assert np.max(np.abs(zero.mtf[upto] - truth[upto])) < 0.02
    assert zero.mtf[0] == pytest.approx(1.0) and zero.normalise == "zero"
    assert zero.peak == pytest.approx(h_peak, rel=0.01) and zero.edge_enhanced
    assert abs(zero.peak_frequency_per_mm - f_peak) <= 1 / (128 * PITCH_MM)
    # Divided by its maximum: the same curve over its peak, whose maximum is exactly 1.
    assert np.max(np.abs(peak.mtf[upto] - truth[upto] / h_peak)) < 0.02
    assert np.max(peak.mtf[upto]) == pytest.approx(1.0) and peak.peak == zero.peak
    # MTF50 and MTF10 after the peak, within 3 % (brief). Sought from f = 0 the crossing of
    # 0.5 would be lost: the peak-normalised curve starts at 1 / 2.0, below 0.5.
    assert peak.mtf50_per_mm == pytest.approx(f50, rel=0.03)
    assert peak.mtf10_per_mm == pytest.approx(f10, rel=0.03)
    assert peak.mtf[0] < 0.5 and np.isnan(first_crossing(peak.frequency_per_mm, peak.mtf, 0.5))
    # Normalised at f = 0 the crossings are those of the closed form itself.
    zero50 = brentq(lambda f: closed_form(f, ENH_SIGMA_PX, ENH_BOOST_PX2, angle_deg) - 0.5,
                    0.13, 0.5) / PITCH_MM
    assert zero.mtf50_per_mm == pytest.approx(zero50, rel=0.03)


def test_zero_normalisation_is_the_default_and_peak_changes_nothing_without_enhancement():
    img = 10.0 + 100.0 * edge_image(120, 64, 3.0, 1.0)
    default = edge_mtf(img, pitch_mm=PITCH_MM)
    zero = edge_mtf(img, pitch_mm=PITCH_MM, normalise="zero")
    peak = edge_mtf(img, pitch_mm=PITCH_MM, normalise="peak")
    for key in ("mtf", "mtf_sd"):
        assert np.array_equal(getattr(default, key), getattr(zero, key))
    assert default.normalise == "zero" and default.mtf50_per_mm == zero.mtf50_per_mm
    # A Gaussian blur times a sinc falls from f = 0 on (closed form), so its maximum is
    # at f = 0 and the two normalisations agree to rounding.
    assert default.peak == pytest.approx(1.0) and default.peak_frequency_per_mm == 0.0
    assert not default.edge_enhanced
    assert np.allclose(peak.mtf, zero.mtf, rtol=0, atol=1e-12)
    assert peak.mtf50_per_mm == pytest.approx(zero.mtf50_per_mm, abs=1e-12)
    assert peak.mtf50_sd == pytest.approx(zero.mtf50_sd, rel=1e-9)


def test_uncertainty_of_peak_normalised_crossings_covers_the_error_in_noisy_repeats():
    # As for the f = 0 normalisation above (50 seeded repeats, step 100, noise SD 5, k = 2
    # covering at least 90 %, RMS of the stated uncertainty within a factor 1.6 of the
    # observed scatter), for MTF50 and MTF10 after the peak and the peak itself: each
    # jackknife replicate is divided by its own maximum, so the peak's uncertainty is in.
    h_peak, _, (f50, f10) = enhanced_closed_form(3.0)
    clean = 10.0 + 100.0 * edge_image(120, 64, 3.0, ENH_SIGMA_PX, boost_px2=ENH_BOOST_PX2)
    rng = np.random.default_rng(20240612)
    got = {"mtf50": [], "mtf10": [], "peak": []}
    for _ in range(50):
        res = edge_mtf(clean + rng.normal(0.0, 5.0, clean.shape), pitch_mm=PITCH_MM,
                       normalise="peak")
        got["mtf50"].append((res.mtf50_per_mm, res.mtf50_sd))
        got["mtf10"].append((res.mtf10_per_mm, res.mtf10_sd))
        got["peak"].append((res.peak, res.peak_sd))
    for key, truth in (("mtf50", f50), ("mtf10", f10), ("peak", h_peak)):
        v, u = np.asarray(got[key]).T
        err = v - truth
        assert np.all(u > 0)
        assert np.mean(np.abs(err) <= 2 * u) >= 0.90
        ratio = np.sqrt(np.mean(u ** 2)) / np.std(err, ddof=1)
        assert 1 / 1.6 < ratio < 1.6


def test_unknown_normalisation_is_an_input_error():
    with pytest.raises(InputError, match="normalise must be 'zero' or 'peak', got 'max'") as info:
        edge_mtf(edge_image(120, 64, 3.0, 1.0), pitch_mm=PITCH_MM, normalise="max")
    assert info.value.field == "normalise"
