"""The nominal fallback when the pose cannot be fitted, the locator's options, and the
shipped physical phantom definitions."""

import math

import numpy as np
import pytest

from qa import PROJECT_ROOT
from qa.errors import InputError
from qa.locate import locate, read_options
from qa.locate.pose import fit_rigid_2d
from qa.phantom import load_phantom
from qa.volume import Volume

DBT_QC = PROJECT_ROOT / "phantoms" / "lacuna-dbt-qc.yaml"
SECTION_QC = PROJECT_ROOT / "phantoms" / "lacuna-section-qc.yaml"


def one_bead_volume(phantom, bead_id, *, pixel_mm=0.25, plane_mm=2.0, noise=0.01, seed=4):
    """The definition's field with one Gaussian bead (in-plane SD 0.3 mm, depth SD 2 mm)
    at its nominal place, on noise: the pose cannot be fitted from one bead."""
    (x0, x1), (y0, y1), (z0, z1) = phantom.field_xyz_mm
    x = x0 + pixel_mm * (np.arange(int((x1 - x0) / pixel_mm)) + 0.5)
    y = y0 + pixel_mm * (np.arange(int((y1 - y0) / pixel_mm)) + 0.5)
    z = z0 + plane_mm * (np.arange(int((z1 - z0) / plane_mm)) + 0.5)
    bx, by, bz = phantom.get(bead_id).shape.centre_xyz_mm
    data = (np.exp(-0.5 * ((z[:, None, None] - bz) / 2.0) ** 2)
            * np.exp(-0.5 * ((y[None, :, None] - by) ** 2 + (x[None, None, :] - bx) ** 2) / 0.09))
    data += noise * np.random.default_rng(seed).standard_normal(data.shape)
    return Volume(data, (plane_mm, pixel_mm, pixel_mm), (z[0], y[0], x[0]))


def test_too_few_beads_falls_back_to_the_nominal_pose():
    phantom = load_phantom(DBT_QC)
    volume = one_bead_volume(phantom, "b32")
    layout = locate(volume, phantom)
    pose = layout.pose
    assert pose.fitted_from == () and math.isnan(pose.residual_mm)
    assert pose.note.startswith("pose not determined: 1 of 5 beads found")
    assert pose.shift_xy_mm == (0.0, 0.0) and pose.rotation_deg == 0.0 and not pose.mirrored
    # The one bead is found where it was drawn (closed form): within a fifth of a pixel.
    b32 = layout.placed["b32"]
    assert b32.found and b32.centre_xyz_mm[:2] == pytest.approx((37.0, 41.0), abs=0.05)
    for bead in ("b22", "b05", "b40", "b12"):
        assert not layout.placed[bead].found
        assert layout.placed[bead].note.startswith(f"{bead} not found near (")
    # No plate in this volume: the edges are reported missing, the rest is placed nominally.
    assert not layout.placed["edge-mid"].found
    assert layout.placed["flat-mid"].found
    assert layout.placed["flat-mid"].centre_xyz_mm == (0.0, 10.0, 22.5)


def test_both_definitions_load_and_are_not_symmetric():
    for path, n_beads in ((DBT_QC, 5), (SECTION_QC, 5)):
        phantom = load_phantom(path)
        beads = phantom.with_role("bead")
        assert len(beads) == n_beads
        assert {"edge", "disk", "uniform", "marker", "background"} <= {o.role for o in phantom.objects}
        xy = np.array([b.shape.centre_xyz_mm[:2] for b in beads])
        # No rigid motion takes the beads onto their mirror image (RMS over 5 mm), so a
        # mirrored image is told from three beads or more (a design rule of both).
        _, _, rms = fit_rigid_2d(xy * (-1, 1), xy)
        assert rms > 5.0
    heights = {b.shape.centre_xyz_mm[2] for b in load_phantom(DBT_QC).with_role("bead")}
    assert len(heights) == 5  # five beads, five heights


@pytest.mark.parametrize("old,new,match", [
    ("    search_radius_mm: 5\n", "    search_radius_mm: -5\n",
     r"lacuna-dbt-qc.yaml:\d+, field 'analysis.locate.search_radius_mm': expected a positive"),
    ("    search_radius_mm: 5\n", "    serch_radius_mm: 5\n",
     r"lacuna-dbt-qc.yaml:\d+, field 'analysis.locate.serch_radius_mm': unknown field"),
    ("    search_radius_mm: 5\n", "    objects: {b99: {search_radius_mm: 3}}\n",
     r"lacuna-dbt-qc.yaml:\d+, field 'analysis.locate.objects.b99': no object 'b99'"),
    ("    search_radius_mm: 5\n", "    objects: {b22: {radius: 3}}\n",
     r"field 'analysis.locate.objects.b22.radius': unknown field"),
])
def test_bad_locate_options_are_refused(tmp_path, old, new, match):
    text = DBT_QC.read_text()
    assert old in text
    path = tmp_path / "lacuna-dbt-qc.yaml"
    path.write_text(text.replace(old, new, 1))
    with pytest.raises(InputError, match=match):
        read_options(load_phantom(path))


def test_per_object_search_radius(tmp_path):
    path = tmp_path / "lacuna-dbt-qc.yaml"
    path.write_text(DBT_QC.read_text().replace("    search_radius_mm: 5\n",
                                               "    objects: {b05: {search_radius_mm: 2.5}}\n", 1))
    opts, per = read_options(load_phantom(path))
    assert per == {"b05": {"search_radius_mm": 2.5, "search_half_depth_mm": 5.0}}
    assert opts["search_radius_mm"] == 5.0  # the default (DEFAULTS) for the others


def test_bad_definition_names_file_line_and_field(tmp_path):
    text = SECTION_QC.read_text()
    path = tmp_path / "lacuna-section-qc.yaml"
    path.write_text(text.replace("semi_axes_mm: [0.5, 0.5, 9.9]", "semi_axes_mm: [0.5, 9.9]", 1))
    with pytest.raises(InputError, match=r"lacuna-section-qc.yaml:\d+, field "
                                         r"'objects\[1\].semi_axes_mm': expected a list of 3"):
        load_phantom(path)
