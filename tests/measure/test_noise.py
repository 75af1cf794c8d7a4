"""Tests of the "noise" family: noise SD, NPS and uniformity in a uniform region."""

import numpy as np
import pytest
from matplotlib.figure import Figure

from qa.errors import InputError
from qa.locate.layout import Layout, Placed
from qa.measure import base, noise
from qa.phantom.model import Phantom, PhantomObject, Shape
from qa.volume import Volume

SPACING = (1.0, 0.1, 0.1)
UNIFORM = ((15.0, 15.0, 5.0), (24.0, 24.0, 4.0))   # centre (x, y, z), size; z 3 to 7 mm


def make_scene(plane_fn=None, *, sigma=1.0, mean=100.0, seed=0, uniform=UNIFORM,
               analysis=None, found=True, shape=(3, 300, 300)):
    """Planes at z = 4, 5, 6 mm of ``mean`` + white noise (+ ``plane_fn(x_mm, y_mm)``)."""
    nz, ny, nx = shape
    yy, xx = np.mgrid[0:ny, 0:nx] * 0.1
    truth = np.full((ny, nx), mean) + (0.0 if plane_fn is None else plane_fn(xx, yy))
    data = truth[None] + np.random.default_rng(seed).normal(0.0, sigma, shape)
    objects = []
    if uniform is not None:
        centre, size = uniform
        objects.append(PhantomObject("flat", "uniform", Shape("box", centre,
                                                               tuple(s / 2 for s in size)),
                                     None, None))
    phantom = Phantom("synthetic", "", 20.0, tuple(objects), "synthetic.yaml",
                      {"noise": analysis or {}})
    placed = {o.id: Placed(o, o.shape, found, "" if found else "edge of the block not seen")
              for o in objects}
    return Volume(data, SPACING, (4.0, 0.0, 0.0)), Layout(phantom, placed)


def values(result):
    return {m.name: m for m in result.measurements}


def test_noise_sd_of_white_noise():
    got = values(noise.measure(*make_scene(sigma=2.5), None))
    m = got["noise_sd"]
    # Closed form: the SD drawn. 3 %: the sampling SD of an SD from ~53,000 pixels is
    # 1/sqrt(2N) = 0.3 %; the margin leaves room for the detrending's few dof.
    assert m.value == pytest.approx(2.5, rel=0.03)
    assert m.unit == "value" and 0 < m.uncertainty < 0.02 * m.value
    assert "detrending order 2" in m.note


def test_noise_sd_uncertainty_is_of_the_right_size():
    values_, stated = [], []
    for seed in range(20):
        m = values(noise.measure(*make_scene(seed=seed, shape=(1, 300, 300)),
                                 None))["noise_sd"]
        values_.append(m.value)
        stated.append(m.uncertainty)
    # The stated u must match the observed scatter of 20 repeats: 0.6-1.6 allows for
    # the ~16 % uncertainty of an SD of 20 values (2.5 of its SDs each way); over 60
    # repeats the ratio was 0.97 in development.
    ratio = np.mean(stated) / np.std(values_, ddof=1)
    assert 0.6 < ratio < 1.6


def test_detrending_removes_a_gradient_from_the_noise_sd():
    volume, layout = make_scene(lambda x, y: 0.4 * x - 0.3 * y + 0.01 * x * y)
    # The trend adds ~2.6 in SD over the region; second-order detrending (IEC 62220-1-1)
    # removes it exactly, leaving the drawn SD of 1 (3 % as above).
    assert values(noise.measure(volume, layout, None))["noise_sd"].value == \
        pytest.approx(1.0, rel=0.03)


def test_uniformity_of_a_linear_gradient():
    g = 0.05      # value per mm along x
    volume, layout = make_scene(lambda x, y: g * (x - 15.0), sigma=0.05)
    m = values(noise.measure(volume, layout, None))["uniformity"]
    # Closed form: a 3 x 3 grid over a region W wide (24 mm less 0.5 mm margins = 23 mm)
    # has column means at -W/3, 0, +W/3 about the centre; the largest deviation is
    # g W / 3 over the mean 100. 3 %: cell edges are rounded to whole pixels (0.1 mm
    # of 7.7 mm) and the noise moves each cell mean by ~0.001 (0.05 / sqrt(5,900)).
    expected = g * 23.0 / 3.0 / 100.0 * 100.0
    assert m.value == pytest.approx(expected, rel=0.03)
    assert m.unit == "%" and 0 < m.uncertainty < 0.05 * m.value


def test_uniformity_of_pure_noise_is_small_and_covered():
    m = values(noise.measure(*make_scene(sigma=1.0), None))["uniformity"]
    # Cell means of pure noise scatter by 1 / sqrt(5,900) = 0.013 (0.013 % of 100): the
    # largest deviation of 9 stays below 4 such units, 0.05 %.
    assert 0 < m.value < 0.05
    assert m.uncertainty is not None and m.uncertainty < m.value


def test_no_uniform_region_is_not_measured():
    got = values(noise.measure(*make_scene(uniform=None), None))
    for name in ("noise_sd", "uniformity"):
        assert got[name].value is None
        assert "the phantom defines no uniform region" in got[name].note


def test_uniform_region_not_found_or_not_in_the_plane():
    got = values(noise.measure(*make_scene(found=False), None))
    assert "not found: edge of the block not seen" in got["noise_sd"].note
    low = ((15.0, 15.0, 0.5), (24.0, 24.0, 1.0))       # 0 to 1 mm: below every plane
    got = values(noise.measure(*make_scene(uniform=low), None))
    assert "does not reach plane" in got["uniformity"].note


def test_mean_near_zero_gives_no_percentage():
    got = values(noise.measure(*make_scene(mean=0.0), None))
    assert got["noise_sd"].measured
    assert got["uniformity"].value is None
    assert "within one noise SD of zero" in got["uniformity"].note


def test_options_are_checked():
    with pytest.raises(InputError, match="analysis.noise.grid.*whole number"):
        noise.measure(*make_scene(analysis={"grid": 2.5}), None)
    with pytest.raises(InputError, match="analysis.noise.colour.*unknown option"):
        noise.measure(*make_scene(analysis={"colour": 1}), None)
    got = values(noise.measure(*make_scene(analysis={"plane_mm": 6.0, "grid": 4}), None))
    assert got["uniformity"].note == "16 cells"


def test_plot_rois_and_registration():
    result = noise.measure(*make_scene(), None)
    assert isinstance(noise.plot(result), Figure)
    assert sum(r.label.startswith("cell") for r in result.rois) == 9
    assert any(r.label == "NPS area" and r.kind == "box" for r in result.rois)
    assert result.plot_data["nps_x"]["freq_per_mm"][-1] == pytest.approx(5.0)  # Nyquist
    family = noise.FAMILY
    assert (family.name, family.title, family.order) == ("noise", "Noise and uniformity", 50)
    assert base.find_spec("uniformity").better == "lower"
    empty = noise.measure(*make_scene(uniform=None), None)
    assert noise.plot(empty) is None
