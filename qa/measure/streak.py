"""Streak artefact spread of a bead: how far its out-of-focus artefact spreads in-plane.

This suite's own measure (``DEVELOPERS.md``, metric definitions). For the bead in focus
at ``z0``, in each plane ``z0 + Δz`` the background-subtracted profile along x through
the bead, normalised by the in-focus contrast, is the streak artefact spread function
``SASF(x; Δz)``. Its extent ``E(Δz)`` is the distance between the outermost points where
it stays above a stated fraction. For shift-and-add of rays over a half arc ``α`` the
copies of a bead of diameter ``d`` reach ``E ≈ d + 2 |Δz| tan α``, so the slope of a
straight-line fit of ``E`` against ``|Δz|`` gives the effective streak half-angle
``α = atan(slope / 2)`` (the half-angle of the rays through the bead).

Ghost spacing (step-and-shoot). Each view leaves its own copy of the bead in plane
``z0 + Δz``, where the ray from that view's source through the bead crosses the plane:
``x_i = x_b + Δz tan θ_i`` with ``θ_i`` the angle of that ray from z. Adjacent copies
are ``Δz (tan θ_{i+1} - tan θ_i)`` apart. ``streak_ghost_spacing`` is the mean spacing
of the copies found as separate peaks of the SASF profile, ``(x_last - x_first) /
(n - 1)``, at the largest plane offset where they are resolved (module notes in
:func:`ghost_peaks`); it is "not measured" when the copies merge (continuous motion,
a bead large against the spacing) or are resolved in too few planes. Its uncertainty
is ``|Δz_max|`` times the standard error of ``spacing / |Δz|`` over the resolved planes
(the spacing grows in proportion to ``|Δz|``, so each plane is a repeat).

Uncertainty of the half-angle: the slope's SD from the line fit's residuals, combined in
quadrature with ``METHOD_BOUND_DEG / sqrt(3)`` for the method's own bias.

Validity of the half-angle: a plane's threshold is the fraction or 4 profile-noise SDs,
whichever is larger, and a plane whose noise raises it past ``MAX_RAISE`` times the
fraction is left out; the fit needs 4 planes and a slope above 3 of its SDs, otherwise
the half-angle is "not measured", as it is when the fit's SD exceeds ``MAX_FIT_SD_DEG``.

References
----------
C. M. Sparrow, "On spectroscopic resolving power", Astrophys. J. 44 (1916) 76-86 (the
two-peak resolution limit at which the dip between them vanishes).
"""

from __future__ import annotations

import numpy as np
from scipy.signal import find_peaks

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
#: A plane whose noise raises the threshold above this multiple of the fraction is left
#: out: a higher threshold measures a narrower iso-level of the artefact (the sides of
#: overlapping copies slope), which biased the half-angle 1-3 degrees low in noisy
#: simulations (thresholds 2-4 times the fraction); with planes up to 1.5 times kept,
#: the measured cases of the mid and wide arcs stayed within 1.5 degrees of the arc
#: (shift-and-add within 0.7 degree of the rays' half-angle).
MAX_RAISE = 1.5
MIN_OFFSET_MM = 2.0   # nearer offsets still overlap the bead itself
#: Bound (deg) of the method's own bias against the half-angle of the rays through the
#: bead, from validation on simulated shift-and-add: 0.07 degree low at 500 quanta per
#: pixel, 0.1-0.2 degree low at 150-250 (a noise-raised threshold reads a narrower
#: iso-level), within 0.5 degree in every noiseless arc (tests/measure/test_streak.py).
#: It enters the uncertainty as a rectangular distribution, bound / sqrt(3) (JCGM
#: 100:2008, the GUM, 4.3.7), beside the fit's scatter.
METHOD_BOUND_DEG = 0.5
#: Largest SD (deg) of the fitted half-angle: extents that scatter more about their line
#: come from noise-shaped profiles. In seeded simulations of narrow-arc (±7.5°) FBP at
#: 400 quanta per pixel the fit SD was 0.21-0.42 degree and the half-angle 5.2-8.1 for
#: rays at 7.27; shift-and-add and well-exposed FBP gave 0.02-0.04 degree, within 0.5
#: degree of the rays (tests/measure/test_robustness.py).
MAX_FIT_SD_DEG = 0.15
#: A copy counts as separate when the profile dips between it and each neighbour by at
#: least this fraction of the copies' median height (our own resolution criterion,
#: stricter than Sparrow's limit of no dip at all, 1916) and by 4 profile-noise SDs.
GHOST_DIP = 0.2
#: Largest coefficient of variation of the gaps between copies: the spacing of
#: Δz tan θ varies by sec²θ across the arc (22 % at 25°, CV under 8 %); a missed copy
#: doubles one gap and a noise peak halves one.
GHOST_MAX_CV = 0.25
MIN_GHOST_PLANES = 3
#: Fewest separate copies that count as the views' copies: two or three peaks are more
#: often the ends (and middle) of a merged streak that a filtered reconstruction
#: emphasises; they measured 3.0 mm "spacing" in the demo's FBP volume where the views'
#: copies were 0.45 mm apart and merged. DBT units take 9-25 views (common practice).
MIN_GHOST_COPIES = 5
#: Spacing per mm of offset must agree within this fraction across the planes used.
GHOST_RATIO_TOL = 0.05


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


def ghost_peaks(x_mm: np.ndarray, sasf: np.ndarray, threshold: float, noise_sd: float):
    """Positions of the separate copies of a bead in one SASF profile, or ``None``.

    Peaks above ``threshold`` whose prominence (the dip to the higher of the two
    valleys beside them) is at least ``GHOST_DIP`` of the median peak height and 4
    ``noise_sd``; positions refined by a parabola through the peak and its two
    neighbours. The copies are *resolved* when at least 3 are found, the gaps between
    them vary by at most ``GHOST_MAX_CV``, and the outermost peaks lie within one gap of
    the ends of the artefact (the samples above ``threshold``), so that no copy is
    missing at either end.
    """
    p = np.asarray(sasf, float)
    idx, props = find_peaks(p, height=threshold, prominence=4.0 * noise_sd)
    if idx.size < 3:
        return None
    keep = props["prominences"] >= GHOST_DIP * np.median(props["peak_heights"])
    idx = idx[keep]
    if idx.size < 3 or idx[0] == 0 or idx[-1] == len(p) - 1:
        return None
    a, b, c = p[idx - 1], p[idx], p[idx + 1]
    den = a - 2 * b + c
    shift = np.where(den < 0, 0.5 * (a - c) / np.where(den < 0, den, -1.0), 0.0)
    step = x_mm[1] - x_mm[0]
    pos = x_mm[idx] + np.clip(shift, -0.5, 0.5) * step
    gaps = np.diff(pos)
    if gaps.std(ddof=1) > GHOST_MAX_CV * gaps.mean():
        return None
    above = np.nonzero(p > threshold)[0]
    if pos[0] - x_mm[above[0]] > gaps.max() or x_mm[above[-1]] - pos[-1] > gaps.max():
        return None
    return pos


def ghost_spacing(offsets_mm, x_mm, sasf, thresholds, noise_sd):
    """Mean copy spacing at the largest resolved offset (module notes); a dict or a reason."""
    found = {}
    for k, dz in enumerate(offsets_mm):
        if abs(dz) >= MIN_OFFSET_MM:
            pos = ghost_peaks(x_mm, sasf[k], thresholds[k], noise_sd[k])
            if pos is not None:
                found[k] = pos
    if len(found) < MIN_GHOST_PLANES:
        return (f"the bead's copies are resolved as separate peaks in {len(found)} planes "
                f"(needs {MIN_GHOST_PLANES}): they merge (continuous motion, or a bead large "
                "against their spacing) or too few plane offsets")
    # Consensus: the copy count most planes agree on (the larger on a tie), then the
    # planes whose spacing per mm of offset is within GHOST_RATIO_TOL of their median.
    counts = {k: len(p) for k, p in found.items()}
    values, freq = np.unique(list(counts.values()), return_counts=True)
    n_copies = int(values[freq == freq.max()].max())
    if n_copies < MIN_GHOST_COPIES:
        return (f"only {n_copies} separate peaks per plane (needs {MIN_GHOST_COPIES}): more "
                "likely the ends of merged copies than one copy per view")
    ks = np.array(sorted(k for k in found if counts[k] == n_copies))
    dz = np.abs(np.asarray(offsets_mm, float)[ks])
    spacing = np.array([(found[k][-1] - found[k][0]) / (n_copies - 1) for k in ks])
    ratio = spacing / dz
    agree = np.abs(ratio - np.median(ratio)) <= GHOST_RATIO_TOL * np.median(ratio)
    ks, dz, spacing, ratio = ks[agree], dz[agree], spacing[agree], ratio[agree]
    if len(ks) < MIN_GHOST_PLANES:
        return (f"the bead's copies are resolved consistently (same count, spacing in "
                f"proportion to |Δz|) in only {len(ks)} planes (needs {MIN_GHOST_PLANES})")
    top = dz >= dz.max() - 1e-6
    return {"value": float(spacing[top].mean()),
            "uncertainty": float(dz.max() * ratio.std(ddof=1) / np.sqrt(len(ratio))),
            "offset_mm": float(dz.max()), "copies": n_copies, "planes": int(len(ks)),
            "peaks": {float(offsets_mm[k]): found[k] for k in ks}}


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


def _missing(why, plot=None):
    return FamilyResult(FAMILY, (Measurement.missing("streak_half_angle", "deg", why),
                                 Measurement.missing("streak_ghost_spacing", "mm", why)),
                        (), plot or {})


def measure_streak(volume, layout, settings=None) -> FamilyResult:
    """Streak half-angle and ghost spacing of the first bead (module notes).

    Parameters
    ----------
    volume : qa.volume.Volume
    layout : qa.locate.layout.Layout
        The first object of role ``bead`` is used.
    settings : mapping, optional
        Not used (options ``fraction`` and ``half_window_mm`` come from the phantom's
        ``analysis: streak:`` block).

    Returns
    -------
    FamilyResult
        ``streak_half_angle`` (deg) and ``streak_ghost_spacing`` (mm).
    """
    name, unit = "streak_half_angle", "deg"
    opts = layout.analysis(FAMILY)
    fraction = float(opts.get("fraction", FRACTION))
    beads = layout.with_role("bead")
    if not beads:
        return _missing("the phantom has no bead")
    bead = beads[0]
    if not bead.found:
        return _missing(bead.note)
    x, y, _ = bead.centre_xyz_mm
    try:
        sig = bead_signals(volume, (x, y), bead.obj.shape.half_xyz_mm[0],
                           half_window_mm=float(opts.get("half_window_mm", 15.0)))
        _, contrast, k0 = asf_from_signals(sig)
    except NotMeasurable as exc:
        return _missing(str(exc))
    c0 = float(np.max(sig.profile[k0]))
    sasf = sig.profile / c0
    offsets = sig.z_mm - sig.z_mm[k0]
    rel_noise = sig.profile_sd / c0
    thresholds = np.maximum(fraction, NOISE_FACTOR * rel_noise)
    ext = np.full(offsets.shape, np.nan)
    faint = 0
    for k in range(len(offsets)):
        if abs(offsets[k]) < MIN_OFFSET_MM:
            continue
        if thresholds[k] > MAX_RAISE * fraction:
            faint += 1
            continue
        e = extent(sig.x_mm, sasf[k], thresholds[k], x)
        if e is not None:
            ext[k] = e
    ok = np.isfinite(ext)
    plot = {"x_mm": sig.x_mm - x, "offsets_mm": offsets, "sasf": sasf, "extent_mm": ext,
            "fraction": fraction}
    ghosts = ghost_spacing(offsets, sig.x_mm - x, sasf, thresholds, rel_noise)
    if isinstance(ghosts, str):
        spacing = Measurement.missing("streak_ghost_spacing", "mm", ghosts)
    else:
        plot["ghosts"] = ghosts
        spacing = Measurement("streak_ghost_spacing", ghosts["value"], "mm",
                              ghosts["uncertainty"],
                              f"{ghosts['copies']} copies at |Δz| = {ghosts['offset_mm']:.1f} mm; "
                              f"resolved in {ghosts['planes']} planes")
    if ok.sum() < 4 or len(set(np.abs(offsets[ok]).round(6))) < 2:
        why = (f"the streak extent was measurable in only {int(ok.sum())} planes "
               f"(needs 4; fraction {fraction:g} of the in-focus contrast"
               + (f"; {faint} planes too noisy for the threshold" if faint else "")
               + ")")
        return FamilyResult(FAMILY, (Measurement.missing(name, unit, why), spacing), (), plot)
    angle, sd, a, b, kept = fit_half_angle(offsets[ok], ext[ok])
    plot.update({"fit": (a, b), "half_angle_deg": angle})
    if sd > MAX_FIT_SD_DEG:
        why = (f"the streak extents scatter about their line (fitted half-angle {angle:.1f}° "
               f"with an SD of {sd:.2f}°, over the {MAX_FIT_SD_DEG:g}° a half-angle needs): "
               "noise shapes the profiles")
        return FamilyResult(FAMILY, (Measurement.missing(name, unit, why), spacing), (), plot)
    if not angle > 3.0 * sd:
        why = (f"the streak extent does not grow with |Δz| beyond its scatter (fitted "
               f"half-angle {angle:.1f}° ± {sd:.1f}°): noise dominates the profiles")
        return FamilyResult(FAMILY, (Measurement.missing(name, unit, why), spacing), (), plot)
    note = (f"from {int(kept.sum())} of {int(ok.sum())} planes, |Δz| {np.abs(offsets[ok]).min():.0f}-"
            f"{np.abs(offsets[ok]).max():.0f} mm, fraction {fraction:g}"
            + (f"; {faint} planes left out as too noisy" if faint else "")
            + f"; u = fit SD {sd:.2f}° with the method's ±{METHOD_BOUND_DEG:g}° bound")
    u = float(np.hypot(sd, METHOD_BOUND_DEG / np.sqrt(3.0)))
    return FamilyResult(FAMILY, (Measurement(name, angle, unit, u, note), spacing), (), plot)


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
    for dz_k, pos in d.get("ghosts", {}).get("peaks", {}).items():
        ax_map.plot(pos, np.full(len(pos), dz_k), ".", ms=1.5, color=PALETTE[1])
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
                        "effective half-angle of the bead's out-of-focus streaks"),
             MetricSpec("streak_ghost_spacing", "mm", "band",
                        "spacing of the bead's separate out-of-focus copies at the largest "
                        "resolved plane offset (step-and-shoot)"))))
