"""``lacuna simulate`` runs each reconstruction on each shipped geometry."""

import json

import numpy as np
import pytest
from scipy.ndimage import gaussian_filter

from qa import PROJECT_ROOT
from qa.cli import main
from qa.io import read_volume

GEOMETRIES = PROJECT_ROOT / "phantoms" / "geometries"


def _small_phantom(tmp_path, field):
    """A small digital phantom (our own, for this test): a slab, a bead and a disk."""
    p = tmp_path / "small.yaml"
    p.write_text(f"""phantom: small
energy_keV: 20
field_mm: {field}
objects:
  - {{id: slab, role: background, shape: box, centre_mm: [0, 5, 5], size_mm: [20, 14, 10], material: pmma}}
  - {{id: bead, role: bead, shape: sphere, centre_mm: [0, 5, 5.5], radius_mm: 0.5, material: aluminium}}
  - {{id: disk, role: disk, shape: cylinder, centre_mm: [4, 5, 5.5], radius_mm: 1.5, height_mm: 1, material: water}}
""")
    return p


DBT_GEOMETRIES = tuple(sorted(p.stem for p in GEOMETRIES.glob("dbt-*.yaml")))
DBT_RECONS = ("saa", "fbp", "sart", "sirt", "tv")


# Every DBT geometry with every reconstruction (each run simulates the shipped full-size
# detector: 5-20 s each, the iterative methods the longest).
@pytest.mark.slow
@pytest.mark.parametrize("geometry", DBT_GEOMETRIES)
@pytest.mark.parametrize("recon", DBT_RECONS)
def test_dbt_geometries(tmp_path, geometry, recon, capsys):
    ph = _small_phantom(tmp_path, "{x: [-4, 4], y: [3, 7], z: [2, 9]}")
    out = tmp_path / "out"
    assert main(["simulate", str(ph), "--geometry", str(GEOMETRIES / f"{geometry}.yaml"),
                 "--recon", recon, "--out", str(out), "--format", "npz", "--quiet"]) == 0
    vol = read_volume(out / f"small_{geometry}_{recon}.npz")
    assert vol.shape[0] == 7 and vol.meta["reconstruction"] == recon
    proj = np.load(out / f"small_{geometry}_projections.npy")
    geo = json.loads((out / f"small_{geometry}_projections.geometry.json").read_text())
    assert proj.shape[0] == len(geo["angles_deg"])
    # The bead is the brightest thing in its plane (nearest z = 5.5 mm), once the plane is
    # smoothed at about the bead's radius (noise of the iterative methods, which have no
    # ramp filter to flatten the background, otherwise puts single pixels first).
    plane = gaussian_filter(np.asarray(vol.data[vol.plane_index(5.5)], float),
                            0.3 / vol.spacing_mm[1])
    iy, ix = np.unravel_index(np.argmax(plane), plane.shape)
    _, y, x = vol.to_mm((0, iy, ix))
    assert abs(x) < 0.3 and abs(y - 5) < 0.3


@pytest.mark.parametrize("geometry,recon", [("section-parallel-120", "fbp"),
                                            ("section-parallel-120", "sirt"),
                                            ("section-fan-200", "fbp"),
                                            ("section-fan-200", "sirt")])
def test_section_geometries(tmp_path, geometry, recon):
    # The field covers the whole slab: a section scanner's sinogram must not be truncated.
    ph = _small_phantom(tmp_path, "{x: [-11, 11], y: [-3, 13], z: [5, 6]}")
    out = tmp_path / "out"
    assert main(["simulate", str(ph), "--geometry", str(GEOMETRIES / f"{geometry}.yaml"),
                 "--recon", recon, "--out", str(out), "--format", "npz", "--noiseless"]) == 0
    vol = read_volume(out / f"small_{geometry}_{recon}.npz")
    plane = vol.data[0]
    iy, ix = np.unravel_index(np.argmax(plane), plane.shape)
    _, y, x = vol.to_mm((0, iy, ix))
    assert abs(x) < 0.3 and abs(y - 5) < 0.3
    assert np.load(out / f"small_{geometry}_sinograms.npy").shape[0] == vol.shape[0]


def test_unknown_reconstruction_for_a_section_is_refused(tmp_path, capsys):
    ph = _small_phantom(tmp_path, "{x: [-6, 6], y: [-1, 11], z: [5, 6]}")
    assert main(["simulate", str(ph), "--geometry", str(GEOMETRIES / "section-fan-200.yaml"),
                 "--recon", "tv", "--out", str(tmp_path / "o")]) == 2
    assert "not available for section-fan" in capsys.readouterr().err


def test_every_registered_dbt_reconstruction_and_shipped_geometry_is_run_above():
    from qa.simulate.recon import methods

    assert set(DBT_RECONS) == set(methods())
    assert {"dbt-narrow-arc", "dbt-mid-arc", "dbt-wide-arc"} <= set(DBT_GEOMETRIES)


def test_a_test_object_off_the_detector_is_refused(tmp_path, capsys):
    # Geometry of central projection: from the source at the end of the arc (x = 650 tan
    # 12.5 deg = 144 mm, z = 650 mm) a disk at x = -40 mm, 20 mm up, lands at
    # x = 144 + (650 / 630) (-40 - 144) = -46 mm, beyond the detector's -45 mm edge.
    ph = tmp_path / "wide.yaml"
    ph.write_text("""phantom: wide
energy_keV: 20
field_mm: {x: [-44, 4], y: [3, 7], z: [2, 30]}
objects:
  - {id: slab, role: background, shape: box, centre_mm: [-20, 5, 15], size_mm: [50, 14, 30], material: pmma}
  - {id: far, role: disk, shape: cylinder, centre_mm: [-40, 5, 20], radius_mm: 1.0, height_mm: 1, material: water}
""")
    out = tmp_path / "out"
    assert main(["simulate", str(ph), "--geometry", str(GEOMETRIES / "dbt-mid-arc.yaml"),
                 "--recon", "saa", "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert "disk 'far'" in err and "falls off the detector" in err and "objects.far" in err
    assert not out.exists()
    # Every shipped phantom fits the geometries it is meant for.
    from qa.phantom import load_phantom
    from qa.simulate.profiles import load_geometry
    from qa.simulate.run import check_detector_covers

    for phantom, geometries in (("lacuna-dbt-demo", ("dbt-narrow-arc", "dbt-mid-arc",
                                                     "dbt-wide-arc")),
                                ("lacuna-dbt-qc", ("dbt-mid-arc-large-field",))):
        for g in geometries:
            check_detector_covers(load_phantom(PROJECT_ROOT / "phantoms" / f"{phantom}.yaml"),
                                  load_geometry(GEOMETRIES / f"{g}.yaml"))
