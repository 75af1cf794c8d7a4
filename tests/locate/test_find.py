"""Object finders on synthetic volumes whose objects are placed in closed form."""

import math

import numpy as np
import pytest
from scipy import ndimage

from qa.locate.find import bead_candidates, blob_response, find_bead, find_edge_plate
from qa.phantom.model import Shape
from qa.volume import Volume

HALF_ARC = math.radians(12.5)  # mid-arc profile (phantoms/geometries/dbt-mid-arc.yaml)


def dbt_like_beads(beads_xyz, *, pixel_mm, dz_mm=1.0, size_yx_mm=(30.0, 24.0), nz=30,
                   noise=0.01, seed=1):
    """Gaussian beads (in-plane SD 0.3 mm, depth SD 1.5 mm) with the out-of-focus copies
    of a 9-view shift-and-add: in a plane dz away, 9 copies spread along x over
    +-dz tan(half arc) (Niklason et al., Radiology 205, 1997), each of 1/9 of the
    in-focus amplitude, fading to half that far from focus."""
    ny, nx = (int(round(s / pixel_mm)) for s in size_yx_mm)
    y, x = (np.arange(n) * pixel_mm for n in (ny, nx))
    z = dz_mm * np.arange(nz)
    data = np.zeros((nz, ny, nx))
    for bx, by, bz in beads_xyz:
        rows = np.abs(y - by) <= 2.0
        gy = np.exp(-0.5 * ((y[rows] - by) / 0.3) ** 2)
        for k, zk in enumerate(z):
            d = zk - bz
            focus = math.exp(-0.5 * (d / 1.5) ** 2)
            amp = focus / 9 + (1 - focus) / 18
            gx = sum(np.exp(-0.5 * ((x - bx - s * d * math.tan(HALF_ARC)) / 0.3) ** 2)
                     for s in np.linspace(-1, 1, 9))
            data[k, rows] += amp * gy[:, None] * gx[None, :]
    data += noise * np.random.default_rng(seed).standard_normal(data.shape)
    return Volume(data, (dz_mm, pixel_mm, pixel_mm), (0.0, 0.0, 0.0))


BEADS = [(6.0, 5.0, 8.0), (15.2, 14.3, 17.0), (8.7, 24.9, 22.0)]


@pytest.mark.parametrize("pixel_mm", [0.05, 0.1, 0.2])
def test_candidates_are_the_beads_not_their_copies(pixel_mm):
    # Closed form: the beads are where they were drawn; their out-of-focus copies (up
    # to 22 x tan 12.5 deg = 4.9 mm along x) must not come out as beads. At 0.05 mm the
    # planes are binned 4 x 4 (binned pixel 0.2 mm): positions within one binned pixel
    # (0.2 mm) and heights within one plane (1 mm).
    vol = dbt_like_beads(BEADS, pixel_mm=pixel_mm)
    cand = bead_candidates(vol, radius_mm=0.5, min_snr=8.0)
    assert len(cand.xyz_mm) == 3
    for bead in BEADS:
        d = np.abs(cand.xyz_mm - bead).max(axis=1)
        best = int(np.argmin(d))
        assert np.abs(cand.xyz_mm[best, :2] - bead[:2]).max() <= 0.2
        assert abs(cand.xyz_mm[best, 2] - bead[2]) <= 1.0


def test_bead_refined_to_sub_pixel_and_sub_plane():
    # Drawn at (15.2, 14.3, 17.0) on a 0.1 mm grid: the centroid is within 0.03 mm (a
    # third of a pixel) and the parabolic peak height within 0.25 mm (a quarter plane;
    # the Gaussian depth profile is nearly a parabola over +-1 plane).
    vol = dbt_like_beads(BEADS, pixel_mm=0.1, noise=0.002)
    f, why = find_bead(vol, (14.0, 13.0, 15.0), radius_mm=0.5, search_radius_mm=3.0,
                       half_depth_mm=4.0)
    assert f is not None, why
    assert f.xyz_mm[:2] == pytest.approx(BEADS[1][:2], abs=0.03)
    assert f.xyz_mm[2] == pytest.approx(BEADS[1][2], abs=0.25)


def test_missing_bead_is_not_found_in_noise():
    vol = dbt_like_beads(BEADS[:1], pixel_mm=0.1)
    f, why = find_bead(vol, (15.2, 14.3, 17.0), radius_mm=0.5, search_radius_mm=3.0,
                       half_depth_mm=4.0, min_snr=8.0)
    assert f is None and "noise" in why
    f, why = find_bead(vol, (60.0, 14.3, 17.0), radius_mm=0.5, search_radius_mm=3.0,
                       half_depth_mm=4.0)
    assert f is None and why == "outside the volume"


def test_blob_response_rejects_a_straight_edge():
    # Lowe (IJCV 2004): a straight step has one zero Hessian eigenvalue, so it fails the
    # ratio test everywhere; a Gaussian blob passes at its centre.
    step = np.zeros((1, 60, 60))
    step[:, :, 30:] = 1.0
    strength, raw = blob_response(step, (2.0, 2.0))
    assert np.abs(raw).max() > 0.1 and strength.max() == 0.0
    yy, xx = np.mgrid[:60, :60]
    blob = np.exp(-((yy - 30.0) ** 2 + (xx - 30.0) ** 2) / (2 * 2.0 ** 2))[None]
    strength, _ = blob_response(blob, (2.0, 2.0))
    assert np.unravel_index(np.argmax(strength), strength.shape) == (0, 30, 30)


def plate_image(centre_xy, rotation_deg, *, size_mm=16.0, pixel_mm=0.1, field_mm=30.0,
                noise=0.02, seed=2):
    """A square plate (value 1 on 0) by 4 x 4 supersampled area fractions, blurred by a
    Gaussian of 1 pixel, with noise: a closed-form edge position at every side."""
    n = int(round(field_mm / pixel_mm))
    sub = 4
    c = (np.arange(n * sub) + 0.5) / sub * pixel_mm
    xx, yy = np.meshgrid(c, c)
    t = math.radians(rotation_deg)
    u = (xx - centre_xy[0]) * math.cos(t) + (yy - centre_xy[1]) * math.sin(t)
    v = -(xx - centre_xy[0]) * math.sin(t) + (yy - centre_xy[1]) * math.cos(t)
    inside = (np.abs(u) <= size_mm / 2) & (np.abs(v) <= size_mm / 2)
    img = inside.reshape(n, sub, n, sub).mean(axis=(1, 3))
    img = ndimage.gaussian_filter(img, 1.0)
    img += noise * np.random.default_rng(seed).standard_normal(img.shape)
    # Pixel centres at (j + 0.5) * pixel: origin half a pixel in.
    return Volume(np.stack([img, img, img]), (1.0, pixel_mm, pixel_mm),
                  (0.0, pixel_mm / 2, pixel_mm / 2))


@pytest.mark.parametrize("true_rot,true_centre", [(4.0, (15.3, 14.8)), (-2.5, (14.6, 15.4))])
def test_edge_plate_centre_and_turn(true_rot, true_centre):
    # The plate is expected at (15, 15) turned 3 deg; it lies at ``true_centre`` turned
    # ``true_rot``. Side positions from 4 x 25 profiles with 0.02 noise on a unit step:
    # centre within 0.03 mm and turn within 0.05 deg (a 0.03 mm error of the line's
    # slope over the 11 mm the profiles span is 0.15 deg per side, averaged over four
    # sides and 25 profiles each).
    vol = plate_image(true_centre, true_rot)
    expected = Shape("box", (15.0, 15.0, 1.0), (8.0, 8.0, 0.25), (0.0, 0.0, 3.0))
    refined, why = find_edge_plate(vol, expected, search_mm=2.0)
    assert refined is not None, why
    assert refined.centre_xyz_mm[:2] == pytest.approx(true_centre, abs=0.03)
    assert refined.rotation_deg[2] == pytest.approx(true_rot, abs=0.05)


def test_edge_plate_not_found_in_a_flat_plane():
    vol = plate_image((15.0, 15.0), 3.0, size_mm=0.0)
    refined, why = find_edge_plate(vol, Shape("box", (15.0, 15.0, 1.0), (8.0, 8.0, 0.25)))
    assert refined is None and "noise" in why
