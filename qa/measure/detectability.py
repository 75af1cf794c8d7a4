"""Metric family "detectability": SDNR, NPW/NPWE d' and threshold contrast of disk inserts.

Each disk insert (role ``disk``) is measured in the plane nearest its centre height.
The nearest plane is used, not the plane of largest contrast: picking the largest of
several noisy contrasts would bias every figure upwards.

Regions (options in the phantom's ``analysis: detectability:`` block, defaults in
:data:`DEFAULTS`): the signal ROI is the disk of ``signal_fraction`` times the nominal
radius R; the background is the annulus from ``background_inner``·R to
``background_outer``·R, less the footprints of other objects grown by ``gap_mm``.

Figures (one per disk, ``*`` = the disk's id)
---------------------------------------------
sdnr_*
    (mean_signal - mean_background) / SD_background. Uncertainty: delete-one-group
    jackknife over ``sectors`` angular sectors shared by the signal disk and the annulus
    (each leave-one-out estimate drops the same sector from both); this keeps the
    spatial correlation of the noise within each group.
dprime_npw_*, dprime_npwe_*
    d' of the NPW and NPWE observers (:mod:`qa.analysis.observers`) for an ideal disk of
    the measured contrast and nominal diameter against the NPS measured in the same
    plane: in the uniform region if it reaches that plane, else in background ROIs within
    ``background_reach_mm`` of the disks and ``clear_margin_mm`` clear of every object.
    Uncertainty: the contrast's jackknife uncertainty combined with that of the NPS
    integral (SD of the per-ROI integrals over the root of the number of independent
    ROIs).
threshold_contrast_*
    The contrast at which NPW d' reaches the d' of the ``afc_percent_correct`` point of
    an ``afc_alternatives``-AFC task (4-AFC 62.5 %: d' = 1.235, :mod:`qa.analysis.afc`),
    in the volume's own value units. d' is proportional to contrast, so
    C_t = d'_t / (d' per unit contrast). Uncertainty: from the NPS integral alone.

The NPS here is detrended by at most a plane (``detrend_order`` 1), not the second-order
surface of IEC 62220-1-1, and by the mean alone when the region holds fewer than 30
independent ROIs (see :func:`qa.measure.noise.nps_for_region`): over the small uniform
areas of a DBT phantom a quadratic takes away real low-frequency noise and so inflates
d' of the larger disks (about 14 % for a 5 mm disk with a 16 mm square region in white
noise, measured in development).

``plot_data`` holds the contrast-detail curve: threshold contrast against diameter with
a weighted least-squares power law C_t = a · d^b fitted in log-log space.

References
----------
ICRU Report 54, Medical Imaging - The Assessment of Image Quality (1996).
A. E. Burgess, J. Opt. Soc. Am. A 11 (1994) 1237-1242 (NPWE observer).
D. M. Green and J. A. Swets, Signal Detection Theory and Psychophysics, Wiley (1966).
IEC 62220-1-1:2015 (noise power spectrum).
B. Efron and R. J. Tibshirani, An Introduction to the Bootstrap, Chapman & Hall (1993),
chapter 11 (the jackknife).
"""

from __future__ import annotations

import math

import numpy as np
from matplotlib.figure import Figure

from ..analysis import afc, observers
from ..analysis.nps import resample_periodic
from ..errors import InputError, NotMeasurable
from .base import FamilyResult, Measurement, MetricFamily, MetricSpec, Roi, register
from .noise import (nps_area_roi, nps_for_region, objects_clear_mask, read_options,
                    section_mask)

DEFAULTS = {"signal_fraction": 0.8, "background_inner": 1.5, "background_outer": 2.5,
            "gap_mm": 0.5, "sectors": 32, "roi_px": 64, "min_roi_px": 16, "min_rois": 4,
            "overlap": 0.5, "detrend_order": 1, "edge_margin_mm": 0.5,
            "background_reach_mm": 20.0, "clear_margin_mm": 1.0, "supersample": 4,
            "viewing_distance_mm": observers.VIEWING_DISTANCE_MM,
            "eye_exponent": observers.EYE_EXPONENT,
            "eye_peak_cycles_per_degree": observers.EYE_PEAK_CYCLES_PER_DEGREE,
            "display_magnification": 1.0, "afc_alternatives": 4,
            "afc_percent_correct": 62.5}
#: Largest ratio of the background ring's SD to the noise SD of the NPS region: a ring
#: holding an edge (the end of the reconstructed field, another object) has an SD many
#: times the noise (230 times for a disk at the edge of a truncated simulation), and its
#: SDNR and d' would be wrong without saying so. Noise alone gives about 1.
MAX_BACKGROUND_RATIO = 3.0


def noise_sd(spec) -> float:
    """Noise SD from an NPS: the square root of its integral (Parseval)."""
    dy, dx = spec.spacing_mm
    return float(np.sqrt(np.sum(spec.nps) / (spec.roi_px ** 2 * dy * dx)))


_FIGURES = (("sdnr", "1"), ("dprime_npw", "1"), ("dprime_npwe", "1"),
            ("threshold_contrast", "value"))
_SPECS = (
    MetricSpec("sdnr_*", "1", "higher", "signal-difference-to-noise ratio of a disk insert"),
    MetricSpec("dprime_npw_*", "1", "higher", "NPW model observer d' of a disk insert"),
    MetricSpec("dprime_npwe_*", "1", "higher", "NPWE model observer d' of a disk insert"),
    MetricSpec("threshold_contrast_*", "value", "lower", "contrast at the 4-AFC 62.5 % "
               "point of NPW d' for the insert's diameter, in the volume's own units"),
)


def _jackknife(estimates: np.ndarray) -> float:
    k = len(estimates)
    return math.sqrt((k - 1) / k * np.sum((estimates - estimates.mean()) ** 2))


def disk_sdnr(plane, volume, layout, disk, iz, opts) -> dict:
    """SDNR and contrast of one disk in plane ``iz`` with jackknife uncertainties."""
    radius = float(disk.shape.half_xyz_mm[0])
    cx, cy = disk.centre_xyz_mm[0], disk.centre_xyz_mm[1]
    _, dy, dx = volume.spacing_mm
    reach = radius * opts["background_outer"]
    iy, ix = volume.to_index((0.0, cy, cx))[1:]
    rows = slice(max(0, int(math.floor(iy - reach / dy)) - 1),
                 min(volume.shape[1], int(math.ceil(iy + reach / dy)) + 2))
    cols = slice(max(0, int(math.floor(ix - reach / dx)) - 1),
                 min(volume.shape[2], int(math.ceil(ix + reach / dx)) + 2))
    y = volume.axis_mm(1)[rows][:, None] - cy
    x = volume.axis_mm(2)[cols][None, :] - cx
    r, angle = np.hypot(y, x), np.arctan2(y, x)
    values = np.asarray(plane[rows, cols], float)
    finite = np.isfinite(values)
    r_signal = opts["signal_fraction"] * radius
    signal = (r <= r_signal) & finite
    annulus = (r >= opts["background_inner"] * radius) & (r <= reach)
    nominal_bg = math.pi * (reach ** 2 - (opts["background_inner"] * radius) ** 2) / (dx * dy)
    x_mm, y_mm = volume.axis_mm(2), volume.axis_mm(1)
    inside_field = (x_mm[0] - dx / 2 <= cx - radius and cx + radius <= x_mm[-1] + dx / 2
                    and y_mm[0] - dy / 2 <= cy - radius and cy + radius <= y_mm[-1] + dy / 2)
    if not inside_field or not np.all(finite[r <= r_signal]):
        raise NotMeasurable(f"disk '{disk.id}' lies partly outside the volume's field")
    annulus &= finite & objects_clear_mask(volume, layout, iz, margin_mm=opts["gap_mm"],
                                           skip=(disk.id,), window=(rows, cols))
    sectors = min(int(opts["sectors"]), int(signal.sum()) // 3)
    if sectors < 4:
        raise NotMeasurable(f"disk '{disk.id}' is too small for the pixel size: "
                            f"{int(signal.sum())} px in its signal ROI (need 12)")
    if annulus.sum() < 0.5 * nominal_bg or annulus.sum() < 2 * sectors:
        raise NotMeasurable(f"background annulus of disk '{disk.id}' is less than half "
                            "usable (volume edge or neighbouring objects)")
    group = np.floor((angle + math.pi) / (2 * math.pi) * sectors).astype(int) % sectors
    s_val, s_grp = values[signal], group[signal]
    b_val, b_grp = values[annulus], group[annulus]
    ref = b_val.mean()
    c = b_val - ref

    def sums(v, g):
        return np.bincount(g, minlength=sectors), np.bincount(g, weights=v, minlength=sectors)

    ns, ss = sums(s_val - ref, s_grp)
    nb, sb = sums(c, b_grp)
    qb = np.bincount(b_grp, weights=c * c, minlength=sectors)

    def estimate(ns_, ss_, nb_, sb_, qb_):
        ms, mb = ss_ / ns_, sb_ / nb_
        sd = np.sqrt((qb_ - sb_ ** 2 / nb_) / (nb_ - 1))
        return ms - mb, (ms - mb) / sd, sd, mb + ref

    contrast, sdnr, sd, mean_bg = estimate(ns.sum(), ss.sum(), nb.sum(), sb.sum(), qb.sum())
    loo = estimate(ns.sum() - ns, ss.sum() - ss, nb.sum() - nb, sb.sum() - sb, qb.sum() - qb)
    return {"contrast": float(contrast), "u_contrast": _jackknife(loo[0]),
            "sdnr": float(sdnr), "u_sdnr": _jackknife(loo[1]), "sd_bg": float(sd),
            "mean_bg": float(mean_bg), "n_signal": int(signal.sum()),
            "n_background": int(annulus.sum()), "sectors": sectors}


def plane_nps(plane, volume, layout, iz, opts):
    """NPS of plane ``iz``: uniform region first, else background next to the disks.

    Returns ``(spectrum, description)``; raises :class:`NotMeasurable` with both reasons.
    """
    z = volume.axis_mm(0)[iz]
    reasons = []
    for region in layout.with_role("uniform"):
        if not region.found:
            reasons.append(f"uniform region '{region.id}' not found")
            continue
        mask = section_mask(volume, region.shape, iz, grow_mm=-opts["edge_margin_mm"])
        if not mask.any():
            reasons.append(f"uniform region '{region.id}' does not reach plane z = {z:.2f} mm")
            continue
        try:
            return nps_for_region(plane, mask, volume.spacing_mm[1:], opts,
                                  adapt_order=True), \
                f"uniform region '{region.id}'"
        except NotMeasurable as exc:
            reasons.append(f"uniform region '{region.id}': {exc}")
    if not reasons:
        reasons.append("the phantom defines no uniform region")
    yy, xx = np.meshgrid(volume.axis_mm(1), volume.axis_mm(2), indexing="ij")
    near = np.zeros(plane.shape, bool)
    for disk in layout.with_role("disk"):
        if disk.found:
            near |= np.hypot(xx - disk.centre_xyz_mm[0], yy - disk.centre_xyz_mm[1]) \
                <= opts["background_reach_mm"]
    mask = near & np.isfinite(plane) & objects_clear_mask(
        volume, layout, iz, margin_mm=opts["clear_margin_mm"])
    for placed in layout.with_role("background"):
        mask &= section_mask(volume, placed.shape, iz, grow_mm=-opts["edge_margin_mm"])
    try:
        spec = nps_for_region(plane, mask, volume.spacing_mm[1:], opts, adapt_order=True)
    except NotMeasurable as exc:
        raise NotMeasurable(f"no NPS in plane z = {z:.2f} mm: {'; '.join(reasons)}; and no "
                            f"usable background next to the disks ({exc})") from None
    return spec, "background next to the disks"


def observer_figures(spec, diameter_mm, opts) -> dict:
    """NPW and NPWE d' per unit contrast for a disk, with relative uncertainties."""
    spacing = spec.spacing_mm
    shape = observers.template_shape(diameter_mm, spacing, (spec.roi_px, spec.roi_px))
    signal = observers.disk_signal(diameter_mm=diameter_mm, contrast=1.0, spacing_mm=spacing,
                                   shape=shape, supersample=int(opts["supersample"]))
    eye = observers.eye_filter(observers.radial_frequency(shape, spacing),
                               viewing_distance_mm=opts["viewing_distance_mm"],
                               exponent=opts["eye_exponent"],
                               peak_cycles_per_degree=opts["eye_peak_cycles_per_degree"],
                               display_magnification=opts["display_magnification"])
    out = {}
    for name, weight in (("npw", None), ("npwe", eye)):
        a, w = observers.observer_weights(signal, spacing_mm=spacing, eye=weight)
        b = np.array([np.sum(w * resample_periodic(p, spacing, shape))
                      for p in spec.periodograms])
        per_unit = a / math.sqrt(b.mean())
        rel = 0.5 * b.std(ddof=1) / math.sqrt(spec.n_independent) / b.mean() \
            if len(b) > 1 else None
        out[name] = (per_unit, rel)
    return out


def fit_power_law(diameter_mm, contrast, uncertainty):
    """Weighted least-squares fit of C = a · d^b in log-log space (None if < 2 diameters)."""
    d, c = np.asarray(diameter_mm, float), np.asarray(contrast, float)
    u = np.array([np.nan if v is None else v for v in uncertainty], float)
    good = (d > 0) & (c > 0)
    d, c, u = d[good], c[good], u[good]
    if len(np.unique(d)) < 2:
        return None
    sigma = np.where(np.isfinite(u) & (u > 0), u / c, 1.0)
    design = np.stack([np.ones_like(d), np.log(d)], axis=1) / sigma[:, None]
    coef, *_ = np.linalg.lstsq(design, np.log(c) / sigma, rcond=None)
    cov = np.linalg.inv(design.T @ design)
    return {"a": float(math.exp(coef[0])), "b": float(coef[1]),
            "u_log_a": float(math.sqrt(cov[0, 0])), "u_b": float(math.sqrt(cov[1, 1]))}


def _circle(label, x, y, diameter, z) -> Roi:
    return Roi(label, "circle", (float(x), float(y)), (float(diameter), float(diameter)), z)


def measure(volume, layout, settings=None) -> FamilyResult:
    """Measure every disk insert (see the module's docstring for the method).

    ``settings`` (the run's settings) is accepted for the family interface; this family
    takes its options from the phantom's analysis block only.
    """
    opts = read_options(layout, "detectability", DEFAULTS)
    where = dict(source=layout.phantom.source or None, field="analysis.detectability")
    if not 0 < opts["signal_fraction"] <= 1:
        raise InputError(f"signal_fraction must be in (0, 1], got {opts['signal_fraction']}",
                         **where)
    if not 1 < opts["background_inner"] < opts["background_outer"]:
        raise InputError("need 1 < background_inner < background_outer (radii in units of "
                         f"the disk radius), got {opts['background_inner']} and "
                         f"{opts['background_outer']}", **where)
    disks = layout.with_role("disk")
    if not disks:
        raise NotMeasurable("the phantom defines no disk inserts")
    d_target = afc.threshold_dprime(m=int(opts["afc_alternatives"]),
                                    percent_correct=float(opts["afc_percent_correct"]))
    measurements, rois, curve = [], [], []
    noise_cache: dict[int, object] = {}
    z_axis = volume.axis_mm(0)
    for disk in disks:
        def missing(why, names=_FIGURES):
            return [Measurement.missing(f"{n}_{disk.id}", u, why) for n, u in names]
        if not disk.found:
            measurements += missing(f"disk '{disk.id}' not found: {disk.note}")
            continue
        z = disk.centre_xyz_mm[2]
        half_dz = volume.spacing_mm[0] / 2
        if not z_axis.min() - half_dz <= z <= z_axis.max() + half_dz:
            measurements += missing(f"disk '{disk.id}' at z = {z:.2f} mm lies outside the "
                                    "volume's planes")
            continue
        iz = volume.plane_index(z)
        plane = volume.data[iz]
        try:
            s = disk_sdnr(plane, volume, layout, disk, iz, opts)
        except NotMeasurable as exc:
            measurements += missing(str(exc))
            continue
        radius = float(disk.shape.half_xyz_mm[0])
        zp = float(z_axis[iz])
        if iz not in noise_cache:
            try:
                spec, source = plane_nps(np.asarray(plane, float), volume, layout, iz, opts)
                noise_cache[iz] = (spec, source)
                rois.append(nps_area_roi(f"NPS area z = {zp:.1f} mm", volume, iz, spec))
            except NotMeasurable as exc:
                noise_cache[iz] = exc
        noise = noise_cache[iz]
        if not isinstance(noise, NotMeasurable):
            ratio = s["sd_bg"] / noise_sd(noise[0])
            if ratio > MAX_BACKGROUND_RATIO:
                measurements += missing(
                    f"the background ring of disk '{disk.id}' is not uniform: its SD is "
                    f"{ratio:.1f} times the noise SD of the {noise[1]} (limit "
                    f"{MAX_BACKGROUND_RATIO:g}); the disk may lie at the edge of the "
                    "reconstructed field or next to another object")
                continue
        note = f"plane z = {zp:.2f} mm, {s['n_signal']} px signal, {s['sectors']} sectors"
        measurements.append(Measurement(f"sdnr_{disk.id}", s["sdnr"], "1", s["u_sdnr"], note))
        rois += [_circle(f"{disk.id} signal", *disk.centre_xyz_mm[:2],
                         2 * opts["signal_fraction"] * radius, zp),
                 _circle(f"{disk.id} background (inner)", *disk.centre_xyz_mm[:2],
                         2 * opts["background_inner"] * radius, zp),
                 _circle(f"{disk.id} background (outer)", *disk.centre_xyz_mm[:2],
                         2 * opts["background_outer"] * radius, zp)]
        if isinstance(noise, NotMeasurable):
            measurements += missing(str(noise), _FIGURES[1:])
            continue
        spec, source = noise
        obs = observer_figures(spec, 2 * radius, opts)
        nps_note = (f"NPS from {source}, {len(spec.periodograms)} ROIs of {spec.roi_px} px, "
                    f"detrending order {spec.detrend_order}")
        contrast, u_c = abs(s["contrast"]), s["u_contrast"]
        for name in ("npw", "npwe"):
            per_unit, rel = obs[name]
            value = contrast * per_unit
            u = None if rel is None else math.hypot(per_unit * u_c, value * rel)
            measurements.append(Measurement(f"dprime_{name}_{disk.id}", value, "1", u, nps_note))
        per_unit, rel = obs["npw"]
        threshold = d_target / per_unit
        u_t = None if rel is None else threshold * rel
        measurements.append(Measurement(f"threshold_contrast_{disk.id}", threshold, "value",
                                        u_t, f"NPW d' = {d_target:.3f}; {nps_note}"))
        curve.append((2 * radius, threshold, u_t, disk.id))
    curve.sort()
    fit = fit_power_law([c[0] for c in curve], [c[1] for c in curve], [c[2] for c in curve])
    plot_data = {"diameter_mm": np.array([c[0] for c in curve]),
                 "threshold_contrast": np.array([c[1] for c in curve]),
                 "threshold_uncertainty": np.array([np.nan if c[2] is None else c[2]
                                                    for c in curve]),
                 "ids": tuple(c[3] for c in curve), "fit": fit, "dprime_target": d_target,
                 "value_unit": "value"}
    n_done = sum(1 for m in measurements if m.measured and m.name.startswith("sdnr_"))
    summary = f"{n_done} of {len(disks)} disks measured"
    if fit is not None:
        summary += f"; contrast-detail fit C_t = {fit['a']:.3g} · d^{fit['b']:.2f}"
    return FamilyResult("detectability", measurements, rois, plot_data, summary)


def plot(result: FamilyResult) -> Figure | None:
    """Contrast-detail curve: threshold contrast against diameter, with the power law."""
    data = result.plot_data
    d = np.asarray(data.get("diameter_mm", ()), float)
    if d.size == 0:
        return None
    c = np.asarray(data["threshold_contrast"], float)
    u = np.asarray(data["threshold_uncertainty"], float)
    from matplotlib.ticker import NullFormatter

    from ..report.figures import PALETTE, new_figure

    fig, ax = new_figure(5.6, 3.0)
    ax.errorbar(d, c, yerr=np.where(np.isfinite(u), u, 0.0), fmt="o", ms=4, capsize=3,
                color=PALETTE[0], label="threshold contrast ± u (k = 1)")
    fit = data.get("fit")
    if fit is not None:
        grid = np.geomspace(d.min() * 0.8, d.max() * 1.25, 50)
        ax.plot(grid, fit["a"] * grid ** fit["b"], "--", color=PALETTE[1], lw=1.2,
                label=f"fit C = {fit['a']:.3g} · d^{fit['b']:.2f}")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xticks(d, [f"{v:g}" for v in d])    # the disks' own diameters, in plain figures
    ax.xaxis.set_minor_formatter(NullFormatter())
    ax.tick_params(which="both", labelsize=7)       # log axes label their minor ticks too
    ax.set_xlabel("disk diameter (mm)")
    ax.set_ylabel("threshold contrast (volume units)")
    ax.set_title(f"Contrast-detail (NPW, d' = {data.get('dprime_target', float('nan')):.3f})",
                 fontsize=8)
    ax.legend(fontsize=7, frameon=False)
    return fig


FAMILY = register(MetricFamily(name="detectability", title="Low-contrast detectability",
                               metrics=_SPECS, measure=measure, plot=plot, order=40))
