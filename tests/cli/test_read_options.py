"""``lacuna assess`` read options: ``--series`` for a folder of mixed series, and the note
that suggests ``--travel-axis`` when no bead is found anywhere.

The folder holds two series of single-frame slices built with the shared fixture
``slice_folder`` (``tests/conftest.py``) from pydicom's bundled samples CT_small.dcm and
MR_small.dcm (pydicom test_files/README.txt). The CT series is moved, by its Image
Position and Pixel Spacing (DICOM PS3.3 C.7.6.2.1.1), over the demo phantom's field
(x -32 to 32 mm, y -6 to 58 mm, planes 17.5 to 21.5 mm) and filled with seeded noise:
a volume that is read, located and measured but holds no bead.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from qa import PROJECT_ROOT
from qa.cli import main
from qa.locate import travel_axis_hint

PHANTOM = PROJECT_ROOT / "phantoms" / "lacuna-dbt-demo.yaml"
LIMITS = PROJECT_ROOT / "thresholds" / "demo.yaml"
CT_UID, MR_UID = "1.2.826.0.1.3680043.8.498.101", "1.2.826.0.1.3680043.8.498.102"


@pytest.fixture
def mixed_folder(slice_folder, tmp_path):
    noise = np.random.default_rng(4)

    def over_the_field(ds, k):
        ds.PixelSpacing = [0.5, 0.5]
        ds.ImagePositionPatient = [-32.0, -6.0, 17.5 + k]  # rows along x, columns along y
        ds.PixelData = noise.normal(1000.0, 20.0, (ds.Rows, ds.Columns)).astype(
            np.int16).tobytes()

    folder = tmp_path / "mixed"
    slice_folder("CT_small.dcm", 5, folder=folder, series_uid=CT_UID, prefix="ct",
                 edit=over_the_field)
    slice_folder("MR_small.dcm", 3, folder=folder, series_uid=MR_UID, prefix="mr")
    return folder


def _assess(folder, out, *options):
    return main(["assess", str(folder), "--phantom", str(PHANTOM), "--limits", str(LIMITS),
                 "--unit", "FEN-DBT-1", "--out", str(out), "--json", str(out / "r.json"),
                 "--no-history", *options])


def test_mixed_folder_without_series_names_the_option(mixed_folder, tmp_path, capsys):
    out = tmp_path / "out"
    assert _assess(mixed_folder, out) == 2
    lines = capsys.readouterr().err.strip().splitlines()
    assert len(lines) == 1 and str(mixed_folder) in lines[0]
    assert "mixed series in one folder, choose one with --series" in lines[0]
    assert CT_UID in lines[0] and MR_UID in lines[0]
    assert not out.exists()


def test_series_option_reads_the_chosen_series(mixed_folder, tmp_path, capsys):
    out = tmp_path / "out"
    code = _assess(mixed_folder, out, "--series", CT_UID)
    stdout = capsys.readouterr().out
    assert code in (0, 1)
    result = json.loads((out / "r.json").read_text())
    assert result["volume"]["sop_class"] == "CT Image Storage"  # the CT series, not the MR
    assert result["volume"]["travel_axis"] == "rows"
    # noise holds no bead: the summary ends with the note naming the other travel axis
    assert f"note:    {travel_axis_hint({})}" in stdout.splitlines()
    assert "--travel-axis columns" in travel_axis_hint({})


def test_series_option_that_matches_nothing(mixed_folder, tmp_path, capsys):
    out = tmp_path / "out"
    assert _assess(mixed_folder, out, "--series", "9.9") == 2
    lines = capsys.readouterr().err.strip().splitlines()
    assert len(lines) == 1 and "no series matches '9.9'" in lines[0]
    assert not out.exists()
