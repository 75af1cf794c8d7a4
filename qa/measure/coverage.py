"""Metric family "coverage": the range of edge orientations a reconstruction recovers.

A limited-angle X-ray transform sees a boundary only where some measured line is tangent
to it: the visible singularities are those whose normal is perpendicular to a measured
line (Quinto 1993, References). In our axes a DBT ray through a bead runs in
the x–z plane at an angle θ from the z axis, ``|θ| <= α`` (α the half-angle of the rays
through the bead, close to the half arc). Its tangent boundaries have their normal at
θ from the **x axis**. So in the x–z section of a reconstructed sphere the boundary is
sharp where its outward normal lies within α of ±x (the sides facing along source
travel, whose tangent is within α of z, parallel to a ray) and lost where the normal is
near ±z (top and bottom), which is the elongation a bead shows in depth: the recovered
edge normals span ±α about the direction of source travel, not about z. In the Fourier
domain of the section (Fourier slice theorem: a view at θ fills the line through the
origin at -θ from the k_x axis) the reconstruction's energy fills the wedge of
orientations ``|φ| <= α`` about k_x and nothing beyond. Checked on simulated
shift-and-add and FBP reconstructions (tests/measure/test_coverage.py).

Method
------
1. The x–z section through the bead: the mean over the bead's rows of the planes, minus
   the mean of two strips beside it in y (as :mod:`qa.analysis.bead` reads them: the
   bead's out-of-focus copies spread along x only, so the strips hold none of them).
   A mean over rows of a sphere's sections is still rotationally symmetric in (x, z), so
   the object has the same energy at every orientation. The difference of the two strips,
   scaled to the same variance, is a noise-only section with the same spectrum.
2. A bank of polar-separable oriented band-pass filters (radial band × Gaussian in
   orientation, ``angle_sd_deg`` wide, one every ``angle_step_deg``: filters of the
   log-Gabor kind, Field 1987, with a flat radial band) is applied
   in the Fourier domain; each filter's output energy follows by Parseval's theorem.
   Frequencies are taken in physical units, ``k_x`` from the pixel pitch and ``k_z``
   from the plane spacing, so the anisotropic sampling (planes 1 mm apart, pixels
   0.1 mm) is accounted for exactly and nothing is resampled. The radial band is
   ``[band_low_fraction, 1] × k_top`` with ``k_top = 0.5 / (dz sin φ_obs)`` (at most
   ``0.4 / dx``; 0.38-0.58 cycles/mm for 1 mm planes and φ_obs = 60°): every
   orientation up to ``φ_obs = max_orientation_deg`` lies inside the planes' Nyquist
   limit, and a wedge of half-angle α is free of aliasing in z while
   ``k_top tan α < 0.5 / dz``. The noise section's energies are subtracted.
3. The directional energy ``E(φ)`` is fitted by a blurred box
   ``B + A/2 [erf((α₊ - φ)/(√2 s)) + erf((α₋ + φ)/(√2 s))]``; ``coverage_half_arc`` is
   ``(α₊ + α₋)/2``, the orientations where the energy has fallen to half its plateau.

Uncertainty: delete-one-group jackknife (Efron & Tibshirani 1993, ch. 11) over
``sub_bands`` disjoint radial sub-bands of the band, whose Fourier samples carry
independent noise: the half arc is refitted with each sub-band left out,
``u² = (K-1)/K Σ (α_(i) - mean)²``. Over 16 noisy repeats of each simulated arc the
jackknife was 0.7-0.9 times the observed SD. The known bias below enters as a
rectangular distribution of half-width ``METHOD_BOUND_DEG`` (JCGM 100:2008, the GUM,
4.3.7), combined in quadrature: without it, the jackknife alone covered the error
against the rays' half-angle in none of 10 repeats (bias +0.3 to +0.55 degree on the
shipped arcs, scatter 0.05 degree). All found beads are
combined (each bead's energies normalised to their sum); a bead closer to the volume's
edge along x than ``half_window_mm`` uses the section that fits, down to
``min_half_window_mm``.

Validity ("not measured" otherwise): a volume at least ``min_depth_mm`` deep; each
bead's signal energy in the band at least ``min_energy_snr`` times the noise section's
(in simulations every case at 3 or more was within 1.8° of the arc, cases at 1-2 erred
by up to 3.5°); a fitted plateau ``min_plateau_snr`` times the scatter beyond the
cut-off; and a cut-off clear of the widest orientation the band shows without aliasing.

Known bias: with step-and-shoot views spaced Δθ, the wedge is a fan of lines; their
half-maximum edge lies between the outermost ray angle and that plus Δθ/2 (up to about
1° for DBT arcs), depending on the angular resolution ``~1 / (k L_z)`` of a section
``L_z`` deep. The rays through a bead away from the arc's axis span an asymmetric range:
``α₊`` and ``α₋`` differ and the half arc is their mean. Continuous motion does not widen
the coverage of a reconstruction that backprojects each view along its nominal angle.

References
----------
E. T. Quinto, "Singularities of the X-ray transform and limited data tomography in R^2
and R^3", SIAM J. Math. Anal. 24 (1993) 1215-1225.
D. J. Field, "Relations between the statistics of natural images and the response
properties of cortical cells", J. Opt. Soc. Am. A 4 (1987) 2379-2394.
B. Efron and R. J. Tibshirani, An Introduction to the Bootstrap, Chapman & Hall (1993).
"""

from __future__ import annotations

import math

import numpy as np
from scipy.ndimage import gaussian_filter1d
from scipy.optimize import least_squares
from scipy.special import erf

from ..analysis.bead import bead_signals
from ..errors import InputError, NotMeasurable
from .asf import asf_from_signals
from .base import FamilyResult, Measurement, MetricFamily, MetricSpec, Roi, register
from .noise import read_options

FAMILY = "coverage"
NAME, UNIT = "coverage_half_arc", "deg"
#: Half-width (deg) of the known bias (module notes): the half-maximum edge lies from the
#: outermost ray to half a view step beyond it, at most 1.05 degree for the shipped arcs.
METHOD_BOUND_DEG = 1.0
#: Options (phantom definition, ``analysis: coverage:``); see the module's notes.
DEFAULTS = {"half_window_mm": 15.0, "min_half_window_mm": 8.0, "max_orientation_deg": 60.0,
            "band_low_fraction": 2 / 3, "sub_bands": 4, "angle_step_deg": 0.25,
            "angle_sd_deg": 0.5, "min_depth_mm": 20.0, "min_plateau_snr": 10.0,
            "min_energy_snr": 3.0}


def sections(volume, centre_xy_mm, radius_mm, *, half_window_mm):
    """Background-subtracted x–z section through a bead and a noise-only twin.

    Rows and strips follow :func:`qa.analysis.bead.bead_signals` (same rounding).

    Returns
    -------
    (section, noise, x_mm, signals) : two (nz, nw) arrays, the columns' x positions and
    the bead's :class:`~qa.analysis.bead.BeadSignals`.
    """
    sig = bead_signals(volume, centre_xy_mm, radius_mm, half_window_mm=half_window_mm)
    dz, dy, dx = volume.spacing_mm
    iy = volume.to_index((0.0, centre_xy_mm[1], centre_xy_mm[0]))[1]
    row, n = int(round(iy)), sig.strip_rows
    gap = int(round(sig.strip_offset_mm / dy - n / 2))
    c0 = int(round((sig.x_mm[0] - volume.origin_mm[2]) / dx))
    cols = slice(c0, c0 + sig.x_mm.size)
    a = volume.data[:, row - gap - n:row - gap, cols].astype(np.float64).mean(axis=1)
    b = volume.data[:, row + gap + 1:row + gap + 1 + n, cols].astype(np.float64).mean(axis=1)
    # section = bead rows - (A + B)/2 has noise variance 1.5 v; (A - B) has 2 v.
    return sig.profile, (a - b) * math.sqrt(0.75), sig.x_mm, sig


def directional_energy(section, spacing_zx_mm, *, bands_cycles_per_mm, angles_deg,
                       angle_sd_deg, pad=(8, 4)):
    """Energy of a 2-D section through oriented band-pass filters.

    Parameters
    ----------
    section : (nz, nx) ndarray
    spacing_zx_mm : (dz, dx) sample spacing in mm (may differ).
    bands_cycles_per_mm : sequence of (k_lo, k_hi) radial bands, ``k_lo <= |k| < k_hi``.
    angles_deg : (m,) filter orientations φ: the angle of the frequency vector (the edge
        normal) from the x axis, in (-90, 90].
    angle_sd_deg : SD of each filter's Gaussian profile in orientation.
    pad : zero-padding factors along z and x (they sample the spectrum densely).

    Returns
    -------
    (n_bands, m) ndarray
        ``E_j = Σ_k |F(k)|² g_j(φ(k))`` over each band, ``F`` the padded DFT: by
        Parseval's theorem, proportional to the energy of the section filtered by filter j.
    """
    nz, nx = section.shape
    dz, dx = spacing_zx_mm
    sz = 1 << int(math.ceil(math.log2(max(2, pad[0] * nz))))
    sx = 1 << int(math.ceil(math.log2(max(2, pad[1] * nx))))
    kz = np.fft.fftfreq(sz, dz)
    kx = np.fft.rfftfreq(sx, dx)
    top = max(hi for _, hi in bands_cycles_per_mm)
    keep_x = kx <= top
    # Padded DFT along x first, keeping only the columns inside the bands.
    along_x = np.fft.rfft(np.asarray(section, float), n=sx, axis=1)[:, keep_x]
    spec = np.fft.fft(along_x, n=sz, axis=0)
    kzz, kxx = np.meshgrid(kz, kx[keep_x], indexing="ij")
    k = np.hypot(kzz, kxx)
    inside = k <= top
    k, power = k[inside], np.abs(spec[inside]) ** 2
    # rfft keeps k_x >= 0; the conjugate half has the same power at the same orientation
    # modulo 180 degrees, so the half plane suffices (the k_x = 0 column has no pair).
    power *= np.where(kxx[inside] > 0, 2.0, 1.0)
    phi = (np.degrees(np.arctan2(kzz[inside], kxx[inside])) + 90.0) % 180.0 - 90.0
    # Fine histogram over one period of orientations, smoothed by the filters' Gaussian
    # profile (periodic over 180 degrees) and read at each filter's orientation.
    n_bins = int(math.ceil(180.0 / min(0.05, angle_sd_deg / 5.0)))
    step = 180.0 / n_bins
    bins = np.minimum(((phi + 90.0) / step).astype(np.int64), n_bins - 1)
    centres = -90.0 + step * (np.arange(n_bins) + 0.5)
    at = (np.asarray(angles_deg, float) + 90.0) % 180.0 - 90.0
    norm = math.sqrt(2.0 * math.pi) * angle_sd_deg / step   # peak 1 per filter, as g_j
    out = []
    for lo, hi in bands_cycles_per_mm:
        sel = (k >= lo) & (k < hi)
        hist = np.bincount(bins[sel], weights=power[sel], minlength=n_bins)
        smooth = gaussian_filter1d(hist, angle_sd_deg / step, mode="wrap", truncate=6.0) * norm
        out.append(np.interp(at, centres, smooth, period=180.0))
    return np.array(out)


def box_model(phi_deg, amplitude, floor, plus_deg, minus_deg, blur_deg):
    """Blurred box of orientations: plateau ``amplitude`` over ``[-minus, plus]``."""
    s = math.sqrt(2.0) * max(blur_deg, 1e-3)
    return floor + 0.5 * amplitude * (erf((plus_deg - phi_deg) / s) + erf((minus_deg + phi_deg) / s))


def fit_cutoff(phi_deg, energy):
    """Fit :func:`box_model`; returns (amplitude, floor, α₊, α₋, blur) or raises.

    Starting values: the plateau is the median of the energies above a quarter of the
    largest, and each side's start is the outermost orientation still above half of it
    (searching from outside in, so that dips inside the plateau do not stop the search).
    """
    phi, e = np.asarray(phi_deg, float), np.asarray(energy, float)
    top = float(np.max(e))
    if not top > 0:
        raise NotMeasurable("no directional energy above the noise in the band")
    top = float(np.median(e[e > 0.25 * top]))
    start = []
    for side in (1, -1):
        outer = np.nonzero((side * phi > 0) & (e >= 0.5 * top))[0]
        if outer.size == 0:
            raise NotMeasurable("the directional energy has no plateau on one side of the "
                                "direction of source travel")
        last = outer[np.argmax(side * phi[outer])]
        if side * phi[last] >= np.max(side * phi) - 1e-9:
            raise NotMeasurable("the directional energy does not fall to half its plateau "
                                f"within ±{np.max(np.abs(phi)):.0f}° (arc too wide for the band)")
        start.append(float(side * phi[last]))

    def resid(q):      # amplitude and floor in units of the starting plateau
        return box_model(phi, q[0], q[1], q[2], q[3], q[4]) - e / top

    lim = float(np.max(np.abs(phi)))
    fit = least_squares(resid, [1.0, 0.0, start[0], start[1], 1.0],
                        bounds=([0.0, -1.0, -lim, -lim, 0.05], [10.0, 1.0, lim, lim, lim]))
    a, b, plus, minus, blur = fit.x
    return a * top, b * top, float(plus), float(minus), float(blur)


def _bead_energy(volume, bead, opts, angles, bands):
    """Signal energies of one bead in the full band and each sub-band, and its section."""
    x, y, _ = bead.centre_xyz_mm
    xs, dx = volume.axis_mm(2), volume.spacing_mm[2]
    room = min(x - xs[0], xs[-1] - x) - dx
    half = min(opts["half_window_mm"], room)
    if half < opts["min_half_window_mm"]:
        raise NotMeasurable(f"bead at x = {x:.1f} mm leaves {max(room, 0):.1f} mm of section "
                            f"to the volume's edge along x (needs {opts['min_half_window_mm']:g})")
    section, noise, x_mm, sig = sections(volume, (x, y), bead.obj.shape.half_xyz_mm[0],
                                         half_window_mm=half)
    asf_from_signals(sig)            # raises NotMeasurable when the bead is lost in noise
    spacing = (volume.spacing_mm[0], volume.spacing_mm[2])
    kw = dict(bands_cycles_per_mm=bands, angles_deg=angles, angle_sd_deg=opts["angle_sd_deg"])
    total = directional_energy(section, spacing, **kw)
    noise_e = directional_energy(noise, spacing, **kw)
    snr = (total.sum() - noise_e.sum()) / noise_e.sum() if noise_e.sum() > 0 else math.inf
    if not snr >= opts["min_energy_snr"]:
        raise NotMeasurable(f"the bead's energy in the band is {snr:.2g} times that of the "
                            f"noise (needs {opts['min_energy_snr']:g})")
    return list(total - noise_e), section, x_mm, sig


def _jackknife(angles, combined):
    """Delete-one-sub-band jackknife SD of the half arc (``None`` if a refit fails)."""
    full, parts = combined[0], combined[1:]
    loo = []
    for part in parts:
        try:
            _, _, plus, minus, _ = fit_cutoff(angles, full - part)
        except NotMeasurable:
            return None
        loo.append(0.5 * (plus + minus))
    loo = np.array(loo)
    n = len(loo)
    return float(math.sqrt((n - 1) / n * np.sum((loo - loo.mean()) ** 2)))


def _check(opts, where):
    if not 10.0 <= opts["max_orientation_deg"] <= 85.0:
        raise InputError("max_orientation_deg must be between 10 and 85 degrees, got "
                         f"{opts['max_orientation_deg']:g}", **where, field="analysis.coverage")
    if not 0.2 <= opts["band_low_fraction"] < 1.0 or opts["sub_bands"] < 2 \
            or opts["angle_sd_deg"] <= 0 or opts["angle_step_deg"] <= 0:
        raise InputError("need 0.2 <= band_low_fraction < 1, sub_bands >= 2 and positive "
                         "angle_sd_deg and angle_step_deg", **where, field="analysis.coverage")


def measure(volume, layout, settings=None) -> FamilyResult:
    """Angular coverage from the found beads (see the module's docstring).

    Parameters
    ----------
    volume : qa.volume.Volume
    layout : qa.locate.layout.Layout
        Every found object of role ``bead`` is used; those that cannot be measured are
        named in the note.
    settings : mapping, optional
        Not used (options come from the phantom's ``analysis: coverage:`` block).

    Returns
    -------
    FamilyResult
        ``coverage_half_arc`` in degrees.
    """
    opts = read_options(layout, FAMILY, DEFAULTS)
    _check(opts, dict(source=layout.phantom.source or None))

    def missing(why, plot=None):
        return FamilyResult(FAMILY, (Measurement.missing(NAME, UNIT, why),), (), plot or {})

    beads = layout.with_role("bead")
    if not beads:
        return missing("the phantom has no bead")
    dz, _, dx = volume.spacing_mm
    depth = volume.shape[0] * dz
    if depth < opts["min_depth_mm"]:
        return missing(f"the volume is {depth:g} mm deep ({volume.shape[0]} planes); the "
                       f"orientation of a bead's streaks needs at least "
                       f"{opts['min_depth_mm']:g} mm")
    phi_obs = opts["max_orientation_deg"]
    k_top = min(0.5 / (dz * math.sin(math.radians(phi_obs))), 0.4 / dx)
    k_lo = opts["band_low_fraction"] * k_top
    n_sub = int(opts["sub_bands"])
    cuts = np.linspace(k_lo, k_top, n_sub + 1)
    bands = list(zip(cuts[:-1], cuts[1:]))
    angles = np.arange(-phi_obs, phi_obs + 1e-9, opts["angle_step_deg"])
    energies, used, skipped, rois, first = [], [], [], [], None
    for bead in beads:
        if not bead.found:
            skipped.append(bead.note or f"bead '{bead.id}' not found")
            continue
        try:
            e, section, x_mm, sig = _bead_energy(volume, bead, opts, angles, bands)
        except NotMeasurable as exc:
            skipped.append(f"bead '{bead.id}': {exc}")
            continue
        e = [np.sum(e, axis=0)] + e
        norm = float(np.sum(np.clip(e[0], 0, None)))
        if not norm > 0:
            skipped.append(f"bead '{bead.id}': no directional energy above the noise")
            continue
        energies.append([v / norm for v in e])
        used.append(bead.id)
        x, y, _ = bead.centre_xyz_mm
        rois.append(Roi(f"coverage {bead.id}", "box", (x, y),
                        (float(x_mm[-1] - x_mm[0]), 2 * sig.radius_mm),
                        float(sig.z_mm[int(np.argmax(sig.bead_mean - sig.bg_mean))])))
        if first is None:
            first = {"section": section, "x_mm": x_mm - x, "z_mm": sig.z_mm, "bead": bead.id}
    if not energies:
        return missing("; ".join(skipped))
    combined = [np.mean([e[i] for e in energies], axis=0) for i in range(len(bands) + 1)]
    plot = {"angles_deg": angles, "energy": combined[0], "band_cycles_per_mm": (k_lo, k_top),
            "max_orientation_deg": phi_obs, **(first or {})}
    try:
        amp, floor, plus, minus, blur = fit_cutoff(angles, combined[0])
    except NotMeasurable as exc:
        return missing(str(exc), plot)
    plot.update({"fit": (amp, floor, plus, minus, blur)})
    outside = np.abs(angles) > max(plus, minus) + 3 * blur + 2.0
    alias_deg = math.degrees(math.atan(0.5 / (dz * k_top)))
    widest = min(alias_deg, phi_obs - 5.0)
    if max(plus, minus) + 2 * blur > widest or outside.sum() < 8:
        return missing(f"cut-off at {max(plus, minus):.1f}° is too close to the widest "
                       f"orientation the band shows without aliasing ({widest:.0f}° for "
                       f"planes {dz:g} mm apart); lower max_orientation_deg", plot)
    scatter = float(np.sqrt(np.mean((combined[0][outside] - floor) ** 2)))
    if not amp > opts["min_plateau_snr"] * scatter or min(plus, minus) <= blur:
        return missing(f"directional energy plateau ({amp:.3g}) is not "
                       f"{opts['min_plateau_snr']:g} times the scatter beyond the cut-off "
                       f"({scatter:.3g}): noise dominates", plot)
    value = 0.5 * (plus + minus)
    u_scatter = _jackknife(angles, combined)
    u = None if u_scatter is None else float(np.hypot(u_scatter, METHOD_BOUND_DEG / math.sqrt(3)))
    note = (f"beads {', '.join(used)}; cut-offs +{plus:.1f}° / -{minus:.1f}° (edge-normal "
            f"orientation from x), blur {blur:.1f}°, band {k_lo:.2f}-{k_top:.2f} cycles/mm; "
            f"u = jackknife with the method's ±{METHOD_BOUND_DEG:g}° bound")
    if skipped:
        note += "; not used: " + "; ".join(skipped)
    summary = (f"energy recovered for edge normals within ±{value:.1f}° of the direction "
               "of source travel")
    return FamilyResult(FAMILY, (Measurement(NAME, value, UNIT, u, note),), rois, plot, summary)


def plot(result: FamilyResult):
    """The bead's x–z section and the directional energy with the fitted cut-off."""
    from ..report.figures import PALETTE, new_figure

    d = result.plot_data
    if "energy" not in d:
        return None
    fig, (ax_img, ax) = new_figure(6.4, 2.8, ncols=2)
    if "section" in d:
        s, x, z = d["section"], d["x_mm"], d["z_mm"]
        top = float(np.max(np.abs(s))) or 1.0
        ax_img.imshow(s, origin="lower", cmap="gray", vmin=-0.1 * top, vmax=0.3 * top,
                      extent=(x[0], x[-1], z[0], z[-1]), aspect="equal")
        ax_img.set_xlabel("x from bead (mm)")
        ax_img.set_ylabel("height z (mm)")
        name = str(d["bead"])
        ax_img.set_title(f"x–z section, {name if name.startswith('bead') else 'bead ' + name}",
                         fontsize=8)
        ax_img.grid(False)
    phi, e = d["angles_deg"], d["energy"]
    scale = d["fit"][0] if "fit" in d else float(np.max(e))
    ax.plot(phi, e / scale, color=PALETTE[0], lw=1.2, label="directional energy")
    if "fit" in d:
        amp, floor, plus, minus, blur = d["fit"]
        ax.plot(phi, box_model(phi, amp, floor, plus, minus, blur) / scale, color=PALETTE[1],
                lw=1, ls="--", label=f"fit: ±{0.5 * (plus + minus):.1f}°")
        for c in (plus, -minus):
            ax.axvline(c, color=PALETTE[1], lw=0.8, ls=":")
    ax.set_xlabel("edge-normal orientation from x (deg)")
    ax.set_ylabel("energy (relative)")
    ax.set_ylim(-0.05, 1.45)
    ax.legend(fontsize=7, frameon=False, loc="upper center", ncols=2)
    return fig


register(MetricFamily(
    name=FAMILY, title="Angular coverage", order=35, measure=measure, plot=plot,
    metrics=(MetricSpec(NAME, UNIT, "band", "half-range of edge orientations the "
                        "reconstruction recovers, from the bead's directional energy"),)))
