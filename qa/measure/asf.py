"""Through-depth spread: the artefact spread function (ASF) of a small bead.

Wu, Moore, Rafferty et al., "A comparison of reconstruction algorithms for breast
tomosynthesis", Med. Phys. 31 (2004):
``ASF(z) = (mean_bead(z) - mean_bg(z)) / (mean_bead(z0) - mean_bg(z0))`` with ``z0`` the
in-focus plane. Reported: the FWHM of the ASF in mm, and the bead's height error
(measured in-focus height minus nominal) as geometric accuracy.

Validity. The bead is measured when its in-focus contrast is 5 times the noise of a
bead-sized region (:func:`asf_from_signals`). The FWHM asks more: the mean contrast of
the in-focus plane and its two neighbours must be ``MIN_FOCUS_SNR`` (10) times the noise
of that mean (:func:`focus_snr`). The FWHM's half-maximum crossings move with each
plane's noise, and the in-focus plane, the largest of many noisy contrasts, sets the
half-maximum level too high: in seeded simulations of a 6 mm Gaussian ASF (1 mm planes)
the FWHM came out 5 % low with a 10 % scatter at region SNR 11, and up to 73 % low at
region SNR 4-6, where the single-plane check alone still let 11 of 20 repeats through
(tests/measure/test_robustness.py). At a focus SNR of 10 the scatter is about 12 %.
"""

from __future__ import annotations

import numpy as np

from ..analysis.bead import bead_signals
from ..analysis.curves import half_max_width, peaks_and_widths, spline_peak
from ..errors import NotMeasurable
from .base import FamilyResult, Measurement, MetricFamily, MetricSpec, Roi, register

FAMILY = "asf"
N_DRAWS = 200  # Monte Carlo draws for the uncertainties (seeded)
#: The FWHM needs the mean contrast of the in-focus plane and its two neighbours to be at
#: least this many times the noise of that mean (module notes).
MIN_FOCUS_SNR = 10.0


def focus_snr(contrast: np.ndarray, roi_mean_sd: np.ndarray, k0: int) -> float:
    """Mean contrast of planes ``k0 - 1 .. k0 + 1`` over the SD of that mean.

    A detection statistic that the choice of ``k0`` as the largest of many noisy
    contrasts biases far less than the single plane's: the neighbours' noise is
    independent of that choice.
    """
    lo, hi = max(k0 - 1, 0), min(k0 + 2, len(contrast))
    sd = float(np.sqrt(np.sum(np.square(roi_mean_sd[lo:hi])))) / (hi - lo)
    mean = float(np.mean(contrast[lo:hi]))
    return mean / sd if sd > 0 else float("inf")


def asf_from_signals(sig):
    """ASF curve and in-focus index from :class:`~qa.analysis.bead.BeadSignals`."""
    contrast = sig.bead_mean - sig.bg_mean
    k0 = int(np.argmax(contrast))
    c0 = contrast[k0]
    if not c0 > 5.0 * sig.roi_mean_sd[k0]:
        raise NotMeasurable(f"bead contrast ({c0:.3g}) is below 5 times the noise of its "
                            f"region ({sig.roi_mean_sd[k0]:.3g})")
    return contrast / c0, contrast, k0


def measure_asf(volume, layout, settings=None) -> FamilyResult:
    beads = layout.with_role("bead")
    names = (("asf_fwhm", "mm"), ("bead_height_error", "mm"))
    if not beads:
        why = "the phantom has no bead"
        return FamilyResult(FAMILY, tuple(Measurement.missing(n, u, why) for n, u in names))
    bead = beads[0]
    if not bead.found:
        return FamilyResult(FAMILY, tuple(Measurement.missing(n, u, bead.note) for n, u in names))
    x, y, _ = bead.centre_xyz_mm
    try:
        sig = bead_signals(volume, (x, y), bead.obj.shape.half_xyz_mm[0])
        asf, contrast, k0 = asf_from_signals(sig)
    except NotMeasurable as exc:
        return FamilyResult(FAMILY, tuple(Measurement.missing(n, u, str(exc)) for n, u in names))
    z = sig.z_mm
    width = half_max_width(z, asf)
    z_peak, _ = spline_peak(z, contrast)
    nominal_z = bead.obj.shape.centre_xyz_mm[2]
    # Uncertainty: redraw each plane's contrast with the SD of a bead-sized background
    # mean and repeat the analysis (Monte Carlo propagation, seeded).
    rng = np.random.default_rng(20040501)
    draws = contrast[:, None] + rng.normal(0.0, 1.0, (len(z), N_DRAWS)) * sig.roi_mean_sd[:, None]
    peaks, _, widths, _, _ = peaks_and_widths(z, draws)
    widths = widths[np.isfinite(widths)]
    meas = []
    snr = focus_snr(contrast, sig.roi_mean_sd, k0)
    if width is not None and snr < MIN_FOCUS_SNR:
        meas.append(Measurement.missing(
            "asf_fwhm", "mm", f"the mean contrast around the in-focus plane is {snr:.1f} times "
            f"its noise, under the {MIN_FOCUS_SNR:g} a FWHM needs (too noisy)"))
    elif width is None:
        meas.append(Measurement.missing("asf_fwhm", "mm", "the ASF does not fall to half its "
                                        "maximum inside the volume"))
    else:
        meas.append(Measurement("asf_fwhm", width[0], "mm",
                                float(np.std(widths, ddof=1)) if len(widths) > 10 else None,
                                f"bead {bead.id}, in-focus plane z = {z_peak:.2f} mm"))
    meas.append(Measurement("bead_height_error", z_peak - nominal_z, "mm",
                            float(np.std(peaks, ddof=1)),
                            f"measured {z_peak:.2f} mm, nominal {nominal_z:.2f} mm"))
    rois = (Roi(f"bead {bead.id}", "circle", (x, y), (2 * sig.radius_mm,) * 2, float(z[k0])),
            Roi("ASF background", "box", (x, y - sig.strip_offset_mm),
                (float(sig.x_mm[-1] - sig.x_mm[0]), sig.strip_rows * volume.spacing_mm[1]),
                float(z[k0])),
            Roi("ASF background", "box", (x, y + sig.strip_offset_mm),
                (float(sig.x_mm[-1] - sig.x_mm[0]), sig.strip_rows * volume.spacing_mm[1]),
                float(z[k0])))
    plot = {"z_mm": z, "asf": asf, "fwhm": width, "z_peak": z_peak, "nominal_z": nominal_z}
    return FamilyResult(FAMILY, tuple(meas), rois, plot)


def plot_asf(result: FamilyResult):
    from ..report.figures import new_figure

    d = result.plot_data
    if "asf" not in d:
        return None
    fig, ax = new_figure()
    ax.plot(d["z_mm"], d["asf"], marker="o", ms=3, lw=1.2, color="#1b4965", label="ASF")
    if d["fwhm"] is not None:
        w, left, right = d["fwhm"]
        ax.hlines(0.5, left, right, colors="#c8553d", lw=2, label=f"FWHM {w:.2f} mm")
    ax.axvline(d["nominal_z"], color="0.5", ls=":", lw=1, label="nominal height")
    ax.set_xlabel("height z (mm)")
    ax.set_ylabel("ASF (relative)")
    ax.legend(loc="upper right", fontsize=7, frameon=False)
    return fig


register(MetricFamily(
    name=FAMILY, title="Through-depth spread (ASF)", order=20, measure=measure_asf,
    plot=plot_asf,
    metrics=(MetricSpec("asf_fwhm", "mm", "lower", "FWHM of the bead's artefact spread function"),
             MetricSpec("bead_height_error", "mm", "band",
                        "measured in-focus height of the bead minus its nominal height"))))
