"""The demo volume moved, turned, mirrored and re-sliced gives the same figures.

One simulation of the demo phantom (seed 7, filtered backprojection) is written as DICOM,
then shifted in-plane by (+6, -4) mm, turned by 3 deg about z, mirrored in x and
re-sliced along z to 0.5 mm and 2 mm planes; each copy goes through ``lacuna assess``.

Each figure is compared with the original's: the change ``d = T - O`` must lie in
``[min(0, D) - k u, max(0, D) + k u]``, ``u = sqrt(u_O^2 + u_T^2)``, ``k = 2`` (a coverage
of about 95 % for a normal difference, JCGM 100:2008 "GUM", 6.3.3; the two figures share
their noise, so ``u`` overstates the SD of ``d``), where ``D`` is what the transform alone
does to the figure (0 where it can do nothing; an interval ``[-A, A]`` where only a
bound ``A`` is known), measured or bounded as follows:

* In-plane resampling (shift, turn: cubic splines) blurs. MTF: ``D`` is the change of the
  same figure of a noiseless synthetic plate given the original's MTF50 and MTF10 and
  the same resampling. Noise: ``D = (r - 1) O`` for ``noise_sd`` and ``(1/r - 1) O`` for
  SDNR, ``r`` the ratio of the detrended SD (numpy) of the original's uniform region
  before and after the same resampling. d', threshold contrast, uniformity and the
  bead's figures have no allowance: the loss is at high frequencies, which the disks'
  spectra and the cell means barely weigh.
* Mirroring moves no sample (D = 0). The turn is not physical for the streaks: they turn
  with the volume while the streak family reads profiles along x (source travel), so
  ``streak_half_angle`` is checked not to rise rather than compared.
* Re-slicing keeps the planes of the test objects (z = 20.5 mm lies on both grids), so
  the in-plane figures must not change at all; depth figures change by sampling: ASF
  FWHM within bounds of the interpolation error, the streak half-angle (0.5 mm) within
  the bound of a blended plane's extent lying between its neighbours'.
"""

import json
import math
import re

import numpy as np
import pytest
from scipy import ndimage

from qa import PROJECT_ROOT
from qa.cli import main
from qa.io import write_dicom
from qa.locate import locate, travel_axis_hint
from qa.locate.layout import Layout, Placed, Pose
from qa.measure import mtf as mtf_family
from qa.phantom import load_phantom
from qa.phantom.model import Shape
from qa.simulate.profiles import load_geometry
from qa.simulate.run import simulate
from qa.volume import Volume

pytestmark = pytest.mark.slow

PHANTOM = PROJECT_ROOT / "phantoms" / "lacuna-dbt-demo.yaml"
LIMITS = PROJECT_ROOT / "thresholds" / "demo.yaml"
GEOMETRY = PROJECT_ROOT / "phantoms" / "geometries" / "dbt-mid-arc.yaml"
K = 2.0
SHIFT_XY_MM = (6.0, -4.0)
TURN_DEG, TURN_ABOUT_XY_MM = 3.0, (0.0, 24.0)   # turned about the slab's centre
OBJECT_Z_MM = 20.5                              # every test object's height
TRANSFORMS = ("shift", "turn", "mirror", "planes_0.5mm", "planes_2mm")
DISKS = ("d6", "d3", "d1.5", "d0.8")
MTF = ("mtf50_x", "mtf10_x", "mtf50_y", "mtf10_y")
DEPTH = ("asf_fwhm", "bead_height_error", "streak_half_angle")
METRICS = MTF + DEPTH + ("noise_sd", "uniformity") + tuple(
    f"{f}_{d}" for d in DISKS for f in ("sdnr", "dprime_npw", "dprime_npwe", "threshold_contrast"))
IN_PLANE = tuple(m for m in METRICS if m not in DEPTH)
# --- the transforms (world points (x, y) mm; arrays [z, y, x]) --------------------------
def _padded(vol, pad_mm):
    """``vol`` padded in-plane (edge values); the origin follows, so nothing moves yet."""
    dz, dy, dx = vol.spacing_mm
    p = int(math.ceil(pad_mm / min(dy, dx)))
    data = np.pad(vol.data, ((0, 0), (p, p), (p, p)), mode="edge")
    return data, (vol.origin_mm[0], vol.origin_mm[1] - p * dy, vol.origin_mm[2] - p * dx)


def shifted(vol, shift_xy_mm=SHIFT_XY_MM):
    """The phantom moved by ``shift_xy_mm`` in volume coordinates (cubic splines)."""
    data, origin = _padded(vol, 2.0 + max(map(abs, shift_xy_mm)))
    dz, dy, dx = vol.spacing_mm
    out = np.empty_like(data)
    for k in range(len(data)):
        ndimage.shift(data[k], (shift_xy_mm[1] / dy, shift_xy_mm[0] / dx), order=3,
                      mode="nearest", output=out[k])
    return Volume(out, vol.spacing_mm, origin, vol.meta)


def turned(vol, turn_deg=TURN_DEG, about_xy_mm=TURN_ABOUT_XY_MM):
    """The phantom turned counter-clockwise (+x towards +y) about a world point."""
    data, origin = _padded(vol, 4.0)  # a 3 deg turn moves the field's corners 2.1 mm
    dz, dy, dx = vol.spacing_mm
    t = math.radians(turn_deg)
    # An output point p takes the input at c + R(-t) (p - c); rows and columns are (y, x).
    back_xy = np.array([[math.cos(t), math.sin(t)], [-math.sin(t), math.cos(t)]])
    scale = np.diag([dy, dx])
    m = np.linalg.inv(scale) @ back_xy[::-1, ::-1] @ scale
    c = np.array([(about_xy_mm[1] - origin[1]) / dy, (about_xy_mm[0] - origin[2]) / dx])
    out = np.empty_like(data)
    for k in range(len(data)):
        ndimage.affine_transform(data[k], m, offset=c - m @ c, order=3, mode="nearest",
                                 output=out[k])
    return Volume(out, vol.spacing_mm, origin, vol.meta)


def mirrored(vol):
    return Volume(vol.data[:, :, ::-1], vol.spacing_mm, vol.origin_mm, vol.meta)


def resliced(vol, plane_mm):
    """Planes every ``plane_mm`` from the first one, linearly interpolated along z."""
    z = vol.axis_mm(0)
    new = np.arange(z[0], z[-1] + 1e-9, plane_mm)
    f = (new - z[0]) / vol.spacing_mm[0]
    lo = np.clip(np.floor(f).astype(int), 0, len(z) - 2)
    w = (f - lo).astype(np.float32)[:, None, None]
    data = vol.data[lo] * (1 - w) + vol.data[lo + 1] * w
    return Volume(data, (plane_mm,) + vol.spacing_mm[1:], (new[0],) + vol.origin_mm[1:],
                  vol.meta)


MAKE = {"shift": shifted, "turn": turned, "mirror": mirrored,
        "planes_0.5mm": lambda v: resliced(v, 0.5), "planes_2mm": lambda v: resliced(v, 2.0)}


def truth(name, vol):
    """(shift_xy, rotation_deg, mirrored) taking definition points to the copy ``name``."""
    if name == "shift":
        return SHIFT_XY_MM, 0.0, False
    if name == "turn":
        t, (cx, cy) = math.radians(TURN_DEG), TURN_ABOUT_XY_MM
        return (cx - (math.cos(t) * cx - math.sin(t) * cy),
                cy - (math.sin(t) * cx + math.cos(t) * cy)), TURN_DEG, False
    if name == "mirror":  # x -> 2 c - x about the array's middle column
        return (2 * (vol.origin_mm[2] + (vol.shape[2] - 1) / 2 * vol.spacing_mm[2]), 0.0), \
            0.0, True
    return (0.0, 0.0), 0.0, False


def moved_xy(pose, xy):
    (tx, ty), rot, mirror = pose
    x, y = (-xy[0] if mirror else xy[0]), xy[1]
    c, s = math.cos(math.radians(rot)), math.sin(math.radians(rot))
    return c * x - s * y + tx, s * x + c * y + ty


# --- what the transform alone does -----------------------------------------------------
def super_gaussian(f50, f10):
    """(f0, p) of MTF(f) = exp(-(f / f0)^p) through MTF(f50) = 0.5 and MTF(f10) = 0.1."""
    p = math.log(math.log(10) / math.log(2)) / math.log(f10 / f50)
    return f50 / math.log(2) ** (1 / p), p


def synthetic_plate(vol, plate, model_x, model_y, *, oversample=4, half_mm=13.0):
    """A plane on ``vol``'s grid holding ``plate`` blurred by separable MTFs (x, y).

    The blurred plate is band-limited (the MTFs are below 1e-20 at the fine grid's
    Nyquist frequency), so it is computed exactly on a grid ``oversample`` times finer,
    from the analytic Fourier transform of a turned rectangle (a product of sincs) times
    the MTFs, and sampled at the pixel centres: its presampled MTF is the model's.
    """
    (cx, cy, _), (hx, hy, _) = plate.shape.centre_xyz_mm, plate.shape.half_xyz_mm
    phi = math.radians(plate.shape.rotation_deg[2])
    _, dy, dx = vol.spacing_mm
    _, iy0, ix0 = (int(i) for i in vol.to_index((OBJECT_Z_MM, cy - half_mm, cx - half_mm)))
    n = int(round(2 * half_mm / dx))
    x0, y0 = vol.origin_mm[2] + ix0 * dx, vol.origin_mm[1] + iy0 * dy
    u, v = np.meshgrid(np.fft.fftfreq(n * oversample, dx / oversample),
                       np.fft.fftfreq(n * oversample, dy / oversample))
    spectrum = (4 * hx * hy * np.sinc(2 * hx * (u * math.cos(phi) + v * math.sin(phi)))
                * np.sinc(2 * hy * (-u * math.sin(phi) + v * math.cos(phi)))
                * np.exp(-2j * np.pi * (u * (cx - x0) + v * (cy - y0)))
                * np.exp(-(np.abs(u) / model_x[0]) ** model_x[1]
                         - (np.abs(v) / model_y[0]) ** model_y[1]))
    # The inverse transform's sum times du dv: ifft2 divides by N^2, N^2 du dv = s^2/(dx dy).
    fine = np.fft.ifft2(spectrum).real * oversample ** 2 / (dx * dy)
    plane = np.zeros((1,) + vol.shape[1:], np.float32)
    plane[0, iy0:iy0 + n, ix0:ix0 + n] = fine[::oversample, ::oversample]
    return Volume(plane, vol.spacing_mm, (OBJECT_Z_MM,) + vol.origin_mm[1:])


def plate_mtf(plane, phantom, pose):
    """The MTF family's figures of the synthetic plate placed where ``pose`` puts it."""
    obj = phantom.get("edge")
    rx, ry, rz = obj.shape.rotation_deg
    x, y = moved_xy(pose, obj.shape.centre_xyz_mm[:2])
    shape = Shape(obj.shape.kind, (x, y, OBJECT_Z_MM), obj.shape.half_xyz_mm,
                  (rx, -ry if pose[2] else ry, (-rz if pose[2] else rz) + pose[1]))
    layout = Layout(phantom, {"edge": Placed(obj, shape)},
                    Pose(pose[0], pose[1], pose[2]))
    return {m.name: m.value for m in mtf_family.measure(plane, layout).measurements}


def detrended_sd(vol, xy_mm, radius_mm=5.0):
    """SD of plane z = 20.5 mm in a disk after a least-squares quadratic (numpy)."""
    plane = np.asarray(vol.data[vol.plane_index(OBJECT_Z_MM)], float)
    yy, xx = np.meshgrid(vol.axis_mm(1) - xy_mm[1], vol.axis_mm(2) - xy_mm[0], indexing="ij")
    inside = np.hypot(xx, yy) <= radius_mm
    x, y = xx[inside] / radius_mm, yy[inside] / radius_mm
    basis = np.stack([np.ones_like(x), x, y, x * x, x * y, y * y], axis=1)
    coef, *_ = np.linalg.lstsq(basis, plane[inside], rcond=None)
    return float(np.std(plane[inside] - basis @ coef, ddof=basis.shape[1]))


def fwhm_sampling_bound_mm(fwhm_mm, plane_mm, *, blended_from_mm=None):
    """Bound on the FWHM error of a spline through ASF samples ``plane_mm`` apart.

    For a Gaussian ASF of this FWHM (a model: the bound needs derivatives), a cubic
    spline errs by at most (5/384) h^4 max|f''''| (Hall & Meyer, J. Approx. Theory 16,
    1976), max|f''''| = 3 / s^4; samples that are linear blends of planes H apart err by
    at most H^2/8 max|f''| = H^2 / (8 s^2) (linear interpolation error, e.g. Burden &
    Faires, Numerical Analysis, Thm 3.3). A value error e moves each half-maximum
    crossing by e / |f'|, |f'| = 0.5 (FWHM/2) / s^2 there; the original's own 1 mm
    spline error is added.
    """
    s = fwhm_mm / (2 * math.sqrt(2 * math.log(2)))
    err = sum(5 / 384 * h ** 4 * 3 / s ** 4 for h in (plane_mm, 1.0))
    if blended_from_mm:
        err += blended_from_mm ** 2 / (8 * s ** 2)
    return 2 * err / (0.5 * (fwhm_mm / 2) / s ** 2)


def blend_bound_deg(angle_deg, vol, *, original_mm=1.0, min_offset_mm=2.0):
    """Bound on the change of the streak half-angle fitted over re-sliced planes.

    The extent of a plane blended from two neighbours lies between theirs (a profile
    above the threshold in both is above it in their mean; the fixed fraction of the
    in-focus contrast is the threshold here), i.e. within b H / 2 of the line E = a + b |dz|
    through them. The least-squares slope is sum w_i E_i, w_i = (x_i - mean) / S_xx,
    so it moves by at most (b H / 2) sum over blended planes of |w_i|; the half-angle
    atan(b/2) by that over 2 (1 + b^2/4).
    """
    z = vol.axis_mm(0)
    off = z - OBJECT_Z_MM
    used = np.abs(off) >= min_offset_mm - 1e-9
    x = np.abs(off[used])
    blended = ~np.isclose(np.remainder(z[used] - z[0], original_mm), 0.0)
    w = (x - x.mean()) / np.sum((x - x.mean()) ** 2)
    b = 2 * math.tan(math.radians(angle_deg))
    db = b * original_mm / 2 * np.abs(w[blended]).sum()
    return math.degrees(db / 2 / (1 + b * b / 4)), int(used.sum())


# --- the runs ---------------------------------------------------------------------------
#: The log's pose line (qa/report/pdf.py); any white space may stand for a space.
POSE_TEXT = r"\s+".join((
    r"Pose", "fitted", r"from\s+(?P<beads>[\w,\s]+?):", "shift", r"\((?P<x>-?\d+\.\d+),",
    r"(?P<y>-?\d+\.\d+)\)", "mm", "in-plane,", r"(?P<z>-?\d+\.\d+)", "mm", "in", "height,",
    "rotation", r"(?P<rot>-?\d+\.\d+)°,", "(?P<mirror>not\\s+mirrored|mirrored)"))


def _assess(vol, folder, laterality="R", options=()):
    path = write_dicom(vol, folder / "volume.dcm", laterality=laterality)
    js = folder / "results.json"
    code = main(["assess", str(path), "--phantom", str(PHANTOM), "--limits", str(LIMITS),
                 "--unit", "FEN-DBT-1", "--out", str(folder), "--json", str(js),
                 "--no-history", *options])
    from pypdf import PdfReader

    result = json.loads(js.read_text())
    text = "\n".join(p.extract_text() for p in PdfReader(result["report"]).pages)
    return code, result["metrics"], re.search(POSE_TEXT, text), result["pose"]


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    phantom = load_phantom(PHANTOM)
    original = simulate(phantom, load_geometry(GEOMETRY), recon="fbp", seed=7).volume
    out = {"original": _assess(original, tmp_path_factory.mktemp("original"))}
    base = out["original"][1]
    model = {d: super_gaussian(base[f"mtf50_{d}"]["value"], base[f"mtf10_{d}"]["value"])
             for d in "xy"}
    plate = synthetic_plate(original, phantom.get("edge"), model["x"], model["y"])
    plate_before = plate_mtf(plate, phantom, truth("original", original))
    flat = phantom.get("flat").shape.centre_xyz_mm[:2]
    plane = original.data[original.plane_index(OBJECT_Z_MM)][None]
    one_plane = Volume(plane, original.spacing_mm, (OBJECT_Z_MM,) + original.origin_mm[1:])
    sd_before = detrended_sd(one_plane, flat)
    change = {}  # (transform, metric) -> what the transform alone does: D or (-A, A)
    for name in TRANSFORMS:
        copy = MAKE[name](original)
        pose = truth(name, original)
        out[name] = _assess(copy, tmp_path_factory.mktemp(name), "L" if name == "mirror" else "R")
        if name in ("shift", "turn"):
            after = plate_mtf(MAKE[name](plate), phantom, pose)
            r = detrended_sd(MAKE[name](one_plane), moved_xy(pose, flat)) / sd_before
            change[name, "noise_sd"] = (r - 1) * base["noise_sd"]["value"]
            for d in DISKS:
                change[name, f"sdnr_{d}"] = (1 / r - 1) * base[f"sdnr_{d}"]["value"]
            for m in MTF:
                change[name, m] = after[m] - plate_before[m]
        if name.startswith("planes"):
            h = copy.spacing_mm[0]
            a = fwhm_sampling_bound_mm(base["asf_fwhm"]["value"], h,
                                       blended_from_mm=1.0 if h < 1.0 else None)
            change[name, "asf_fwhm"] = (-a, a)
            if h < 1.0:
                bound, n_planes = blend_bound_deg(base["streak_half_angle"]["value"], copy)
                change[name, "streak_half_angle"] = (-bound, bound)
                change[name, "streak_planes"] = n_planes
        del copy
    out["change"], out["plate_before"], out["model"] = change, plate_before, model
    out["volume"] = original
    out["truth"] = {name: truth(name, original) for name in ("original",) + TRANSFORMS}
    return out


def _u(*ms):
    return math.sqrt(sum((m["uncertainty"] or 0.0) ** 2 for m in ms))


@pytest.mark.parametrize("name", ("original",) + TRANSFORMS)
def test_assess_runs_and_finds_the_pose(runs, name):
    code, metrics, pose, pose_json = runs[name]
    assert code in (0, 1)
    for m in METRICS:
        assert metrics[m]["value"] is not None, (m, metrics[m]["note"])
    assert pose is not None, "no fitted pose in the log"
    assert re.sub(r"\s", "", pose["beads"]) == "bead,b2,b3"
    (tx, ty), rot, mirror = runs["truth"][name]
    # The locator's stated accuracy, 0.3 mm and 0.3 deg (tests/locate/conftest.py, from
    # the brief); the log prints two decimals.
    assert float(pose["x"]) == pytest.approx(tx, abs=0.3)
    assert float(pose["y"]) == pytest.approx(ty, abs=0.3)
    assert float(pose["rot"]) == pytest.approx(rot, abs=0.3)
    assert float(pose["z"]) == pytest.approx(0.0, abs=0.3)
    assert (pose["mirror"] == "mirrored") == mirror, pose["mirror"]
    # The JSON carries the same pose and its fit residual (to the log's two decimals).
    assert f"{pose_json['shift_x_mm']:.2f}" == pose["x"] and pose_json["mirrored"] == mirror
    assert f"{pose_json['rotation_deg']:.2f}" == pose["rot"]
    assert pose_json["fitted_from"] == ["bead", "b2", "b3"] and pose_json["residual_mm"] < 0.3


def _cases():
    for name in TRANSFORMS:
        for m in METRICS:
            if (name, m) == ("turn", "streak_half_angle"):
                continue  # not comparable: see test_turn_streak_half_angle
            yield pytest.param(name, m, id=f"{name}-{m}")


@pytest.mark.parametrize("name,metric", list(_cases()))
def test_figure_is_the_original_within_its_uncertainty(runs, name, metric):
    o, t = runs["original"][1][metric], runs[name][1][metric]
    change = runs["change"].get((name, metric), 0.0)
    lo, hi = change if isinstance(change, tuple) else (min(0.0, change), max(0.0, change))
    d, ku = t["value"] - o["value"], K * _u(o, t)
    assert lo - ku <= d <= hi + ku, (f"{metric}: {o['value']:.6g} -> {t['value']:.6g}, change "
                                     f"{d:+.4g}, allowed [{lo:+.4g}, {hi:+.4g}] +- {ku:.4g}")


@pytest.mark.parametrize("name", ("planes_0.5mm", "planes_2mm"))
def test_resliced_in_plane_figures_come_from_the_same_plane(runs, name):
    # z = 20.5 mm is a plane of both new grids and carries the original's values: the
    # in-plane figures may differ only by the 16-bit DICOM quantisation (a small fraction
    # of their uncertainty, as in test_end_to_end.py).
    for m in IN_PLANE:
        o, t = runs["original"][1][m], runs[name][1][m]
        tol = max(1e-6 * abs(o["value"]), 0.05 * (o["uncertainty"] or 0.0))
        assert t["value"] == pytest.approx(o["value"], abs=tol), m
    bound = runs["change"].get((name, "streak_planes"))
    if bound is not None:  # the streak bound was computed over the planes the fit used
        assert f"from {bound} of {bound} planes" in runs[name][1]["streak_half_angle"]["note"]


def test_synthetic_plate_has_the_model_mtf(runs):
    # The allowance's premise: before any transform the MTF family reads the synthetic
    # plate's MTF50 and MTF10 where the closed-form model puts them, exp(-(f/f0)^p) = 0.5
    # and 0.1. Within 1 %: three times the largest deviation seen when this was written
    # (0.35 %, from reading the curve between its frequency samples).
    for d in "xy":
        f0, p = runs["model"][d]
        for level, name in ((0.5, f"mtf50_{d}"), (0.1, f"mtf10_{d}")):
            want = f0 * math.log(1 / level) ** (1 / p)
            assert runs["plate_before"][name] == pytest.approx(want, rel=0.01), name


def test_turn_streak_half_angle(runs):
    # Turned with the volume, the streaks run 3 deg off x while the family reads profiles
    # along x over the bead's rows: their far ends leave those rows and the extents can
    # only shrink. What must hold: an extent in every plane (the note's "of N planes";
    # the fit may still drop outliers), and no larger half-angle.
    o, t = runs["original"][1]["streak_half_angle"], runs["turn"][1]["streak_half_angle"]
    planes = re.compile(r"from \d+ of (\d+) planes")
    assert planes.search(t["note"])[1] == planes.search(o["note"])[1], t["note"]
    assert t["value"] <= o["value"] + K * _u(o, t)


def _stored_down_the_columns(vol):
    """``vol`` as a unit that stores its source travel down the columns keeps it: rows and
    columns exchanged by numpy's transpose, spacing and origin following."""
    (dz, dy, dx), (z0, y0, x0) = vol.spacing_mm, vol.origin_mm
    return Volume(np.ascontiguousarray(np.asarray(vol.data).transpose(0, 2, 1)), (dz, dx, dy),
                  (z0, x0, y0), vol.meta)


def test_travel_down_the_columns_gives_the_same_figures(runs, tmp_path):
    # Read back with --travel-axis columns, the stored copy is the original voxel for
    # voxel (the writer's 16-bit quantisation takes the same range from the same values),
    # so every figure, its uncertainty, its verdict and the fitted pose must be the
    # original's exactly, and the JSON must say how the volume was read.
    stored = _stored_down_the_columns(runs["volume"])
    assert stored.shape == runs["volume"].shape[:1] + runs["volume"].shape[:0:-1]
    code, metrics, pose, _ = _assess(stored, tmp_path, options=("--travel-axis", "columns"))
    o_code, o_metrics, o_pose, _ = runs["original"]
    assert code == o_code and set(metrics) == set(o_metrics)
    for name, o in o_metrics.items():
        t = metrics[name]
        assert (t["value"], t["uncertainty"], t["verdict"]) == \
            (o["value"], o["uncertainty"], o["verdict"]), name
    assert pose is not None and pose.groupdict() == o_pose.groupdict()
    volume = json.loads((tmp_path / "results.json").read_text())["volume"]
    assert volume["travel_axis"] == "columns"


def test_travel_down_the_columns_read_along_rows_suggests_the_option(runs):
    # Read as stored (travel along the rows, the default) the copy is the phantom
    # mirrored about x = y: a quarter turn no bead search covers. The locator must find
    # nothing and its note must name the option.
    layout = locate(_stored_down_the_columns(runs["volume"]), load_phantom(PHANTOM))
    assert layout.pose.fitted_from == ()
    assert not any(p.found for p in layout.with_role("bead"))
    assert travel_axis_hint({}) in layout.pose.note
    assert "--travel-axis columns" in layout.pose.note
