"""Metric family "noise": noise SD, NPS and uniformity in the phantom's uniform region.

Measured in one plane: the plane nearest the uniform region's centre height, or the
plane nearest the option ``plane_mm``. Values are in the volume's own units, declared
as the unit string ``"value"`` (attenuation in 1/mm for this suite's simulator, pixel
values for a scanner's reconstruction); the units of a volume are not guessed.

Figures
-------
noise_sd
    Square root of the integral of the NPS, i.e. the SD of the pixel values in the NPS
    ROIs after removal of the polynomial trend (IEC 62220-1-1 detrending). Uncertainty:
    SD of the per-ROI SDs over the root of the number of independent ROIs (area covered
    over one ROI's area; half-overlapping ROIs count once).
uniformity
    Largest deviation of the means of a grid of cells (``grid`` x ``grid`` over the
    region) from the mean of the cell means, in percent of that mean. Uncertainty: each
    cell mean's standard error from the spread of its 4 x 4 sub-cell means, propagated
    to the figure by a seeded parametric bootstrap (500 draws).

This module also holds the plane helpers that :mod:`qa.measure.detectability` shares.

References
----------
IEC 62220-1-1:2015, Medical electrical equipment - Characteristics of digital X-ray
imaging devices - Part 1-1 (noise power spectrum: ROIs, detrending, averaging).
"""

from __future__ import annotations

import math
from collections.abc import Mapping

import numpy as np
from matplotlib.figure import Figure

from ..analysis.nps import NoisePowerSpectrum, nps_2d, nps_cut
from ..errors import InputError, NotMeasurable
from ..phantom.model import Shape
from .base import FamilyResult, Measurement, MetricFamily, MetricSpec, Roi, register

DEFAULTS = {"plane_mm": None, "roi_px": 64, "min_roi_px": 16, "min_rois": 4,
            "overlap": 0.5, "detrend_order": 2, "edge_margin_mm": 0.5, "grid": 3}
_SPECS = (
    MetricSpec("noise_sd", "value", "lower", "SD of detrended pixel values in the uniform "
               "region (integral of the NPS), in the volume's own units"),
    MetricSpec("uniformity", "%", "lower", "largest deviation of ROI-grid means from their "
               "mean over the uniform region"),
)


# --- shared helpers -------------------------------------------------------------------
def read_options(layout, family: str, defaults: Mapping) -> dict:
    """The phantom's analysis options for ``family`` over ``defaults``, type-checked."""
    given = layout.analysis(family)
    source = layout.phantom.source or None
    if not isinstance(given, Mapping):
        raise InputError("expected a mapping of options", source=source,
                         field=f"analysis.{family}")
    out = dict(defaults)
    for key, value in given.items():
        line = given.line_of(key) if hasattr(given, "line_of") else None
        where = dict(source=source, line=line, field=f"analysis.{family}.{key}")
        if key not in defaults:
            raise InputError(f"unknown option; expected one of {', '.join(sorted(defaults))}",
                             **where)
        default = defaults[key]
        if isinstance(value, bool) or not isinstance(value, (int, float)) \
                or not math.isfinite(value):
            raise InputError(f"expected a number, got {value!r}", **where)
        if isinstance(default, int) and not isinstance(default, bool) and int(value) != value:
            raise InputError(f"expected a whole number, got {value!r}", **where)
        out[key] = type(default)(value) if default is not None else float(value)
    return out


def plane_xy_mm(volume) -> tuple[np.ndarray, np.ndarray]:
    """Positions (mm) of the rows (y) and columns (x) of every plane."""
    return volume.axis_mm(1), volume.axis_mm(2)


def section_mask(volume, shape: Shape, iz: int, *, grow_mm: float = 0.0,
                 at_z_mm: float | None = None, window=None) -> np.ndarray:
    """Pixels of plane ``iz`` inside ``shape`` grown in-plane by ``grow_mm`` (may be < 0).

    ``at_z_mm`` cuts the shape at another height (its footprint) instead of the plane's;
    ``window`` = (row slice, column slice) restricts the answer to part of the plane.
    """
    y, x = plane_xy_mm(volume)
    if window is not None:
        y, x = y[window[0]], x[window[1]]
    half = (shape.half_xyz_mm[0] + grow_mm, shape.half_xyz_mm[1] + grow_mm,
            shape.half_xyz_mm[2])
    if min(half) <= 0:
        return np.zeros((len(y), len(x)), bool)
    grown = Shape(shape.kind, shape.centre_xyz_mm, half, shape.rotation_deg)
    z = volume.axis_mm(0)[iz] if at_z_mm is None else at_z_mm
    yy, xx = np.meshgrid(y, x, indexing="ij")
    return grown.contains(np.stack([xx, yy, np.full_like(xx, z)], axis=-1))


def objects_clear_mask(volume, layout, iz: int, *, margin_mm: float, skip=(),
                       window=None) -> np.ndarray:
    """Pixels of plane ``iz`` at least ``margin_mm`` from every test object's footprint.

    The background and uniform regions are not obstacles, nor the objects whose ids are
    in ``skip``; every other object counts whatever its height, since out-of-plane
    objects leave artefacts in DBT planes. ``window`` as in :func:`section_mask`.
    """
    clear = None
    for placed in layout.placed.values():
        if placed.obj.role in ("background", "uniform") or placed.id in skip:
            continue
        inside = section_mask(volume, placed.shape, iz, grow_mm=margin_mm,
                              at_z_mm=placed.shape.centre_xyz_mm[2], window=window)
        clear = ~inside if clear is None else clear & ~inside
    if clear is None:
        shape = volume.shape[1:] if window is None else \
            (len(range(volume.shape[1])[window[0]]), len(range(volume.shape[2])[window[1]]))
        clear = np.ones(shape, bool)
    return clear


def nps_for_region(plane: np.ndarray, mask: np.ndarray, spacing_mm, opts: Mapping, *,
                   detrend: str = "area", adapt_order: bool = False) -> NoisePowerSpectrum:
    """NPS of a region with the largest ROI (``roi_px``, halved down to ``min_roi_px``)
    of which at least ``min_rois`` fit; :class:`NotMeasurable` if none does.

    With ``adapt_order`` the detrending order is lowered from ``detrend_order`` until
    the polynomial has at most a tenth as many terms as there are independent ROIs
    (order 0, the mean, at least): each term takes one degree of freedom from the ROI
    means, i.e. from the lowest frequencies, which dominate d' of large disks. The
    order used is in ``spec.detrend_order``.
    """
    roi = int(opts["roi_px"])
    while roi >= int(opts["min_roi_px"]):
        try:
            spec = nps_2d(plane, spacing_mm=spacing_mm, mask=mask, roi_px=roi,
                          overlap=float(opts["overlap"]), detrend=detrend,
                          detrend_order=0 if adapt_order else int(opts["detrend_order"]))
        except NotMeasurable:
            spec = None
        if spec is not None and len(spec.periodograms) >= int(opts["min_rois"]):
            order = int(opts["detrend_order"])
            while adapt_order and order > 0 \
                    and (order + 1) * (order + 2) / 2 > spec.n_independent / 10:
                order -= 1
            if order == spec.detrend_order:
                return spec
            return nps_2d(plane, spacing_mm=spacing_mm, mask=mask, roi_px=roi,
                          overlap=float(opts["overlap"]), detrend_order=order,
                          detrend=detrend)
        roi //= 2
    raise NotMeasurable(f"fewer than {opts['min_rois']} NPS ROIs of {opts['min_roi_px']} px "
                        "fit in the region")


def box_roi(label: str, volume, iz: int, rows: tuple[int, int], cols: tuple[int, int]) -> Roi:
    """A box Roi over pixel rows ``[r0, r1)`` and columns ``[c0, c1)`` of plane ``iz``."""
    dz, dy, dx = volume.spacing_mm
    z0, y0, x0 = volume.origin_mm
    return Roi(label, "box", (x0 + dx * (cols[0] + cols[1] - 1) / 2,
                              y0 + dy * (rows[0] + rows[1] - 1) / 2),
               (dx * (cols[1] - cols[0]), dy * (rows[1] - rows[0])), z0 + dz * iz)


def nps_area_roi(label: str, volume, iz: int, spec: NoisePowerSpectrum) -> Roi:
    rows = [c[0] for c in spec.corners]
    cols = [c[1] for c in spec.corners]
    n = spec.roi_px
    return box_roi(label, volume, iz, (min(rows), max(rows) + n), (min(cols), max(cols) + n))


def nps_plot_data(spec: NoisePowerSpectrum) -> dict:
    out = {"roi_px": spec.roi_px, "n_rois": len(spec.periodograms)}
    for axis in ("x", "y"):
        f, v, s = nps_cut(spec, axis=axis)
        out[f"nps_{axis}"] = {"freq_per_mm": f, "nps": v, "sem": s}
    return out


# --- uniformity -----------------------------------------------------------------------
def grid_uniformity(plane: np.ndarray, mask: np.ndarray, *, grid: int, seed: int = 0):
    """Cell means over a ``grid`` x ``grid`` division of the mask's bounding box.

    Returns ``(means, ses, cells, value_percent, u_percent)``; ``cells`` holds the pixel
    bounds ``(r0, r1, c0, c1)`` of each cell (row-major), ``means``/``ses`` are
    ``(grid, grid)`` arrays with NaN for cells less than half inside the mask.
    """
    if grid < 2:
        raise InputError(f"the uniformity grid needs at least 2 x 2 cells, got {grid}",
                         field="analysis.noise.grid")
    rows, cols = np.nonzero(mask)
    r_edges = np.linspace(rows.min(), rows.max() + 1, grid + 1).round().astype(int)
    c_edges = np.linspace(cols.min(), cols.max() + 1, grid + 1).round().astype(int)
    means = np.full((grid, grid), np.nan)
    ses = np.full((grid, grid), np.nan)
    cells = []
    for i in range(grid):
        for j in range(grid):
            r0, r1, c0, c1 = r_edges[i], r_edges[i + 1], c_edges[j], c_edges[j + 1]
            cells.append((int(r0), int(r1), int(c0), int(c1)))
            sub_mask = mask[r0:r1, c0:c1]
            if sub_mask.size == 0 or sub_mask.mean() < 0.5 or sub_mask.sum() < 16:
                continue
            values = plane[r0:r1, c0:c1]
            means[i, j] = values[sub_mask].mean()
            sub = []
            for rs in np.array_split(np.arange(r1 - r0), 4):
                for cs in np.array_split(np.arange(c1 - c0), 4):
                    m = sub_mask[np.ix_(rs, cs)]
                    if m.any():
                        sub.append(values[np.ix_(rs, cs)][m].mean())
            if len(sub) > 1:
                ses[i, j] = np.std(sub, ddof=1) / math.sqrt(len(sub))
    good = np.isfinite(means)
    if good.sum() < 2:
        raise NotMeasurable("fewer than 2 cells of the uniformity grid lie in the region")
    m, s = means[good], np.nan_to_num(ses[good])

    def stat(cell_means):
        centre = cell_means.mean(axis=-1, keepdims=True)
        return np.max(np.abs(cell_means - centre), axis=-1) / np.abs(centre[..., 0]) * 100.0

    draws = m + s * np.random.default_rng(seed).standard_normal((500, m.size))
    return means, ses, cells, float(stat(m)), float(np.std(stat(draws), ddof=1))


# --- the family -----------------------------------------------------------------------
def measure(volume, layout, settings=None) -> FamilyResult:
    """Measure noise SD, NPS and uniformity in the uniform region (see module doc).

    ``settings`` is accepted for the family interface and not used: options come from
    the phantom's ``analysis: noise:`` block.
    """
    opts = read_options(layout, "noise", DEFAULTS)

    def missing(why):
        return FamilyResult("noise", [Measurement.missing(s.name, s.unit, why) for s in _SPECS],
                            summary=f"not measured: {why}")

    regions = layout.with_role("uniform")
    if not regions:
        return missing("the phantom defines no uniform region")
    region = next((r for r in regions if r.found), None)
    if region is None:
        return missing(f"uniform region '{regions[0].id}' not found: {regions[0].note}")
    z_mm = opts["plane_mm"] if opts["plane_mm"] is not None else region.centre_xyz_mm[2]
    iz = volume.plane_index(z_mm)
    plane = np.asarray(volume.data[iz], float)
    mask = section_mask(volume, region.shape, iz, grow_mm=-opts["edge_margin_mm"])
    mask &= np.isfinite(plane)
    if not mask.any():
        return missing(f"uniform region '{region.id}' does not reach plane "
                       f"z = {volume.axis_mm(0)[iz]:.2f} mm inside the volume")
    spacing = volume.spacing_mm[1:]
    measurements, rois, plot_data = [], [], {"plane_z_mm": float(volume.axis_mm(0)[iz]),
                                             "value_unit": "value", "region": region.id}
    try:
        spec = nps_for_region(plane, mask, spacing, opts)
    except NotMeasurable as exc:
        measurements.append(Measurement.missing("noise_sd", "value", str(exc)))
    else:
        du_dv = 1.0 / (spec.roi_px ** 2 * spacing[0] * spacing[1])
        sds = np.sqrt(spec.periodograms.sum(axis=(1, 2)) * du_dv)
        u = np.std(sds, ddof=1) / math.sqrt(spec.n_independent) if len(sds) > 1 else None
        sd = math.sqrt(spec.variance)
        measurements.append(Measurement("noise_sd", sd, "value", u,
                                        f"{len(sds)} ROIs of {spec.roi_px} px, detrending "
                                        f"order {spec.detrend_order}"))
        rois.append(nps_area_roi("NPS area", volume, iz, spec))
        plot_data.update(nps_plot_data(spec))
    try:
        means, ses, cells, value, u = grid_uniformity(plane, mask, grid=opts["grid"])
        centre = np.nanmean(means)
        if abs(centre) <= np.nanstd(plane[mask]):
            raise NotMeasurable("the region's mean is within one noise SD of zero, so a "
                                "percentage deviation is not meaningful")
        measurements.append(Measurement("uniformity", value, "%", u,
                                        f"{np.isfinite(means).sum()} cells"))
        plot_data["uniformity_deviation_percent"] = (means - centre) / abs(centre) * 100.0
        y, x = plane_xy_mm(volume)
        rows, cols = np.nonzero(mask)
        plot_data["uniformity_extent_mm"] = (x[cols.min()], x[cols.max()],
                                             y[rows.min()], y[rows.max()])
        for k, (r0, r1, c0, c1) in enumerate(cells):
            if np.isfinite(means.flat[k]):
                rois.append(box_roi(f"cell {k + 1}", volume, iz, (r0, r1), (c0, c1)))
    except NotMeasurable as exc:
        measurements.append(Measurement.missing("uniformity", "%", str(exc)))
    done = [m for m in measurements if m.measured]
    summary = ", ".join(f"{m.name} {m.value:.4g} {m.unit}" for m in done) or "not measured"
    return FamilyResult("noise", measurements, rois, plot_data, summary)


def plot(result: FamilyResult) -> Figure | None:
    """NPS cuts along x and y, and the uniformity grid (percent deviation of cell means)."""
    data = result.plot_data
    has_nps, has_grid = "nps_x" in data, "uniformity_deviation_percent" in data
    if not (has_nps or has_grid):
        return None
    fig = Figure(figsize=(9.0, 3.6), layout="constrained")
    ax_nps, ax_grid = fig.subplots(1, 2, gridspec_kw={"width_ratios": [1.6, 1.0]})
    if has_nps:
        for axis, style in (("x", "-"), ("y", "--")):
            cut = data[f"nps_{axis}"]
            ax_nps.plot(cut["freq_per_mm"], cut["nps"], style, label=f"along {axis}")
        ax_nps.set_yscale("log")
        ax_nps.legend()
    ax_nps.set_xlabel("spatial frequency (lp/mm)")
    ax_nps.set_ylabel("NPS ((volume units)² · mm²)")
    ax_nps.set_title(f"NPS, plane z = {data.get('plane_z_mm', float('nan')):.1f} mm")
    if has_grid:
        dev = data["uniformity_deviation_percent"]
        x0, x1, y0, y1 = data["uniformity_extent_mm"]
        lim = max(np.nanmax(np.abs(dev)), 1e-9)
        img = ax_grid.imshow(dev, cmap="coolwarm", vmin=-lim, vmax=lim, origin="upper",
                             extent=(x0, x1, y1, y0))
        cy = np.linspace(y0, y1, dev.shape[0] * 2 + 1)[1::2]
        cx = np.linspace(x0, x1, dev.shape[1] * 2 + 1)[1::2]
        for (i, j), v in np.ndenumerate(dev):
            ax_grid.text(cx[j], cy[i], "n/a" if not np.isfinite(v) else f"{v:+.2f} %",
                         ha="center", va="center", fontsize=8)
        fig.colorbar(img, ax=ax_grid, label="deviation from mean (%)")
    ax_grid.set_xlabel("x (mm)")
    ax_grid.set_ylabel("y (mm)")
    ax_grid.set_title("uniformity grid")
    return fig


FAMILY = register(MetricFamily(name="noise", title="Noise and uniformity", metrics=_SPECS,
                               measure=measure, plot=plot, order=50))
