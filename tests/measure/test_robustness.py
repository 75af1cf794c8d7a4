"""Robustness sweeps: noise, object size, edge angle and misplaced nominal positions.

Each family's figure must stay within its stated accuracy while the metric is valid and
be "not measured" with a reason past that point, never a number. Truths are closed
forms (a Gaussian depth profile, a Gaussian-blurred pixel-integrated edge, disks in white
noise) or the geometry of a simulated acquisition. Seeds are fixed.
"""

import dataclasses
import math

import numpy as np
import pytest
from scipy.optimize import brentq

from qa import PROJECT_ROOT
from qa.locate import locate
from qa.locate.layout import Layout, Placed
from qa.locate.nominal import locate_nominal
from qa.measure import coverage, detectability, mtf, streak
from qa.measure.asf import measure_asf
from qa.phantom.model import Phantom, PhantomObject, Shape
from qa.simulate.acquire import detect, expected_transmissions
from qa.simulate.geometry import Detector
from qa.simulate.profiles import load_geometry
from qa.simulate.recon import reconstruct
from qa.simulate.recon.grid import ReconGrid
from qa.volume import Volume
from scipy.special import ndtr


def by_name(result):
    return {m.name: m for m in result.measurements}


# --- ASF: a bead whose contrast follows a Gaussian in z (as tests/measure/test_asf.py) -------

ASF_FWHM = 6.0


def asf_volume(*, noise=0.0, seed=0, radius=0.5, nominal_xy=(0.0, 0.0), analysis=None,
               fwhm_mm=ASF_FWHM):
    """Bead of contrast 1 at (0, 0), depth profile a Gaussian of FWHM ``fwhm_mm`` peaking
    at z = 20.3 mm, planes 1 mm apart; its definition placed at ``nominal_xy``."""
    sigma = fwhm_mm / (2 * math.sqrt(2 * math.log(2)))
    z = np.arange(41) + 0.5
    y, x = np.mgrid[:160, :360]      # 16 mm in y: room for the strips beside a 3 mm bead
    disk = ((y - 80) ** 2 + (x - 180) ** 2) * 0.01 <= radius ** 2
    data = 10.0 + np.exp(-0.5 * ((z - 20.3) / sigma) ** 2)[:, None, None] * disk
    data = data + noise * np.random.default_rng(seed).standard_normal(data.shape)
    vol = Volume(data, (1.0, 0.1, 0.1), (0.5, -8.0, -18.0))
    bead = PhantomObject("b1", "bead", Shape("ellipsoid", (*nominal_xy, 20.0), (radius,) * 3),
                         "aluminium", 1.0)
    return vol, Phantom("t", "", 20.0, (bead,), "t.yaml", analysis or {})


def asf_fwhm(noise=0.0, seed=0, **kw):
    vol, ph = asf_volume(noise=noise, seed=seed, **kw)
    layout = Layout(ph, {"b1": Placed(ph.objects[0], ph.objects[0].shape)}) \
        if "nominal_xy" not in kw else locate_nominal(vol, ph)
    return by_name(measure_asf(vol, layout))["asf_fwhm"]


def within_asf_accuracy(m):
    # 4 % (the required accuracy of test_asf.py) plus the stated uncertainty at k = 2
    # (common practice) for the noise.
    return abs(m.value - ASF_FWHM) <= 0.04 * ASF_FWHM + 2 * m.uncertainty


def covered(noise, seeds=range(20)):
    """How many of 20 seeded repeats are within the accuracy, and how many measured."""
    got = [asf_fwhm(noise, seed) for seed in seeds]
    done = [m for m in got if m.value is not None]
    return sum(within_asf_accuracy(m) for m in done), len(done)


@pytest.mark.parametrize("noise", [0.0, 0.3, 0.8])
def test_asf_noise_sweep_stays_accurate(noise):
    # Contrast 1 over a bead region whose mean has SD noise / sqrt(78): region SNR 29 at
    # 0.3 and 11 at 0.8 (focus SNR of asf.py about 19 at 0.8). Every repeat is measured; at
    # least 18 of 20 within 4 % + 2u (k = 2 covers 95 % of normal errors; 18 leaves room
    # for the scatter of 20 draws).
    ok, done = covered(noise)
    assert done == 20 and ok >= 18, (noise, ok)


def test_asf_noise_past_validity_is_not_measured():
    m = asf_fwhm(3.0, 0)
    assert m.value is None and "below 5 times the noise" in m.note


@pytest.mark.parametrize("noise", [1.2, 1.6, 2.0])
def test_asf_near_its_noise_limit_is_accurate_or_not_measured(noise):
    # Region SNR 7, 5.5 and 4.4; focus SNR (asf.py) about 12, 9 and 7, around its limit
    # of 10. Each repeat is either "not measured" with the reason or free of gross error:
    # within 4 % + 3u (k = 3, common practice for an outlier bound). Before the focus
    # check, 3 of 20 repeats at noise 2 reported 1.6-3.7 mm for 6 mm, 2.6-4.2 u off.
    got = [asf_fwhm(noise, seed) for seed in range(20)]
    for seed, m in enumerate(got):
        if m.value is None:
            assert "too noisy" in m.note or "noise" in m.note, (seed, m)
        else:
            assert abs(m.value - ASF_FWHM) <= 0.04 * ASF_FWHM + 3 * m.uncertainty, (seed, m)
    measured = sum(m.value is not None for m in got)
    assert measured < 20 or noise == 1.2, measured   # past 1.2 the limit takes effect


@pytest.mark.parametrize("radius", [0.25, 0.5, 1.0, 1.5])
def test_asf_bead_size_sweep(radius):
    m = asf_fwhm(0.05, 1, radius=radius)
    assert within_asf_accuracy(m), m


def test_asf_misplaced_nominal_position():
    reference = asf_fwhm(0.05, 1, nominal_xy=(0.0, 0.0)).value
    for dx in (-2.0, 2.0):
        for dy in (-2.0, 2.0):
            m = asf_fwhm(0.05, 1, nominal_xy=(dx, dy))
            # Found by the local search: the same bead, the same figure (to rounding).
            assert m.value == pytest.approx(reference, abs=1e-6) and within_asf_accuracy(m)
    # 5 mm away with a 4 mm search radius, and 6 mm away with the default 5 mm.
    for xy, opts in (((5.0, 0.0), {"locate": {"search_radius_mm": 4.0}}), ((0.0, 6.0), None)):
        m = asf_fwhm(0.05, 1, nominal_xy=xy, analysis=opts)
        assert m.value is None and "not found near" in m.note


# --- Streak and coverage: small simulated shift-and-add reconstructions ----------------------

GRID = ReconGrid.from_field((-16, 16), (-4, 4), (0, 41), pixel_mm=0.1, plane_mm=1.0)


def bead_phantom(radius=0.5, nominal_xy=(0.0, 0.0), analysis=None):
    bead = PhantomObject("bead", "bead", Shape("ellipsoid", (*nominal_xy, 20.5), (radius,) * 3),
                         "aluminium", 0.9)
    return Phantom("bead-only", "", 20.0, (bead,), "bead.yaml", analysis or {})


def mid_arc():
    """The mid arc on a small detector, step-and-shoot (as tests/measure/test_streak.py)."""
    g = load_geometry(PROJECT_ROOT / "phantoms" / "geometries" / "dbt-mid-arc.yaml")
    return dataclasses.replace(g, detector=Detector(0.1, 520, 100, (-25.95, -4.95)))


def ray_half_angle(g, z=20.5):
    s = g.source_xyz(max(g.angles_deg))
    return math.degrees(math.atan(s[0] / (s[2] - z)))


@pytest.fixture(scope="module")
def mid_volumes():
    g = mid_arc()
    t = expected_transmissions(bead_phantom(), g)
    out = {}
    for n0 in (None, 400.0, 20.0, 0.1):
        gg = dataclasses.replace(g, photons_per_pixel=n0)
        out[n0] = reconstruct(detect(t, gg, seed=5, noise=n0 is not None), GRID, method="saa")
    return g, out


def within_streak_accuracy(g, m):
    # Required within 1.5 degrees of the arc (test_streak.py); the noisy sweep in
    # development stayed within 0.7 degree of the rays' half-angle, checked to 1 degree.
    return abs(m.value - g.half_arc_deg) <= 1.5 and abs(m.value - ray_half_angle(g)) <= 1.0


def test_streak_and_coverage_noise_sweep(mid_volumes):
    g, vols = mid_volumes
    for n0 in (None, 400.0):
        ph = bead_phantom()
        layout = locate_nominal(vols[n0], ph)
        m = by_name(streak.measure_streak(vols[n0], layout))["streak_half_angle"]
        assert m.value is not None and within_streak_accuracy(g, m), (n0, m)
        c = coverage.measure(vols[n0], layout).measurements[0]
        assert abs(c.value - g.half_arc_deg) <= 3.0, (n0, c)       # issue: within 3 degrees
    # 20 quanta per pixel: the noise raises every plane's threshold past 1.5 times the
    # fraction, so no extent is taken (the bead itself and its coverage still are).
    layout = locate_nominal(vols[20.0], bead_phantom())
    got = by_name(streak.measure_streak(vols[20.0], layout))
    assert got["streak_half_angle"].value is None
    assert "too noisy for the threshold" in got["streak_half_angle"].note
    c = coverage.measure(vols[20.0], layout).measurements[0]
    assert abs(c.value - g.half_arc_deg) <= 3.0
    # 0.1 quantum per pixel: the bead is lost and every figure says so.
    layout = locate_nominal(vols[0.1], bead_phantom())
    for m in (list(streak.measure_streak(vols[0.1], layout).measurements)
              + list(coverage.measure(vols[0.1], layout).measurements)):
        assert m.value is None and "not found" in m.note


def test_streak_of_narrow_arc_fbp_in_noise():
    # Narrow-arc FBP at 400 quanta per pixel: the extents are noise-shaped (seeds 0-3 gave
    # 5.2-8.1 degrees for rays at 7.27 before the fit-SD limit of streak.py); each seed
    # must now be within 1.5 degrees of the arc or not measured with the reason.
    g = dataclasses.replace(mid_arc(), angles_deg=tuple(np.linspace(-7.5, 7.5, 9)),
                            pivot_height_mm=40.0, source_to_image_mm=660.0)
    t = expected_transmissions(bead_phantom(), g)
    gg = dataclasses.replace(g, photons_per_pixel=400.0)
    for seed in range(4):
        vol = reconstruct(detect(t, gg, seed=seed), GRID, method="fbp")
        m = streak.measure_streak(vol, locate_nominal(vol, bead_phantom())).measurements[0]
        assert m.value is None or abs(m.value - 7.5) <= 1.5, (seed, m)
        assert m.value is not None or "scatter about their line" in m.note, (seed, m)


@pytest.mark.parametrize("radius", [0.25, 0.75])     # the 8 mm field holds the strips
def test_streak_and_coverage_bead_size(radius):
    g = dataclasses.replace(mid_arc(), photons_per_pixel=None)
    ph = bead_phantom(radius)
    vol = reconstruct(detect(expected_transmissions(ph, g), g, noise=False), GRID, method="saa")
    layout = locate_nominal(vol, ph)
    m = by_name(streak.measure_streak(vol, layout))["streak_half_angle"]
    assert within_streak_accuracy(g, m), m
    c = coverage.measure(vol, layout).measurements[0]
    assert abs(c.value - g.half_arc_deg) <= 3.0, c


def test_streak_and_coverage_misplaced_nominal_position(mid_volumes):
    g, vols = mid_volumes
    vol = vols[400.0]
    ref = {fam.__name__: fam(vol, locate_nominal(vol, bead_phantom())).measurements[0].value
           for fam in (streak.measure_streak, coverage.measure)}
    for xy in ((2.0, 2.0), (-2.0, 2.0), (2.0, -2.0), (-2.0, -2.0)):
        layout = locate_nominal(vol, bead_phantom(nominal_xy=xy))
        for fam in (streak.measure_streak, coverage.measure):
            assert fam(vol, layout).measurements[0].value == \
                pytest.approx(ref[fam.__name__], abs=1e-6)
    far = bead_phantom(nominal_xy=(0.0, 5.0), analysis={"locate": {"search_radius_mm": 4.0}})
    layout = locate_nominal(vol, far)
    for fam in (streak.measure_streak, coverage.measure):
        for m in fam(vol, layout).measurements:
            assert m.value is None and "not found near" in m.note


# --- MTF: a Gaussian-blurred, pixel-integrated tilted square (as tests/measure/test_mtf.py) --

PITCH, SIGMA_PX = 0.1, 1.0


def plate_plane(angle_deg, centre_xy=(8.03, 7.96), n=160, ss=6, half=4.0, sigma_px=SIGMA_PX):
    """Mean over each pixel (ss x ss points) of a square blurred by a Gaussian of SD
    ``sigma_px`` pixels and turned by ``angle_deg`` about z; step 100 on a level of 10."""
    t = ((np.arange(n * ss) + 0.5) / ss - 0.5) * PITCH
    x, y = np.meshgrid(t, t)
    th = math.radians(angle_deg)
    dx, dy = x - centre_xy[0], y - centre_xy[1]
    u, v = math.cos(th) * dx + math.sin(th) * dy, -math.sin(th) * dx + math.cos(th) * dy
    s = sigma_px * PITCH

    def box(w):
        return ndtr((half - w) / s) - ndtr((-half - w) / s)

    return 10.0 + 100.0 * (box(u) * box(v)).reshape(n, ss, n, ss).mean(axis=(1, 3))


def mtf50_truth(sigma_px=SIGMA_PX, level=0.5):
    # Closed form exp(-2 pi^2 s^2 f^2) |sinc(a f)|, f in cycles per pixel.
    f = brentq(lambda f: math.exp(-2 * math.pi ** 2 * sigma_px ** 2 * f ** 2)
               * abs(np.sinc(f)) - level, 1e-6, 0.999)
    return f / PITCH


def plate_phantom(angle_deg, centre_xy=(8.03, 7.96)):
    plate = PhantomObject("plate", "edge", Shape("box", (*centre_xy, 2.0), (4.0, 4.0, 0.5),
                                                 (0.0, 0.0, angle_deg)), None, 0.05)
    slab = PhantomObject("slab", "background", Shape("box", (8, 8, 2), (9, 9, 2)), None, 0.02)
    return Phantom("plate", "", 20.0, (slab, plate), "plate.yaml")


def mtf_of(plane, phantom, *, nominal=True):
    vol = Volume(np.stack([plane] * 3), (1.0, PITCH, PITCH), (1.0, 0.0, 0.0))
    layout = Layout(phantom, {o.id: Placed(o, o.shape) for o in phantom.objects}) \
        if nominal else locate(vol, phantom)
    return by_name(mtf.measure(vol, layout, None))


def within_mtf_accuracy(m, truth):
    # 3 % (required in test_mtf.py) plus the stated uncertainty at k = 2 for the noise.
    return abs(m.value - truth) <= 0.03 * truth + 2 * m.uncertainty


@pytest.mark.parametrize("angle", [2.0, 4.0, 8.0, 12.0])
def test_mtf_edge_angle_and_noise_sweep(angle):
    truth, clean = mtf50_truth(), plate_plane(angle)
    for noise in (0.0, 1.0, 5.0):        # in % of the step
        plane = clean + np.random.default_rng(int(angle * 10)).normal(0, noise, clean.shape)
        got = mtf_of(plane, plate_phantom(angle))
        for d in ("x", "y"):
            m = got[f"mtf50_{d}"]
            assert m.value is not None and within_mtf_accuracy(m, truth), (angle, noise, d, m)


def test_mtf_past_validity_is_not_measured():
    # An edge turned only 0.3 degree shifts by 0.25 pixel along its region: the
    # oversampled ESF cannot be built. Noise at 20 % of the step hides the edge.
    cases = [(plate_plane(0.3), 0.3),
             (plate_plane(4.0) + np.random.default_rng(3).normal(0, 20.0, (160, 160)), 4.0)]
    for plane, angle in cases:
        for m in mtf_of(plane, plate_phantom(angle)).values():
            assert m.value is None and "no edge could be measured" in m.note


def test_mtf_misplaced_nominal_position():
    truth = mtf50_truth()
    plane = plate_plane(4.0) + np.random.default_rng(1).normal(0, 1.0, (160, 160))
    for dxy in ((2.0, 2.0), (-2.0, 2.0), (2.0, -2.0), (-2.0, -2.0)):
        got = mtf_of(plane, plate_phantom(4.0, (8.03 + dxy[0], 7.96 + dxy[1])), nominal=False)
        for name in ("mtf50_x", "mtf50_y"):
            assert within_mtf_accuracy(got[name], truth), (dxy, name, got[name])
    got = mtf_of(plane, plate_phantom(4.0, (13.03, 7.96)), nominal=False)   # 5 mm off
    assert all(m.value is None and "not found near" in m.note for m in got.values())


# --- Detectability: disks in white noise, found through the beads' pose ----------------------

BEADS = ((6.0, 6.0), (34.0, 8.0), (10.0, 30.0))
DISKS = (("d1", 14.0, 16.0, 1.0), ("d2", 24.0, 16.0, 2.0), ("d4", 24.0, 28.0, 4.0))


def disk_scene(*, shift=(0.0, 0.0), sigma=1.0, seed=0, disks=DISKS):
    """Nine planes of white noise (SD ``sigma``) on a level of 10; disks of contrast 1 in
    plane z = 4.5 mm, three compact bright beads for the pose; everything moved by
    ``shift`` from the definition."""
    ny, nx, nz = 400, 440, 9
    yy, xx = np.mgrid[0:ny, 0:nx] * 0.1
    z = np.arange(nz) + 0.5
    data = np.full((nz, ny, nx), 10.0)
    for bx, by in BEADS:
        r2 = (xx - bx - shift[0]) ** 2 + (yy - by - shift[1]) ** 2
        data += 40 * np.exp(-0.5 * r2 / 0.09)[None] * np.exp(-0.5 * ((z - 4.5) / 1.5) ** 2)[:, None, None]
    for _, x, y, d in disks:
        data[4] += np.hypot(xx - x - shift[0], yy - y - shift[1]) <= d / 2
    data += np.random.default_rng(seed).normal(0, sigma, data.shape)
    objs = [PhantomObject("slab", "background", Shape("box", (22, 20, 4.5), (22, 20, 4.5)), None, 0.02),
            PhantomObject("flat", "uniform", Shape("box", (36.0, 28.0, 4.5), (6.0, 9.0, 0.5)), None, None)]
    objs += [PhantomObject(f"b{i}", "bead", Shape("ellipsoid", (bx, by, 4.5), (0.5,) * 3),
                           "aluminium", 0.9) for i, (bx, by) in enumerate(BEADS)]
    objs += [PhantomObject(i, "disk", Shape("cylinder", (x, y, 4.5), (d / 2, d / 2, 0.5)), None, 0.03)
             for i, x, y, d in disks]
    return Volume(data, (1.0, 0.1, 0.1), (0.5, 0.0, 0.0)), Phantom("syn", "", 20.0, tuple(objs), "syn.yaml")


def pixels_in_disk(d):
    """Pixel centres within the radius on a 0.1 mm grid centred on a pixel (NPW's N)."""
    n = int(d / 0.2) + 2
    i, j = np.mgrid[-n:n + 1, -n:n + 1]
    return int(np.count_nonzero(np.hypot(i, j) * 0.1 <= d / 2 + 1e-12))


SCENES = [(0.5, (0.0, 0.0)), (1.0, (2.0, 2.0)), (1.0, (-2.0, 2.0)), (2.0, (2.0, -2.0)),
          (1.0, (-2.0, -2.0))]


@pytest.fixture(scope="module")
def disk_results():
    out = {}
    for sigma, shift in SCENES:
        vol, ph = disk_scene(shift=shift, sigma=sigma, seed=int(10 * sigma))
        layout = locate(vol, ph)
        out[sigma, shift] = (layout, by_name(detectability.measure(vol, layout, None)))
    return out


@pytest.mark.parametrize("sigma, shift", SCENES)
def test_detectability_noise_and_misplacement_sweep(disk_results, sigma, shift):
    layout, got = disk_results[sigma, shift]
    # The beads' pose recovers the shift (0.1 mm: a pixel).
    assert np.allclose(layout.pose.shift_xy_mm, shift, atol=0.1)
    for did, x, y, d in DISKS:
        # Closed forms: SDNR = C / sigma; NPW d' = C sqrt(N) / sigma (ICRU Report 54),
        # C = 1. Within 3 stated uncertainties (k = 3; 15 checks) plus, for d', 5 % for
        # the NPS from the 12 x 18 mm uniform region.
        m = got[f"sdnr_{did}"]
        assert abs(m.value - 1.0 / sigma) <= 3 * m.uncertainty, (did, m)
        m = got[f"dprime_npw_{did}"]
        truth = math.sqrt(pixels_in_disk(d)) / sigma
        assert abs(m.value - truth) <= 3 * m.uncertainty + 0.05 * truth, (did, m, truth)


def test_disks_are_placed_within_the_signal_roi_margin(disk_results):
    # The signal ROI (0.8 R) stays inside the disk while the placement is within 0.2 R.
    # (A template of 0.8 R matched a plateau of offsets up to 0.2 R, so noise put the
    # 4 mm disk 0.39-0.46 mm off in 3 of 5 scenes; the full footprint peaks sharply.)
    for (sigma, shift), (layout, _) in disk_results.items():
        for did, x, y, d in DISKS:
            cx, cy = layout.placed[did].centre_xyz_mm[:2]
            assert math.hypot(cx - x - shift[0], cy - y - shift[1]) <= 0.2 * d / 2, did


def test_detectability_past_validity_is_not_measured():
    # A 0.3 mm disk holds 7 pixels in its signal region (0.8 R): fewer than the 12 the
    # sector jackknife needs. A disk half outside the field is refused too.
    vol, ph = disk_scene(disks=DISKS + (("tiny", 30.0, 20.0, 0.3), ("out", 43.5, 20.0, 2.0)))
    got = by_name(detectability.measure(vol, locate(vol, ph), None))
    assert got["sdnr_tiny"].value is None and "too small" in got["sdnr_tiny"].note
    assert got["sdnr_out"].value is None and "outside" in got["sdnr_out"].note
    assert got["sdnr_d4"].value is not None
