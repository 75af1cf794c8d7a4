"""In-plane resolution: presampled MTF of the edges of a thin tilted plate.

The phantom's ``edge`` object is a thin square plate turned a few degrees about z. Its
two edges nearly parallel to y give the MTF along x (the direction of source travel:
the profile across them runs along x); the two nearly parallel to x give the MTF along
y. The in-focus plane is searched near the plate's height, a region is cut across the
middle of each edge, and :func:`qa.analysis.edge.edge_mtf` measures it.

Options (phantom definition, ``analysis: mtf:``): ``roi_across_mm`` (default the smaller
of 6 mm and 3/4 of the plate's side), ``roi_along_mm`` (the smaller of 20 mm and 60 % of
the side, so the region stays well inside the corners), ``bin_fraction`` (1/4),
``focus_search_mm`` (3 mm either side of the nominal height), ``n_segments`` (16) and
``normalise``: ``zero`` (default, at f = 0 as IEC 62220-1-1 says) or ``peak`` (at the
curve's maximum, MTF50 and MTF10 sought after it; for the edge-enhanced in-plane response
of a filtered backprojection, whose curve normalised at f = 0 rises well above 1).
Whatever the normalisation, a curve normalised at f = 0 that peaks above 1.05 is
reported in each figure's note and in the plot data.

References
----------
.. [1] IEC 62220-1-1:2015, presampled MTF from a slanted edge.
.. [2] E. Samei, M. J. Flynn, D. A. Reimann, Med. Phys. 25 (1998) 102-113.
"""

from __future__ import annotations

from typing import Mapping

import numpy as np

from ..analysis.edge import ENHANCED_ABOVE, NORMALISATIONS, edge_mtf
from ..errors import InputError, NotMeasurable
from ..report.figures import PALETTE, new_figure
from .base import FamilyResult, Measurement, MetricFamily, MetricSpec, Roi, register

FAMILY = "mtf"
UNIT = "lp/mm"
DIRECTIONS = ("x", "y")
_DEFAULTS = {"roi_across_mm": None, "roi_along_mm": None, "bin_fraction": 0.25,
             "focus_search_mm": 3.0, "n_segments": 16, "normalise": "zero"}
_NORMALISED_AT = {"zero": "f = 0", "peak": "the peak"}


def measure(volume, layout, settings: Mapping | None = None) -> FamilyResult:
    """MTF50 and MTF10 along x and y from the phantom's edge plate(s).

    Parameters
    ----------
    volume : qa.volume.Volume
        The reconstruction, ``[z, y, x]``.
    layout : qa.locate.layout.Layout
        Where the test objects are; every found object of role ``edge`` is used.
    settings : mapping, optional
        Not used by this family (its options come from the phantom definition).

    Returns
    -------
    FamilyResult
        ``mtf50_x``, ``mtf10_x``, ``mtf50_y``, ``mtf10_y`` in lp/mm, each the mean over the
        edges of its direction, with the uncertainty described in Notes.

    Notes
    -----
    In-focus plane: every plane within ``focus_search_mm`` of the plate's nominal height
    is scored by the sum of the MTF50 of the plate's edges that give the MTF along x (0
    where one cannot be measured; see :func:`_focus`); the best plane is used. The curves
    are normalised as the ``normalise`` option says, in the focus search too.

    Per direction, with ``n`` edges (of every plate) giving values ``v_i`` with
    uncertainties ``u_i``, the figure is ``mean v`` and its uncertainty the larger of
    ``sqrt(Σ u_i²) / n`` and ``SD(v) / sqrt(n)``: the edges should agree, and when they do
    not their spread is the better estimate. The curve drawn is the mean of the edges'.
    """
    opts = _options(layout)
    plates = layout.with_role("edge")
    per_dir = {d: [] for d in DIRECTIONS}
    reasons = {d: [] if plates else ["the phantom has no edge object"] for d in DIRECTIONS}
    rois, focus = [], {}
    for plate in plates:
        if not plate.found:
            for d in DIRECTIONS:
                reasons[d].append(plate.note or f"edge object '{plate.id}' was not found")
            continue
        edges = []
        for edge in _edge_regions(plate, opts):
            try:
                _region(volume, edge, edge["nominal_z_mm"])
                edges.append(edge)
            except NotMeasurable as exc:
                reasons[edge["direction"]].append(f"{edge['label']}: {exc}")
        if not edges:
            continue
        try:
            z_mm, scores = _focus(volume, edges, opts)
        except NotMeasurable as exc:
            for d in DIRECTIONS:
                reasons[d].append(f"{plate.id}: {exc}")
            continue
        focus[plate.id] = {"z_mm": z_mm, "planes_z_mm": [s[0] for s in scores],
                           "sharpness_lp_per_mm": [s[1] for s in scores]}
        for edge in edges:
            rois.append(Roi(edge["label"], "box", edge["centre_xy_mm"],
                            edge["size_xy_mm"], z_mm))
            try:
                res = _measure_edge(volume, edge, z_mm, opts, n_segments=opts["n_segments"])
            except NotMeasurable as exc:
                reasons[edge["direction"]].append(f"{edge['label']}: {exc}")
                continue
            per_dir[edge["direction"]].append((edge["label"], res))
    return _result(per_dir, reasons, rois, focus, volume.spacing_mm)


def plot(result: FamilyResult):
    """Both MTF curves with their MTF50 and MTF10 marked; ``None`` when nothing was measured."""
    curves = {d: result.plot_data.get(d) for d in DIRECTIONS}
    curves = {d: c for d, c in curves.items() if c}
    if not curves:
        return None
    fig, ax = new_figure(6.8, 3.4)
    styles = {"x": ("-", "o", PALETTE[0]), "y": ("--", "s", PALETTE[1])}
    marks = [c[k] for c in curves.values() for k in ("mtf50", "mtf10") if c[k] is not None]
    f_top = max([1.25 * c["nyquist_per_mm"] for c in curves.values()] + [1.05 * v for v in marks])
    row = 0
    for d, c in curves.items():
        line, marker, colour = styles[d]
        f, m = c["frequency_per_mm"], c["mtf"]
        keep = f <= f_top
        ax.plot(f[keep], m[keep], line, color=colour, lw=1.4, label=f"along {d}")
        for level, key in ((0.5, "mtf50"), (0.1, "mtf10")):
            if c[key] is not None:     # the reported figure (mean over edges) and its ±u
                ax.errorbar([c[key]], [level], xerr=[c[f"{key}_u"] or 0.0], fmt=marker,
                            color=colour, mfc="white", ms=5, capsize=3, lw=1.0)
                # the figures listed beside the plot, where they cross no curve
                ax.text(1.03, 0.62 - 0.09 * row, f"{key.upper()} {d} {c[key]:.2f} lp/mm",
                        transform=ax.transAxes, fontsize=7, color=colour, va="top")
                row += 1
    for nyq in sorted({round(c["nyquist_per_mm"], 6) for c in curves.values()}):
        ax.axvline(nyq, color=PALETTE[4], lw=0.8, ls=":")
        ax.text(nyq, 0.02, "Nyquist ", fontsize=6, color=PALETTE[4], ha="right")
    enhanced = [f"edge-enhanced {d}: zero-normalised MTF peaks at {c['zero_peak']:.2f} at "
                f"{c['zero_peak_frequency_per_mm']:.1f} lp/mm" for d, c in curves.items()
                if c["edge_enhanced"]]
    if enhanced:
        ax.text(0.0, -0.2, "\n".join(enhanced), transform=ax.transAxes, va="top",
                fontsize=6, color=PALETTE[4])
    for level in (0.5, 0.1):
        ax.axhline(level, color="0.7", lw=0.6, ls=(0, (1, 2)))
    ax.axhline(0.0, color="0.8", lw=0.6)
    ax.set_ylim(-0.02, max(1.1, 1.05 * max(float(np.max(c["mtf"])) for c in curves.values())))
    ax.set_xlim(left=0.0)
    ax.set_xlabel("spatial frequency (lp/mm)")
    at = {_NORMALISED_AT[c["normalise"]] for c in curves.values()}
    ax.set_ylabel(f"presampled MTF (normalised at {' / '.join(sorted(at))})")
    z = result.plot_data.get("focus_z_mm") or {}
    ax.set_title("In-plane MTF" + (f", plane z = {min(z.values()):.1f} mm" if len(z) == 1
                                   else ""), fontsize=9, loc="left")
    ax.legend(frameon=False, fontsize=7, loc="upper left", bbox_to_anchor=(1.0, 1.0))
    return fig


# --- helpers -----------------------------------------------------------------------------

def _options(layout) -> dict:
    given = layout.analysis(FAMILY)
    source = getattr(layout.phantom, "source", "") or None
    if not isinstance(given, Mapping):
        raise InputError(f"expected a mapping of options, got {given!r}", source=source,
                         field=f"analysis.{FAMILY}")
    opts = dict(_DEFAULTS)
    for key, value in given.items():
        line = given.line_of(key) if hasattr(given, "line_of") else None
        where = dict(source=source, line=line, field=f"analysis.{FAMILY}.{key}")
        if key not in _DEFAULTS:
            raise InputError(f"unknown option '{key}'; expected one of "
                             f"{', '.join(sorted(_DEFAULTS))}", **where)
        if key == "normalise":
            if value not in NORMALISATIONS:
                raise InputError(f"expected one of {', '.join(NORMALISATIONS)}, got "
                                 f"{value!r}", **where)
            opts[key] = value
            continue
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not value > 0:
            raise InputError(f"expected a positive number, got {value!r}", **where)
        if key == "n_segments" and (value != int(value) or not 2 <= value <= 64):
            raise InputError(f"expected a whole number from 2 to 64, got {value!r}", **where)
        if key == "bin_fraction" and value > 0.25:
            raise InputError(f"expected at most 0.25 (a quarter pixel), got {value!r}", **where)
        opts[key] = int(value) if key == "n_segments" else float(value)
    return opts


def _edge_regions(plate, opts) -> list[dict]:
    """The four edges of a plate: centre, direction, and the region cut across each."""
    shape = plate.shape
    rot = shape.rotation
    centre = np.asarray(shape.centre_xyz_mm, float)
    half = np.asarray(shape.half_xyz_mm, float)
    out = []
    for axis in (0, 1):
        other = 1 - axis
        across = opts["roi_across_mm"] or min(6.0, 1.5 * half[axis])
        along = opts["roi_along_mm"] or min(20.0, 1.2 * half[other])
        for sign in (1, -1):
            local = np.zeros(3)
            local[axis] = sign * half[axis]
            mid = centre + rot @ local
            normal = sign * rot[:, axis]                 # outward, in world (x, y, z)
            k = 0 if abs(normal[0]) >= abs(normal[1]) else 1
            direction = "xy"[k]
            size = (across, along) if direction == "x" else (along, across)
            label = f"{plate.id} {direction}{'+' if normal[k] > 0 else '-'} edge"
            out.append({"label": label, "direction": direction,
                        "centre_xy_mm": (float(mid[0]), float(mid[1])),
                        "size_xy_mm": (float(size[0]), float(size[1])),
                        "nominal_z_mm": float(centre[2])})
    return out


def _region(volume, edge, z_mm):
    """The plane nearest ``z_mm``, cut to the edge's box (all of it inside the volume)."""
    (cx, cy), (wx, wy) = edge["centre_xy_mm"], edge["size_xy_mm"]
    lo = volume.to_index((z_mm, cy - wy / 2, cx - wx / 2))
    hi = volume.to_index((z_mm, cy + wy / 2, cx + wx / 2))
    iy0, ix0 = int(np.ceil(lo[1])), int(np.ceil(lo[2]))
    iy1, ix1 = int(np.floor(hi[1])) + 1, int(np.floor(hi[2])) + 1
    ny, nx = volume.shape[1:]
    if iy0 < 0 or ix0 < 0 or iy1 > ny or ix1 > nx:
        raise NotMeasurable(f"its region ({wx:.1f} x {wy:.1f} mm at x = {cx:.1f}, "
                            f"y = {cy:.1f} mm) reaches outside the volume")
    return volume.data[volume.plane_index(z_mm), iy0:iy1, ix0:ix1]


def _measure_edge(volume, edge, z_mm, opts, *, n_segments):
    region = _region(volume, edge, z_mm)
    return edge_mtf(region, pitch_mm=volume.spacing_mm[1:], bin_fraction=opts["bin_fraction"],
                    profile_axis=1 if edge["direction"] == "x" else 0, n_segments=n_segments,
                    normalise=opts["normalise"])


def _focus(volume, edges, opts):
    """Height of the plane of sharpest edges, and the (z, score) of every plane tried.

    The score is the sum of the MTF50 of the edges giving the MTF along x: a limited-angle
    scan spreads an object out of its plane along the direction of source travel, so
    those edges see the focus and the others barely do. The edges along y stand in only
    when no x edge can be measured in any plane.
    """
    z_nom = edges[0]["nominal_z_mm"]
    z_planes = volume.axis_mm(0)
    near = np.nonzero(np.abs(z_planes - z_nom) <= opts["focus_search_mm"] + 1e-9)[0]
    if near.size == 0:
        raise NotMeasurable(f"no plane lies within {opts['focus_search_mm']:g} mm of the "
                            f"plate's height z = {z_nom:.1f} mm")
    f50 = np.zeros((near.size, len(edges)))
    for i, iz in enumerate(near):
        for j, edge in enumerate(edges):
            try:
                f50[i, j] = _measure_edge(volume, edge, z_planes[iz], opts,
                                          n_segments=0).mtf50_per_mm
            except NotMeasurable:
                pass
    f50 = np.nan_to_num(f50, nan=0.0)
    along_x = np.array([e["direction"] == "x" for e in edges])
    use = along_x if np.any(f50[:, along_x] > 0) else np.ones(len(edges), bool)
    scores = [(float(z_planes[iz]), float(f50[i, use].sum())) for i, iz in enumerate(near)]
    best = max(scores, key=lambda s: s[1])
    if best[1] <= 0:
        raise NotMeasurable(f"no edge could be measured in any plane within "
                            f"{opts['focus_search_mm']:g} mm of z = {z_nom:.1f} mm")
    return best[0], scores


def _combine(values, uncertainties):
    """Mean of the edges' values; uncertainty as in :func:`measure` (None if unknown)."""
    v, u = np.asarray(values, float), np.asarray(uncertainties, float)
    n = v.size
    candidates = [np.sqrt(np.sum(u ** 2)) / n, np.std(v, ddof=1) / np.sqrt(n) if n > 1
                  else np.nan]
    candidates = [c for c in candidates if np.isfinite(c)]
    return float(v.mean()), (float(max(candidates)) if candidates else None)


def _peak_data(results, pitch_mm) -> dict:
    """Peak of the mean over edges of the curves normalised at f = 0, up to Nyquist."""
    if not results:
        return {}
    f = results[0].frequency_per_mm
    zero = np.mean([r.mtf * (r.peak if r.normalise == "peak" else 1.0) for r in results],
                   axis=0)
    nyquist = 0.5 / pitch_mm
    i = int(np.argmax(np.where(f <= nyquist * (1 + 1e-9), zero, -np.inf)))
    return {"normalise": results[0].normalise, "nyquist_per_mm": nyquist,
            "zero_peak": float(zero[i]), "zero_peak_frequency_per_mm": float(f[i]),
            "edge_enhanced": bool(zero[i] > ENHANCED_ABOVE),
            "edge_zero_peak": [r.peak for r in results],
            "edge_zero_peak_sd": [r.peak_sd for r in results]}


def _result(per_dir, reasons, rois, focus, spacing_mm) -> FamilyResult:
    measurements, plot_data = [], {"focus_z_mm": {k: f["z_mm"] for k, f in focus.items()},
                                   "focus_search": focus}
    for d in DIRECTIONS:
        found = per_dir.get(d) or []
        why = "; ".join(reasons.get(d) or ["no edge of this direction was measured"])
        curve = _peak_data([r for _, r in found], spacing_mm[2 if d == "x" else 1])
        extra = (f"; edge-enhanced: zero-normalised MTF peaks at {curve['zero_peak']:.2f} at "
                 f"{curve['zero_peak_frequency_per_mm']:.1f} lp/mm; normalised at "
                 f"{_NORMALISED_AT[curve['normalise']]}" if curve.get("edge_enhanced") else "")
        for level in (50, 10):
            name = f"mtf{level}_{d}"
            pairs = [(getattr(r, f"mtf{level}_per_mm"), getattr(r, f"mtf{level}_sd"))
                     for _, r in found if np.isfinite(getattr(r, f"mtf{level}_per_mm"))]
            if pairs:
                value, unc = _combine(*zip(*pairs))
                unused = list(reasons.get(d) or [])
                if len(pairs) < len(found):
                    unused.append(f"{len(found) - len(pairs)} edge(s) stay above "
                                  f"{level / 100:.1f} over the curve's range")
                note = f"mean of {len(pairs)} edge(s)" + (f"; not used: {'; '.join(unused)}"
                                                          if unused else "")
                measurements.append(Measurement(name, value, UNIT, unc, note + extra))
                curve[f"mtf{level}"], curve[f"mtf{level}_u"] = value, unc
            else:
                if found:
                    why = (f"the MTF stays above {level / 100:.1f} up to "
                           f"{found[0][1].frequency_per_mm[-1]:.1f} lp/mm"
                           + (" after its peak" if curve["normalise"] == "peak" else ""))
                measurements.append(Measurement.missing(name, UNIT, why + extra))
                curve[f"mtf{level}"], curve[f"mtf{level}_u"] = None, None
        if found:
            res = [r for _, r in found]
            sd = np.sqrt(np.sum([r.mtf_sd ** 2 for r in res], axis=0)) / len(res)
            curve.update(frequency_per_mm=res[0].frequency_per_mm,
                         mtf=np.mean([r.mtf for r in res], axis=0), mtf_sd=sd,
                         edges=[label for label, _ in found],
                         edge_angle_deg=[r.angle_deg for r in res])
            plot_data[d] = curve
    parts = [f"{m.name} {m.value:.2f} {m.unit}" for m in measurements
             if m.measured and m.name.startswith("mtf50")]
    summary = ", ".join(parts) if parts else "in-plane MTF not measured"
    if parts and any(c.get("normalise") == "peak" for c in plot_data.values()
                     if isinstance(c, dict)):
        summary += " (normalised at the peak)"
    if focus:
        summary += "; in-focus plane z = " + ", ".join(f"{f['z_mm']:.1f} mm"
                                                      for f in focus.values())
    return FamilyResult(FAMILY, tuple(measurements), tuple(rois), plot_data, summary)


register(MetricFamily(
    name=FAMILY, title="In-plane resolution (MTF)", order=10, measure=measure, plot=plot,
    metrics=tuple(MetricSpec(f"mtf{level}_{d}", UNIT, "higher",
                             f"spatial frequency where the presampled MTF along {d} falls "
                             f"to {level / 100:.1f} (slanted edge, in-focus plane)")
                  for d in DIRECTIONS for level in (50, 10))))
