"""Streak artefact spread of a bead: how far its out-of-focus artefact spreads in-plane.

This suite's own measure (``DEVELOPERS.md``, metric definitions). For the bead in focus
at ``z0``, in each plane ``z0 + Δz`` the background-subtracted profile along x through
the bead, normalised by the in-focus contrast, is the streak artefact spread function
``SASF(x; Δz)``. Its extent ``E(Δz)`` is the distance between the outermost points where
it stays above a stated fraction. For shift-and-add of rays over a half arc ``α`` the
copies of a bead of diameter ``d`` reach ``E ≈ d + 2 |Δz| tan α``, so the slope of a
straight-line fit of ``E`` against ``|Δz|`` gives the effective streak half-angle
``α = atan(slope / 2)`` (the half-angle of the rays through the bead).
"""

from __future__ import annotations

import numpy as np

from ..analysis.bead import bead_signals
from ..errors import NotMeasurable
from .asf import asf_from_signals
from .base import FamilyResult, Measurement, MetricFamily, MetricSpec, register

FAMILY = "streak"
#: Default fraction of the in-focus contrast the SASF must exceed to count as artefact.
#: Below 1/N for N views, so the single copies of step-and-shoot shift-and-add count.
FRACTION = 0.025
#: Profile samples must also exceed this many SDs of the profile noise.
NOISE_FACTOR = 4.0
MIN_OFFSET_MM = 2.0   # nearer offsets still overlap the bead itself


def extent(x_mm: np.ndarray, sasf: np.ndarray, threshold: float, centre_mm: float):
    """Distance between the outermost samples above ``threshold``, refined linearly.

    Returns ``None`` when nothing exceeds it or when the artefact reaches the ends of
    the profile (its extent is then unknown).
    """
    above = np.nonzero(sasf > threshold)[0]
    if above.size == 0:
        return None
    i, j = above[0], above[-1]
    if i == 0 or j == len(sasf) - 1:
        return None

    def edge(k_out, k_in):
        a, b = sasf[k_out], sasf[k_in]
        t = (threshold - a) / (b - a)
        return x_mm[k_out] + t * (x_mm[k_in] - x_mm[k_out])

    return float(edge(j + 1, j) - edge(i - 1, i))


def _line_fit(dz, e):
    design = np.stack([np.ones_like(dz), dz], axis=1)
    coef, *_ = np.linalg.lstsq(design, e, rcond=None)
    return coef, e - design @ coef, design


def fit_half_angle(offsets_mm: np.ndarray, extents_mm: np.ndarray):
    """Straight line E = a + b |Δz|, with one pass of outlier rejection.

    Points further than 4 robust SDs (1.4826 MAD, at least 0.2 mm) from a first
    least-squares line are dropped before the final fit; the slope's SD comes from the
    final fit's residuals.

    Returns
    -------
    (half-angle deg, its SD deg, a mm, b, kept mask)
    """
    dz = np.abs(np.asarray(offsets_mm, float))
    e = np.asarray(extents_mm, float)
    coef, resid, _ = _line_fit(dz, e)
    scale = max(0.2, 1.4826 * np.median(np.abs(resid - np.median(resid))))
    keep = np.abs(resid) <= 4.0 * scale
    if keep.sum() >= 3:
        coef, resid, design = _line_fit(dz[keep], e[keep])
    else:
        keep = np.ones_like(dz, dtype=bool)
        coef, resid, design = _line_fit(dz, e)
    dof = max(1, len(resid) - 2)
    cov = np.linalg.inv(design.T @ design) * (resid @ resid) / dof
    a, b = coef
    angle = np.degrees(np.arctan(b / 2.0))
    sd = np.degrees(np.sqrt(cov[1, 1]) / 2.0 / (1.0 + (b / 2.0) ** 2))
    return float(angle), float(sd), float(a), float(b), keep


def measure_streak(volume, layout, settings=None) -> FamilyResult:
    name, unit = "streak_half_angle", "deg"
    opts = layout.analysis(FAMILY)
    fraction = float(opts.get("fraction", FRACTION))
    beads = layout.with_role("bead")
    if not beads:
        return FamilyResult(FAMILY, (Measurement.missing(name, unit, "the phantom has no bead"),))
    bead = beads[0]
    if not bead.found:
        return FamilyResult(FAMILY, (Measurement.missing(name, unit, bead.note),))
    x, y, _ = bead.centre_xyz_mm
    try:
        sig = bead_signals(volume, (x, y), bead.obj.shape.half_xyz_mm[0],
                           half_window_mm=float(opts.get("half_window_mm", 15.0)))
        _, contrast, k0 = asf_from_signals(sig)
    except NotMeasurable as exc:
        return FamilyResult(FAMILY, (Measurement.missing(name, unit, str(exc)),))
    c0 = float(np.max(sig.profile[k0]))
    sasf = sig.profile / c0
    offsets = sig.z_mm - sig.z_mm[k0]
    rel_noise = sig.profile_sd / c0
    thresholds = np.maximum(fraction, NOISE_FACTOR * rel_noise)
    ext = np.full(offsets.shape, np.nan)
    for k in range(len(offsets)):
        if abs(offsets[k]) >= MIN_OFFSET_MM:
            e = extent(sig.x_mm, sasf[k], thresholds[k], x)
            if e is not None:
                ext[k] = e
    ok = np.isfinite(ext)
    plot = {"x_mm": sig.x_mm - x, "offsets_mm": offsets, "sasf": sasf, "extent_mm": ext,
            "fraction": fraction}
    if ok.sum() < 4 or len(set(np.abs(offsets[ok]).round(6))) < 2:
        why = (f"the streak extent was measurable in only {int(ok.sum())} planes "
               f"(needs 4; fraction {fraction:g} of the in-focus contrast)")
        return FamilyResult(FAMILY, (Measurement.missing(name, unit, why),), (), plot)
    angle, sd, a, b, kept = fit_half_angle(offsets[ok], ext[ok])
    plot.update({"fit": (a, b), "half_angle_deg": angle})
    note = (f"from {int(kept.sum())} of {int(ok.sum())} planes, |Δz| {np.abs(offsets[ok]).min():.0f}-"
            f"{np.abs(offsets[ok]).max():.0f} mm, fraction {fraction:g}")
    return FamilyResult(FAMILY, (Measurement(name, angle, unit, sd, note),), (), plot)


def plot_streak(result: FamilyResult):
    from ..report.figures import PALETTE, new_figure

    d = result.plot_data
    if "sasf" not in d:
        return None
    fig, (ax_map, ax_fit) = new_figure(6.4, 2.8, ncols=2)
    x, dz = d["x_mm"], d["offsets_mm"]
    step = (dz[1] - dz[0]) if len(dz) > 1 else 1.0
    im = ax_map.imshow(np.clip(d["sasf"], -0.1, 0.3), aspect="auto", origin="lower",
                       cmap="cividis", extent=(x[0], x[-1], dz[0] - step / 2, dz[-1] + step / 2))
    fig.colorbar(im, ax=ax_map, shrink=0.85).ax.tick_params(labelsize=6)
    if "fit" in d:
        a, b = d["fit"]
        zz = np.linspace(dz.min(), dz.max(), 50)
        half = 0.5 * (a + b * np.abs(zz))
        ax_map.plot(half, zz, color="white", lw=0.8, ls="--")
        ax_map.plot(-half, zz, color="white", lw=0.8, ls="--")
    ax_map.set_xlabel("x from bead (mm)")
    ax_map.set_ylabel("plane offset Δz (mm)")
    ok = np.isfinite(d["extent_mm"])
    ax_fit.plot(np.abs(dz[ok]), d["extent_mm"][ok], "o", ms=3, color=PALETTE[0], label="extent E")
    if "fit" in d:
        a, b = d["fit"]
        zz = np.linspace(0, np.abs(dz).max(), 20)
        ax_fit.plot(zz, a + b * zz, color=PALETTE[1], lw=1,
                    label=f"fit: half-angle {d['half_angle_deg']:.1f}°")
    ax_fit.set_xlabel("|Δz| (mm)")
    ax_fit.set_ylabel("extent (mm)")
    ax_fit.legend(fontsize=7, frameon=False)
    return fig


register(MetricFamily(
    name=FAMILY, title="Streak artefact spread", order=30, measure=measure_streak,
    plot=plot_streak,
    metrics=(MetricSpec("streak_half_angle", "deg", "band",
                        "effective half-angle of the bead's out-of-focus streaks"),)))
