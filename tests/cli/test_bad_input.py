"""``lacuna assess`` on bad input: one line naming the file, exit code 2, nothing written.

Each case of the issue's list of bad input goes through the command line as a user runs
it. What must hold (README, "Commands"; DEVELOPERS.md, "Conventions"): exit code 2,
exactly one line on standard error that names the offending file, and neither the
output folder (log, JSON) nor the history database created.

The volumes are built with the shared fixtures of ``tests/conftest.py`` (a small volume
written by Lacuna's writer and edited with pydicom, pydicom's bundled sample files); the
phantom definitions are the shipped demo definition edited as in
``tests/phantom/test_load.py``. Expected refusals: a 2D image where a volume is expected
(pydicom's sample CT_small.dcm, a single-frame CT slice: pydicom test_files/README.txt);
a transfer syntax Lacuna cannot decode (MPEG2, DICOM PS3.5 Table A-1, UID
1.2.840.10008.1.2.4.100, from memory; pydicom's UID dictionary names it).
"""

from __future__ import annotations

import re
import shutil

import pydicom
import pytest
from pydicom.encaps import encapsulate

from qa import PROJECT_ROOT
from qa.cli import main
from qa.io import write_dicom

PHANTOM = PROJECT_ROOT / "phantoms" / "lacuna-dbt-demo.yaml"
LIMITS = PROJECT_ROOT / "thresholds" / "demo.yaml"


def _edit(path, change):
    ds = pydicom.dcmread(path)
    change(ds)
    ds.save_as(path)
    return path


def _set_z(ds, k, z):
    ds.PerFrameFunctionalGroupsSequence[k].PlanePositionSequence[0].ImagePositionPatient[2] = z


def _written(ctx):
    return write_dicom(ctx["small_volume"](), ctx["tmp"] / "v.dcm")


def truncated(ctx):
    path = _written(ctx)
    path.write_bytes(path.read_bytes()[: path.stat().st_size // 2])
    return path


def missing_pixel_spacing(ctx):
    def drop(ds):
        del ds.SharedFunctionalGroupsSequence[0].PixelMeasuresSequence[0].PixelSpacing
    return _edit(_written(ctx), drop)


def non_uniform_positions(ctx):
    # origin z 3.5 mm, 1 mm planes: the third frame at 6.0 mm instead of 5.5 mm
    return _edit(_written(ctx), lambda ds: _set_z(ds, 2, 6.0))


def duplicate_positions(ctx):
    # the fourth frame moved onto the third one's 5.5 mm
    return _edit(_written(ctx), lambda ds: _set_z(ds, 3, 5.5))


def duplicate_slice_positions(ctx):
    folder, _, _ = ctx["slice_folder"]("CT_small.dcm", 4, positions=[0.0, 2.5, 2.5, 5.0])
    return folder


def image_2d(ctx):
    path = ctx["tmp"] / "slice.dcm"
    shutil.copyfile(ctx["sample"]("CT_small.dcm"), path)
    return path


def empty_folder(ctx):
    folder = ctx["tmp"] / "empty"
    folder.mkdir()
    return folder


def mpeg_transfer_syntax(ctx):
    def relabel(ds):  # frames wrapped as fragments, not encoded: refused before decoding
        size = ds.Rows * ds.Columns * 2
        ds.PixelData = encapsulate([ds.PixelData[k * size:(k + 1) * size]
                                    for k in range(int(ds.NumberOfFrames))])
        ds["PixelData"].VR = "OB"
        ds.file_meta.TransferSyntaxUID = "1.2.840.10008.1.2.4.100"
    return _edit(_written(ctx), relabel)


def _yaml(ctx, source, old, new, name):
    text = source.read_text()
    assert old in text
    path = ctx["tmp"] / name
    path.write_text(text.replace(old, new, 1))
    return path


def unknown_object_type(ctx):
    return _yaml(ctx, PHANTOM, "shape: sphere", "shape: pyramid", "phantom.yaml")


def missing_field(ctx):
    return _yaml(ctx, PHANTOM, "    radius_mm: 0.5\n", "", "phantom.yaml")


def unsafe_tag_in_phantom(ctx):
    return _yaml(ctx, PHANTOM, "phantom: lacuna-tern",
                 "phantom: !!python/object/apply:os.system [ls]", "phantom.yaml")


def unsafe_tag_in_limits(ctx):
    return _yaml(ctx, LIMITS, "profile: demo", "profile: !!python/object/apply:os.system [ls]",
                 "limits.yaml")


#: case -> (builder, which argument it replaces, what the message must say)
CASES = {
    "truncated file": (truncated, "volume", r"truncated file"),
    "missing pixel spacing": (missing_pixel_spacing, "volume", r"missing Pixel Spacing"),
    "non-uniform frame positions": (non_uniform_positions, "volume",
                                    r"non-uniform frame positions"),
    "duplicate frame positions": (duplicate_positions, "volume", r"duplicate frame positions"),
    "duplicate slice positions": (duplicate_slice_positions, "volume", r"duplicate"),
    "2D image": (image_2d, "volume", r"a 2D image"),
    "empty folder": (empty_folder, "volume", r"no DICOM images in the folder"),
    "unreadable transfer syntax": (mpeg_transfer_syntax, "volume",
                                   r"unsupported transfer syntax MPEG2"),
    "unknown object type": (unknown_object_type, "phantom", r"objects\[1\]\.shape"),
    "missing field": (missing_field, "phantom", r"missing required field"),
    "unsafe YAML tag (phantom)": (unsafe_tag_in_phantom, "phantom", r"YAML tag not allowed"),
    "unsafe YAML tag (limits)": (unsafe_tag_in_limits, "limits", r"YAML tag not allowed"),
}


@pytest.mark.parametrize("case", list(CASES))
def test_bad_input_gives_one_line_exit_2_and_writes_nothing(
        case, tmp_path, capsys, small_volume, slice_folder, sample):
    build, role, message = CASES[case]
    work = tmp_path / "in"
    work.mkdir()
    ctx = {"tmp": work, "small_volume": small_volume, "slice_folder": slice_folder,
           "sample": sample}
    paths = {"volume": None, "phantom": PHANTOM, "limits": LIMITS}
    paths[role] = build(ctx)
    if paths["volume"] is None:  # a phantom or profile case: a volume that would be read
        paths["volume"] = _written(ctx)
    out, history = tmp_path / "out", tmp_path / "history.sqlite"
    capsys.readouterr()
    code = main(["assess", str(paths["volume"]), "--phantom", str(paths["phantom"]),
                 "--limits", str(paths["limits"]), "--unit", "FEN-DBT-1", "--out", str(out),
                 "--json", str(out / "results.json"), "--history", str(history)])
    captured = capsys.readouterr()
    lines = captured.err.strip().splitlines()
    assert code == 2, captured
    assert len(lines) == 1, lines
    assert str(paths[role]) in lines[0], lines[0]
    assert re.search(message, lines[0]), lines[0]
    assert not out.exists(), sorted(out.rglob("*"))
    assert not history.exists()
