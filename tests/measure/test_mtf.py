"""The "mtf" metric family (qa.measure.mtf) on a synthetic volume with a tilted plate.

Outside check: the plate in the in-focus plane is a square blurred by an isotropic
Gaussian of SD sigma and averaged over square pixels of pitch a, so each of its edges has
the closed-form presampled MTF exp(-2 pi^2 sigma^2 f^2) |sinc(a f)| (slanted-edge method:
IEC 62220-1-1:2015; Samei, Flynn & Reimann, Med Phys 25, 1998). The volume is built here
by point-sampling each pixel 6 x 6 times; that turns the aperture term into
sin(pi a f) / (6 sin(pi a f / 6)), within 1e-3 of sinc(a f) up to the MTF50 used.
"""

import re

import numpy as np
import pytest
from matplotlib.colors import to_hex
from matplotlib.figure import Figure
from scipy.ndimage import gaussian_filter1d
from scipy.optimize import brentq, minimize_scalar
from scipy.special import ndtr

from qa.errors import InputError
from qa.locate.layout import Layout, Placed
from qa.measure import families, find_spec, mtf
from qa.phantom.model import Phantom, PhantomObject, Shape
from qa.report.figures import PALETTE
from qa.volume import Volume

PITCH_MM = 0.1
N_PX = 160
SIGMA_PX = 1.0          # blur of the in-focus plane
FOCUS_PLANE = 3         # plane index (z = 3 mm); the plate's nominal height is 2 mm
PLATE = Shape("box", (8.0, 8.0, 2.0), (4.0, 4.0, 0.5), (0.0, 0.0, 4.0))


def _plate_plane(sigma_mm, contrast, centre_xy=(8.03, 7.96), half_mm=4.0, angle_deg=4.0, ss=6,
                 boost_mm2=0.0):
    """Mean over each pixel (ss x ss points) of a Gaussian-blurred square turned about z.

    In the square's own frame (u, v) the blurred indicator is separable:
    [E(h - u) - E(-h - u)] [E(h - v) - E(-h - v)] with E(t) = Phi(t/s) - c g'(t), the
    integral of the LSF g - c g'' (g the Gaussian density of SD s, c = boost / (4 pi^2)),
    whose transfer is (1 + boost f^2) exp(-2 pi^2 s^2 f^2): for boost > 0 an edge-enhanced
    response (the Fourier transform of g'' is -(2 pi f)^2 G).
    """
    t = ((np.arange(N_PX * ss) + 0.5) / ss - 0.5) * PITCH_MM
    x, y = np.meshgrid(t, t)                       # arrays [y, x]
    th = np.radians(angle_deg)
    dx, dy = x - centre_xy[0], y - centre_xy[1]
    u, v = np.cos(th) * dx + np.sin(th) * dy, -np.sin(th) * dx + np.cos(th) * dy

    def esf(t):      # - c g'(t) = c t / s^2 g(t)
        g = np.exp(-0.5 * (t / sigma_mm) ** 2) / (sigma_mm * np.sqrt(2 * np.pi))
        return ndtr(t / sigma_mm) + boost_mm2 / (4 * np.pi ** 2) * t / sigma_mm ** 2 * g

    def box(w):
        return esf(half_mm - w) - esf(-half_mm - w)

    return contrast * (box(u) * box(v)).reshape(N_PX, ss, N_PX, ss).mean(axis=(1, 3))


def _layout(placed=True, found=True, note="", analysis=None, shape=PLATE):
    obj = PhantomObject("plate", "edge", shape, None, 0.05)
    phantom = Phantom("test plate", "", 30.0, (obj,), "phantoms/test.yaml", analysis or {})
    where = {"plate": Placed(obj, shape, found, note)} if placed else {}
    return Layout(phantom, where)


def _closed_form_crossing_per_mm(level, sigma_px):
    def g(f):  # f in cycles/pixel
        return np.exp(-2 * np.pi ** 2 * sigma_px ** 2 * f ** 2) * abs(np.sinc(f)) - level
    return brentq(g, 1e-6, 0.999) / PITCH_MM


@pytest.fixture(scope="module")
def volume():
    # Out of its plane a limited-angle scan spreads the plate along x (source travel), so
    # the other planes are blurred along x only (2.5 px SD per mm of height). They start
    # from a sharper plate (0.5 px), so their y edges are sharper than in focus: a focus
    # search that trusted the y edges would pick a wrong plane.
    sharp = _plate_plane(0.5 * PITCH_MM, 1.0)
    planes = []
    for iz in range(5):
        off = abs(iz - FOCUS_PLANE)
        plate = _plate_plane(SIGMA_PX * PITCH_MM, 1.0) if off == 0 else \
            gaussian_filter1d(sharp, 2.5 * off, axis=1, mode="nearest")
        planes.append(10.0 + 100.0 / (1.0 + off) * plate)
    return Volume(np.stack(planes), (1.0, PITCH_MM, PITCH_MM), (0.0, 0.0, 0.0))


@pytest.fixture(scope="module")
def result(volume):
    return mtf.measure(volume, _layout(), None)


def test_family_is_registered():
    fam = {f.name: f for f in families()}["mtf"]
    assert fam.title == "In-plane resolution (MTF)" and fam.order == 10
    assert [s.name for s in fam.metrics] == ["mtf50_x", "mtf10_x", "mtf50_y", "mtf10_y"]
    assert all(s.unit == "lp/mm" and s.better == "higher" for s in fam.metrics)
    assert fam.plot is mtf.plot and find_spec("mtf10_y").unit == "lp/mm"


def test_finds_the_in_focus_plane(result):
    # The sharpest plane is z = 3 mm, one plane above the nominal 2 mm.
    assert result.plot_data["focus_z_mm"] == {"plate": pytest.approx(3.0)}
    assert {r.z_mm for r in result.rois} == {3.0}
    search = result.plot_data["focus_search"]["plate"]
    assert search["planes_z_mm"] == [0.0, 1.0, 2.0, 3.0, 4.0]      # nominal 2 mm +- 3 mm


@pytest.mark.parametrize("direction", ["x", "y"])
def test_mtf_matches_closed_form_in_both_directions(result, direction):
    got = {m.name: m for m in result.measurements}
    for level in (50, 10):
        m = got[f"mtf{level}_{direction}"]
        truth = _closed_form_crossing_per_mm(level / 100, SIGMA_PX)
        assert m.unit == "lp/mm"
        # 3 % (brief) for MTF50; MTF10 held to the same.
        assert m.value == pytest.approx(truth, rel=0.03)
        assert m.uncertainty is not None and 0 <= m.uncertainty < 0.03 * truth
    curve = result.plot_data[direction]
    f_px = curve["frequency_per_mm"] * PITCH_MM
    upto = f_px <= 0.5
    expected = np.exp(-2 * np.pi ** 2 * SIGMA_PX ** 2 * f_px ** 2) * np.abs(np.sinc(f_px))
    assert np.max(np.abs(curve["mtf"][upto] - expected[upto])) < 0.02   # tolerance of the brief
    assert curve["nyquist_per_mm"] == pytest.approx(5.0)
    assert len(curve["edges"]) == 2
    assert np.allclose(np.abs(curve["edge_angle_deg"]), 4.0, atol=0.05)


def test_rois_lie_across_the_four_edges(result):
    assert len(result.rois) == 4 and all(r.kind == "box" for r in result.rois)
    th = np.radians(4.0)
    for r in result.rois:
        # Centre of a plate edge: 4 mm from the centre along a turned plate axis.
        off = np.subtract(r.centre_xy_mm, PLATE.centre_xyz_mm[:2])
        assert np.hypot(*off) == pytest.approx(4.0)
        along_x = abs(off[0]) > abs(off[1])
        normal = [np.cos(th), np.sin(th)] if along_x else [-np.sin(th), np.cos(th)]
        assert abs(np.dot(off, normal)) == pytest.approx(4.0)
        # Region well inside the corners: its length along the edge is 60 % of the side.
        assert (r.size_mm[1] if along_x else r.size_mm[0]) == pytest.approx(4.8)


def test_plate_not_found_gives_not_measured_with_the_reason(volume):
    res = mtf.measure(volume, _layout(found=False, note="plate not seen within 5 mm"), None)
    assert [m.name for m in res.measurements] == ["mtf50_x", "mtf10_x", "mtf50_y", "mtf10_y"]
    for m in res.measurements:
        assert m.value is None and "plate not seen within 5 mm" in m.note
        assert m.note.startswith("not measured")
    assert mtf.plot(res) is None


def test_no_edge_object_gives_not_measured(volume):
    res = mtf.measure(volume, _layout(placed=False), {})
    assert all(m.value is None and "no edge object" in m.note for m in res.measurements)


def test_plate_outside_the_volume_says_so(volume):
    # Placed near a corner of the 16 mm field: every edge region would cross the border.
    moved = Shape("box", (14.0, 14.0, 2.0), (4.0, 4.0, 0.5), (0.0, 0.0, 4.0))
    res = mtf.measure(volume, _layout(shape=moved), None)
    for m in res.measurements:
        assert m.value is None and "reaches outside the volume" in m.note


def test_options_from_the_phantom_definition(volume):
    res = mtf.measure(volume, _layout(analysis={"mtf": {"roi_along_mm": 4.0,
                                                        "focus_search_mm": 0.5}}), None)
    # Searching only 0.5 mm about the nominal 2 mm keeps plane z = 2 mm.
    assert res.plot_data["focus_z_mm"]["plate"] == pytest.approx(2.0)
    assert sorted({max(r.size_mm) for r in res.rois}) == [6.0]
    assert sorted({min(r.size_mm) for r in res.rois}) == [4.0]


@pytest.mark.parametrize("options, field", [
    ({"roi_size": 3.0}, "analysis.mtf.roi_size"),
    ({"bin_fraction": 0.5}, "analysis.mtf.bin_fraction"),
    ({"n_segments": 2.5}, "analysis.mtf.n_segments"),
    ({"roi_across_mm": "wide"}, "analysis.mtf.roi_across_mm"),
    ({"normalise": "max"}, "analysis.mtf.normalise"),
    ({"normalise": 1}, "analysis.mtf.normalise"),
])
def test_bad_options_are_refused(volume, options, field):
    with pytest.raises(InputError, match="phantoms/test.yaml") as info:
        mtf.measure(volume, _layout(analysis={"mtf": options}), None)
    assert info.value.field == field


def test_plot_draws_both_curves(result):
    fig = mtf.plot(result)
    assert isinstance(fig, Figure)
    ax = fig.axes[0]
    labels = [line.get_label() for line in ax.get_lines()]
    assert "along x" in labels and "along y" in labels
    assert sum(t.get_text().startswith("MTF50") for t in ax.texts) == 2
    assert sum(t.get_text().startswith("MTF10") for t in ax.texts) == 2
    assert ax.get_ylabel() == "presampled MTF (normalised at f = 0)"
    # House style (qa.report.figures): constrained layout, the palette's colours.
    assert fig.get_layout_engine().__class__.__name__ == "ConstrainedLayoutEngine"
    colours = {to_hex(line.get_color()) for line in ax.get_lines() if line.get_label()
               in ("along x", "along y")}
    assert colours == {PALETTE[0], PALETTE[1]}
    assert any(line.get_xdata()[0] == pytest.approx(5.0) for line in ax.get_lines()
               if line.get_linestyle() == ":")                         # Nyquist, 5 lp/mm
    assert not any("edge-enhanced" in t.get_text() for t in ax.texts)


# --- normalisation of an edge-enhanced response -----------------------------------------

ENH_SIGMA_PX, ENH_BOOST_PX2 = 1.5, 200.0   # transfer peaks near 2.0 at about 1.3 lp/mm


def _enhanced(f_per_mm):
    """Closed form of the enhanced plate's presampled MTF (see _plate_plane) along the
    normal of an edge at 4 deg: the square pixel projected on it is the convolution of
    rectangles of widths a cos 4 and a sin 4 (the 6 x 6 point sampling is within 1e-3 of
    it, module docstring)."""
    f, t = np.asarray(f_per_mm) * PITCH_MM, np.radians(4.0)
    return ((1 + ENH_BOOST_PX2 * f ** 2) * np.exp(-2 * np.pi ** 2 * ENH_SIGMA_PX ** 2 * f ** 2)
            * np.abs(np.sinc(f * np.cos(t)) * np.sinc(f * np.sin(t))))


def _enhanced_truth():
    best = minimize_scalar(lambda f: -_enhanced(f), bounds=(0.1, 4.0), method="bounded",
                           options={"xatol": 1e-8})
    f_pk, peak = best.x, float(_enhanced(best.x))
    after = {level: brentq(lambda f: _enhanced(f) / peak - level / 100, f_pk, 5.0)
             for level in (50, 10)}
    zero = {level: brentq(lambda f: _enhanced(f) - level / 100, f_pk, 5.0) for level in (50, 10)}
    return peak, f_pk, after, zero


@pytest.fixture(scope="module")
def enhanced_volume():
    # One plane at the plate's nominal height, so the focus search has one plane to take.
    plane = 10.0 + 100.0 * _plate_plane(ENH_SIGMA_PX * PITCH_MM, 1.0,
                                        boost_mm2=ENH_BOOST_PX2 * PITCH_MM ** 2)
    return Volume(plane[None], (1.0, PITCH_MM, PITCH_MM), (2.0, 0.0, 0.0))


@pytest.fixture(scope="module")
def enhanced(enhanced_volume):
    return {mode: mtf.measure(enhanced_volume, _layout(analysis=options), None)
            for mode, options in (("zero", None), ("peak", {"mtf": {"normalise": "peak"}}))}


@pytest.mark.parametrize("direction", ["x", "y"])
def test_peak_normalisation_gives_closed_form_crossings_after_the_peak(enhanced, direction):
    peak, f_pk, after, _ = _enhanced_truth()
    got = {m.name: m for m in enhanced["peak"].measurements}
    for level in (50, 10):
        m = got[f"mtf{level}_{direction}"]
        # 3 % (brief), as for the f = 0 normalisation.
        assert m.value == pytest.approx(after[level], rel=0.03)
        assert m.uncertainty is not None and 0 <= m.uncertainty < 0.03 * after[level]
        # The note names the peak of the curve normalised at f = 0 (2 decimals, within
        # 1 % of the closed form; its frequency to the 0.1 lp/mm printed).
        found = re.search(r"edge-enhanced: zero-normalised MTF peaks at ([0-9.]+) at "
                          r"([0-9.]+) lp/mm; normalised at the peak$", m.note)
        assert found, m.note
        assert float(found[1]) == pytest.approx(peak, rel=0.01)
        assert float(found[2]) == pytest.approx(f_pk, abs=0.1)
    curve = enhanced["peak"].plot_data[direction]
    assert curve["normalise"] == "peak" and curve["edge_enhanced"]
    assert curve["zero_peak"] == pytest.approx(peak, rel=0.01)
    # One grid step of the curve is 1/128 of 1/a = 0.078 lp/mm.
    assert curve["zero_peak_frequency_per_mm"] == pytest.approx(f_pk, abs=0.08)
    f = curve["frequency_per_mm"]
    upto = f <= 5.0
    assert np.max(curve["mtf"][upto]) == pytest.approx(1.0, abs=1e-9)
    # Tolerance 0.02 of the brief for the curve.
    assert np.max(np.abs(curve["mtf"][upto] - _enhanced(f[upto]) / peak)) < 0.02


def test_zero_normalisation_keeps_the_crossings_and_flags_the_enhancement(enhanced):
    peak, _, _, zero = _enhanced_truth()
    for m in enhanced["zero"].measurements:
        level = int(m.name[3:5])
        assert m.value == pytest.approx(zero[level], rel=0.03)      # 3 % (brief)
        assert m.note.startswith("mean of 2 edge(s); edge-enhanced: zero-normalised MTF "
                                 f"peaks at {peak:.2f} at ")
        assert m.note.endswith("; normalised at f = 0")
    for d in ("x", "y"):
        curve = enhanced["zero"].plot_data[d]
        assert curve["normalise"] == "zero" and curve["mtf"][0] == pytest.approx(1.0)
        assert curve["zero_peak"] == pytest.approx(peak, rel=0.01)   # as above
    assert "normalised at the peak" not in enhanced["zero"].summary
    assert "(normalised at the peak)" in enhanced["peak"].summary


def test_plain_edges_are_not_flagged(result):
    # A Gaussian blur times a sinc falls from f = 0 on (closed form): peak 1 at f = 0.
    assert not any("edge-enhanced" in m.note for m in result.measurements)
    for d in ("x", "y"):
        curve = result.plot_data[d]
        assert curve["zero_peak"] == pytest.approx(1.0) and not curve["edge_enhanced"]
        assert curve["zero_peak_frequency_per_mm"] == 0.0


def test_plot_names_the_normalisation_and_the_enhancement(enhanced):
    ax = mtf.plot(enhanced["peak"]).axes[0]
    assert ax.get_ylabel() == "presampled MTF (normalised at the peak)"
    texts = [t.get_text() for t in ax.texts]
    assert sum(t.startswith("MTF50") for t in texts) == 2
    assert any(t.startswith("edge-enhanced x: zero-normalised MTF peaks at 2.0") for t in texts)
    ax = mtf.plot(enhanced["zero"]).axes[0]
    assert ax.get_ylabel() == "presampled MTF (normalised at f = 0)"
    # Normalised at f = 0 the curve rises to about 2: the axis shows all of it.
    assert ax.get_ylim()[1] >= 2.0
