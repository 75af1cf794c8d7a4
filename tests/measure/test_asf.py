"""ASF against a bead with a known (Gaussian) depth profile."""

import numpy as np
import pytest

from qa.locate.layout import Layout, Placed
from qa.measure.asf import measure_asf
from qa.phantom.model import Phantom, PhantomObject, Shape
from qa.volume import Volume


def bead_volume(fwhm_mm, *, z0=20.3, noise=0.0, seed=0, nz=41, radius=0.5):
    """A bead whose mean over its region follows a Gaussian in z (FWHM ``fwhm_mm``),
    sampled at 1 mm, on a flat background."""
    sigma = fwhm_mm / (2 * np.sqrt(2 * np.log(2)))
    z = np.arange(nz) + 0.5
    ny, nx = 120, 360
    y, x = np.mgrid[:ny, :nx]
    disk = ((y - 60) ** 2 + (x - 180) ** 2) * 0.01 <= radius ** 2
    data = np.full((nz, ny, nx), 10.0, dtype=np.float32)
    data += (np.exp(-0.5 * ((z - z0) / sigma) ** 2)[:, None, None] * disk).astype(np.float32)
    if noise:
        rng = np.random.default_rng(seed)
        data += noise * rng.standard_normal(data.shape, dtype=np.float32)
    vol = Volume(data, (1.0, 0.1, 0.1), (0.5, -6.0, -18.0))
    bead = PhantomObject("b1", "bead", Shape("ellipsoid", (0.0, 0.0, 20.0), (radius,) * 3),
                         "aluminium", 1.0)
    phantom = Phantom("t", "", 20.0, (bead,))
    return vol, Layout(phantom, {"b1": Placed(bead, bead.shape)})


@pytest.mark.parametrize("fwhm", [3.0, 4.5, 6.0, 8.0, 10.0, 12.0])
def test_fwhm_of_gaussian_depth_profile(fwhm):
    # Closed form: the ASF of a bead whose contrast falls off as a Gaussian in z is that
    # Gaussian, whose FWHM is 2 sqrt(2 ln 2) sigma. Required within 4 %.
    vol, layout = bead_volume(fwhm)
    res = {m.name: m for m in measure_asf(vol, layout).measurements}
    assert res["asf_fwhm"].value == pytest.approx(fwhm, rel=0.04)
    # The in-focus height is found between planes: nominal 20.0, true peak at 20.3.
    assert res["bead_height_error"].value == pytest.approx(0.3, abs=0.15)


def test_uncertainty_covers_the_error_in_most_noisy_repeats():
    # Seeded: in 50 noisy repeats the stated 1-SD uncertainty, widened to k = 2 (95 %
    # coverage for a normal error, common practice), covers the error against the
    # true FWHM in at least 90 % of them.
    covered = 0
    for seed in range(50):
        vol, layout = bead_volume(6.0, noise=0.08, seed=seed)
        m = {m.name: m for m in measure_asf(vol, layout).measurements}["asf_fwhm"]
        assert m.uncertainty is not None and m.uncertainty > 0
        covered += abs(m.value - 6.0) <= 2 * m.uncertainty + 0.04 * 6.0
    assert covered >= 45


def test_missing_and_noisy_bead_are_not_measured():
    vol, layout = bead_volume(6.0)
    missing = Layout(layout.phantom, {"b1": Placed(layout.phantom.objects[0],
                                                   layout.phantom.objects[0].shape, False,
                                                   "b1 not found near (0.0, 0.0, 20.0) mm")})
    for m in measure_asf(vol, missing).measurements:
        assert m.value is None and "not found" in m.note
    vol, layout = bead_volume(6.0, noise=3.0)
    m = {m.name: m for m in measure_asf(vol, layout).measurements}["asf_fwhm"]
    assert m.value is None and "noise" in m.note
