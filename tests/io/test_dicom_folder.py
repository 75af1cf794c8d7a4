"""Folders of single-frame DICOM slices, built from pydicom's bundled samples.

Reference: pydicom's sample files (CT_small, MR_small and its RLE copy,
JPEG samples; see pydicom's test_files/README.txt) and pydicom's decoding of them.
"""

from __future__ import annotations

import json

import numpy as np
import pydicom
import pytest
from pydicom.pixels import get_decoder
from pydicom.uid import JPEGExtended12Bit, JPEGLSNearLossless

from qa.errors import InputError
from qa.io import read_volume, write_dicom


def test_shuffled_ct_slices_read_in_position_order(sample, slice_folder):
    folder, stored, names = slice_folder("CT_small.dcm", 5, dz=2.5)
    assert sorted(names) != names  # file-name order is not position order
    (folder / "README.txt").write_text("not DICOM")  # ignored
    (folder / "thumbs.db").write_bytes(b"\x01\x02" * 300)  # ignored
    vol = read_volume(folder)
    ref = pydicom.dcmread(sample("CT_small.dcm"))
    slope, intercept = float(ref.RescaleSlope), float(ref.RescaleIntercept)
    for k in range(5):  # values from pydicom's decode and the file's rescale
        np.testing.assert_array_equal(vol.data[k], (stored[k] * slope + intercept)
                                      .astype(np.float32))
    # CT_small header: Pixel Spacing 0.661468 \ 0.661468, position (-158.135803, ...)
    assert vol.spacing_mm == pytest.approx((2.5, 0.661468, 0.661468), rel=1e-12)
    assert vol.origin_mm == pytest.approx((-75.699997, -179.035797, -158.135803), rel=1e-12)
    assert vol.meta["number_of_files"] == 5
    assert vol.meta["modality"] == "CT"
    assert vol.meta["value_mapping"] == "rescale"
    text = json.dumps(dict(vol.meta))
    # CT_small carries Patient's Name / ID 'CompressedSamples^CT1' / '1CT1' (pydicom)
    assert ref.PatientName == "CompressedSamples^CT1" and ref.PatientID == "1CT1"
    assert "CompressedSamples" not in text and "1CT1" not in text


def test_rle_slices_match_uncompressed_ones(slice_folder, tmp_path):
    # MR_small_RLE holds MR_small's pixels RLE-encoded (identical after pydicom's decode)
    plain, _, _ = slice_folder("MR_small.dcm", 4, folder=tmp_path / "plain")
    rle, _, _ = slice_folder("MR_small_RLE.dcm", 4, folder=tmp_path / "rle")
    a, b = read_volume(plain), read_volume(rle)
    base = a.data[0]
    assert np.array_equal(b.data[0], base)  # plane 0 of plain is the sample itself
    assert b.meta["transfer_syntax"] == "RLE Lossless"
    assert b.spacing_mm == a.spacing_mm and b.origin_mm == a.origin_mm


def test_mixed_series_are_refused_naming_both(slice_folder, tmp_path):
    folder = tmp_path / "mixed"
    slice_folder("CT_small.dcm", 3, folder=folder, series_uid="1.2.3.4.100", prefix="ct")
    slice_folder("MR_small.dcm", 3, folder=folder, series_uid="1.2.3.4.200", prefix="mr")
    with pytest.raises(InputError, match=r"mixed series in one folder.*series "
                                         r"1\.2\.3\.4\.100.*\(3 files\); series "
                                         r"1\.2\.3\.4\.200.*\(3 files\)"):
        read_volume(folder)
    assert read_volume(folder, series="1.2.3.4.200").meta["modality"] == "MR"
    with pytest.raises(InputError, match=r"no series matches '9\.9'.*1\.2\.3\.4\.100"):
        read_volume(folder, series="9.9")


def test_series_chosen_by_description(slice_folder, tmp_path):
    folder = tmp_path / "mixed"

    def describe(text):
        return lambda ds, k: setattr(ds, "SeriesDescription", text)
    slice_folder("MR_small.dcm", 3, folder=folder, prefix="a", edit=describe("AXIAL T1"))
    slice_folder("MR_small.dcm", 4, folder=folder, prefix="b", edit=describe("AXIAL T2"))
    assert read_volume(folder, series="AXIAL T2").shape == (4, 64, 64)


def test_multiframe_file_among_slices_is_refused(slice_folder, small_volume):
    folder, _, _ = slice_folder("CT_small.dcm", 3, series_uid="1.2.3.4.5")
    write_dicom(small_volume(), folder / "multi.dcm", series_uid="1.2.3.4.5")
    with pytest.raises(InputError, match=r"multi\.dcm: a multi-frame object among "
                                         r"single-frame slices"):
        read_volume(folder)


def test_empty_and_non_dicom_folders(tmp_path):
    empty = tmp_path / "empty"
    empty.mkdir()
    with pytest.raises(InputError, match=r"empty: no DICOM images in the folder "
                                         r"\(0 files looked at\)"):
        read_volume(empty)
    (empty / "a.txt").write_text("x")
    with pytest.raises(InputError, match=r"\(1 files looked at\)"):
        read_volume(empty)


def test_single_slice_is_a_2d_image(slice_folder):
    folder, _, _ = slice_folder("CT_small.dcm", 1)
    with pytest.raises(InputError, match=r"a 2D image \(a single frame\) where a volume"):
        read_volume(folder)


def test_non_uniform_slices_are_refused_naming_files(slice_folder):
    folder, _, names = slice_folder("CT_small.dcm", 5, positions=[0, 2.5, 5.0, 8.0, 10.0])
    # CT_small's own position along the normal (z) is -75.699997 mm
    with pytest.raises(InputError, match=rf"non-uniform frame positions: step 3\.0000 mm "
                                         rf"between {names[2]} at -70\.7000 mm and "
                                         rf"{names[3]} at -67\.7000 mm"):
        read_volume(folder)


def test_duplicate_slices_are_refused_naming_files(slice_folder):
    folder, _, names = slice_folder("CT_small.dcm", 4, positions=[0, 2.5, 2.5, 5.0])
    with pytest.raises(InputError, match=rf"duplicate frame positions: {names[1]} and "
                                         rf"{names[2]} both lie at -73\.2000 mm"):
        read_volume(folder)


def test_slice_without_pixel_spacing_is_refused(slice_folder):
    def drop(ds, k):
        if k == 2:
            del ds.PixelSpacing
    folder, _, names = slice_folder("CT_small.dcm", 4, edit=drop)
    with pytest.raises(InputError, match=rf"{names[2]}: missing Pixel Spacing"):
        read_volume(folder)


def test_truncated_slice_is_refused(slice_folder):
    folder, _, names = slice_folder("CT_small.dcm", 4)
    victim = folder / names[1]
    victim.write_bytes(victim.read_bytes()[:-5000])
    with pytest.raises(InputError, match=rf"{names[1]}: truncated file"):
        read_volume(folder)


def test_jpeg_ls_slices_without_decoder(slice_folder):
    if get_decoder(JPEGLSNearLossless).is_available:
        pytest.skip("a JPEG-LS decoder is installed here; nothing is missing")
    folder, _, names = slice_folder("JPEGLSNearLossless_16.dcm", 3)
    with pytest.raises(InputError, match=r"JPEG-LS Lossy \(Near-Lossless\) Image Compression "
                                         r"\(1\.2\.840\.10008\.1\.2\.4\.81\) and no decoder"):
        read_volume(folder)


def test_12bit_jpeg_slices_that_pillow_cannot_decode(slice_folder):
    if set(get_decoder(JPEGExtended12Bit).available_plugins) != {"pillow"}:
        pytest.skip("a 12-bit JPEG decoder other than Pillow's is installed (or none)")
    folder, _, _ = slice_folder("JPEG-lossy.dcm", 3)
    with pytest.raises(InputError, match=r"cannot decode img\d+\.dcm: RuntimeError: .*"
                                         r"12-bit precision"):
        read_volume(folder)
