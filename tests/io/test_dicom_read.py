"""Reading enhanced multi-frame DICOM: frame order, checks, refusals, sample files.

Reference: pydicom's bundled sample files (test_files/README.txt in pydicom)
and pydicom's decoding; frames are reordered and edited with pydicom, not with Lacuna.
"""

from __future__ import annotations

import json

import numpy as np
import pydicom
import pytest
from pydicom.encaps import encapsulate
from pydicom.sequence import Sequence
from pydicom.uid import JPEGLSNearLossless

from qa.errors import InputError
from qa.io import read_volume, write_dicom
from qa.io.dicom_geometry import SPACING_TOLERANCE_REL


def _edit(path, change):
    ds = pydicom.dcmread(path)
    change(ds)
    ds.save_as(path)
    return path


def _set_z(ds, k, z):
    ds.PerFrameFunctionalGroupsSequence[k].PlanePositionSequence[0].ImagePositionPatient[2] = z


def test_frame_order_comes_from_positions_not_file_order(small_volume, tmp_path):
    vol = small_volume()
    plain = read_volume(write_dicom(vol, tmp_path / "a.dcm"))
    perm = np.random.default_rng(7).permutation(vol.shape[0])

    def shuffle(ds):  # reorder frames and their per-frame groups together
        frames = ds.pixel_array
        items = list(ds.PerFrameFunctionalGroupsSequence)
        ds.PerFrameFunctionalGroupsSequence = Sequence([items[i] for i in perm])
        ds.PixelData = frames[perm].tobytes()

    shuffled = read_volume(_edit(write_dicom(vol, tmp_path / "b.dcm"), shuffle))
    assert not np.array_equal(perm, np.arange(len(perm)))
    assert shuffled.data.tobytes() == plain.data.tobytes()  # same stored values: exact
    assert shuffled.origin_mm == plain.origin_mm
    assert shuffled.meta["frames_in_position_order"] is False
    assert plain.meta["frames_in_position_order"] is True


def test_positions_within_tolerance_are_accepted(small_volume, tmp_path):
    # frame 3 nominally at 5.5 mm (origin 3.5, dz 1); a jitter of a fifth of the stated
    # tolerance is accepted and the mean step stays 1 mm (first and last are exact)
    jitter = 0.2 * SPACING_TOLERANCE_REL * 1.0
    path = _edit(write_dicom(small_volume(), tmp_path / "v.dcm"),
                 lambda ds: _set_z(ds, 2, 5.5 + jitter))
    assert read_volume(path).spacing_mm[0] == pytest.approx(1.0, abs=1e-12)


def test_non_uniform_positions_are_refused(small_volume, tmp_path):
    # origin z 3.5, dz 1: frame 3 at 6.0 instead of 5.5 is a 50 % departure
    path = _edit(write_dicom(small_volume(), tmp_path / "v.dcm"), lambda ds: _set_z(ds, 2, 6.0))
    with pytest.raises(InputError, match=r"v\.dcm: non-uniform frame positions: step "
                                         r"1\.5000 mm between frame 2 at 4\.5000 mm and "
                                         r"frame 3 at 6\.0000 mm"):
        read_volume(path)


def test_duplicate_positions_are_refused(small_volume, tmp_path):
    path = _edit(write_dicom(small_volume(), tmp_path / "v.dcm"), lambda ds: _set_z(ds, 3, 5.5))
    with pytest.raises(InputError, match=r"v\.dcm: duplicate frame positions: frame 3 and "
                                         r"frame 4 both lie at 5\.5000 mm"):
        read_volume(path)


def test_missing_pixel_spacing_is_refused(small_volume, tmp_path):
    def drop(ds):
        del ds.SharedFunctionalGroupsSequence[0].PixelMeasuresSequence[0].PixelSpacing
    path = _edit(write_dicom(small_volume(), tmp_path / "v.dcm"), drop)
    with pytest.raises(InputError, match=r"v\.dcm: missing Pixel Spacing \(0028,0030\)"):
        read_volume(path)


def test_in_plane_shift_is_refused(small_volume, tmp_path):
    def shift(ds):  # frame 2 moved by 1 mm along x: about 12 pixels
        ds.PerFrameFunctionalGroupsSequence[1].PlanePositionSequence[0]\
            .ImagePositionPatient[0] = 8.25
    path = _edit(write_dicom(small_volume(), tmp_path / "v.dcm"), shift)
    with pytest.raises(InputError, match=r"frames are shifted in-plane"):
        read_volume(path)


@pytest.mark.parametrize("keep", [0.5, 0.9])
def test_truncated_file_is_refused(small_volume, tmp_path, keep):
    path = write_dicom(small_volume(), tmp_path / "v.dcm")
    data = path.read_bytes()
    path.write_bytes(data[: int(len(data) * keep)])
    with pytest.raises(InputError, match=r"v\.dcm: truncated file"):
        read_volume(path)


def test_header_cut_short_is_refused(small_volume, tmp_path):
    path = write_dicom(small_volume(), tmp_path / "v.dcm")
    path.write_bytes(path.read_bytes()[:1500])  # inside the header, before Pixel Data
    with pytest.raises(InputError, match=r"truncated file, or no image"):
        read_volume(path)


def _relabel(ds, tsyntax):
    """Claim a compressed transfer syntax (frames wrapped as fragments, not encoded):
    enough for a reader that must refuse before decoding anything."""
    size = ds.Rows * ds.Columns * 2
    ds.PixelData = encapsulate([ds.PixelData[k * size:(k + 1) * size]
                                for k in range(int(ds.NumberOfFrames))])
    ds["PixelData"].VR = "OB"
    ds.file_meta.TransferSyntaxUID = tsyntax


def test_unsupported_transfer_syntax_is_named(small_volume, tmp_path):
    def mpeg(ds):  # MPEG2 video (UID from memory; pydicom's dictionary names it)
        _relabel(ds, "1.2.840.10008.1.2.4.100")
    path = _edit(write_dicom(small_volume(), tmp_path / "v.dcm"), mpeg)
    with pytest.raises(InputError, match=r"unsupported transfer syntax MPEG2 Main Profile "
                                         r"/ Main Level \(1\.2\.840\.10008\.1\.2\.4\.100\)"):
        read_volume(path)


def test_not_dicom(tmp_path):
    (tmp_path / "x.dcm").write_bytes(b"\0" * 200)
    with pytest.raises(InputError, match=r"x\.dcm: not a DICOM file"):
        read_volume(tmp_path / "x.dcm")


@pytest.mark.parametrize("name, message", [
    # single-frame CT and MR slices (README: downsized NEMA WG04 images)
    ("CT_small.dcm", r"a 2D image \(a single frame, CT Image Storage\) where a volume"),
    ("MR_small.dcm", r"a 2D image \(a single frame, MR Image Storage\)"),
    # README: MR_small truncated inside its pixel data
    ("MR_truncated.dcm", r"truncated file: pixel data hold \d+ bytes of the 8192"),
    # RT Dose: 15 frames placed by Grid Frame Offset Vector, no functional groups
    ("rtdose.dcm", r"15 frames but no Per-frame Functional Groups"),
    # two RGB frames, RLE compressed
    ("SC_rgb_rle_2frame.dcm", r"a colour image \(RGB, 3 samples per pixel\)"),
    # README: NM1_JPLY, JPEG 12-bit lossy, one frame (filed as Secondary Capture)
    ("JPEG-lossy.dcm", r"a 2D image \(a single frame, Secondary Capture Image Storage"),
    # README: the same dataset as CT_small without File Meta Information
    ("no_meta.dcm", r"not a DICOM file"),
])
def test_pydicom_samples_are_refused_clearly(sample, name, message):
    path = sample(name)
    with pytest.raises(InputError, match=message) as info:
        read_volume(path)
    assert str(info.value).startswith(path) and "\n" not in str(info.value)


def test_rescale_shared_or_per_frame_is_applied(small_volume, tmp_path):
    """Files of other makers carry Rescale Slope/Intercept (PS3.3 Pixel Value
    Transformation); expected values from pydicom's stored values and those numbers."""
    slopes, intercepts = [0.5, 1.0, 2.0, 0.25, 4.0, 3.0], [-10.0, 0.0, 7.5, 1.0, -2.0, 0.0]

    def per_frame(ds):
        del ds.SharedFunctionalGroupsSequence[0].RealWorldValueMappingSequence
        del ds.SharedFunctionalGroupsSequence[0].PixelValueTransformationSequence
        for item, m, b in zip(ds.PerFrameFunctionalGroupsSequence, slopes, intercepts):
            pvt = pydicom.Dataset()
            pvt.RescaleSlope, pvt.RescaleIntercept, pvt.RescaleType = m, b, "US"
            item.PixelValueTransformationSequence = Sequence([pvt])

    path = _edit(write_dicom(small_volume(), tmp_path / "p.dcm"), per_frame)
    stored = pydicom.dcmread(path).pixel_array.astype(np.float64)
    vol = read_volume(path)
    expect = stored * np.array(slopes)[:, None, None] + np.array(intercepts)[:, None, None]
    np.testing.assert_array_equal(vol.data, expect.astype(np.float32))  # exact in float32
    assert vol.meta["value_mapping"] == "rescale" and vol.meta["value_mapping_per_frame"]

    def shared(ds):
        del ds.SharedFunctionalGroupsSequence[0].RealWorldValueMappingSequence
        pvt = ds.SharedFunctionalGroupsSequence[0].PixelValueTransformationSequence[0]
        pvt.RescaleSlope, pvt.RescaleIntercept = 2, -100
    path = _edit(write_dicom(small_volume(), tmp_path / "s.dcm"), shared)
    vol = read_volume(path)
    expect = pydicom.dcmread(path).pixel_array * 2.0 - 100.0
    np.testing.assert_array_equal(vol.data, expect.astype(np.float32))
    assert (vol.meta["value_slope"], vol.meta["value_intercept"]) == (2.0, -100.0)


def test_compressed_without_decoder_is_refused(small_volume, tmp_path):
    from pydicom.pixels import get_decoder
    if get_decoder(JPEGLSNearLossless).is_available:
        pytest.skip("a JPEG-LS decoder is installed here; nothing is missing")

    def jpegls(ds):
        _relabel(ds, JPEGLSNearLossless)
    path = _edit(write_dicom(small_volume(), tmp_path / "v.dcm"), jpegls)
    with pytest.raises(InputError, match=r"compressed as JPEG-LS Lossy \(Near-Lossless\) "
                                         r"Image Compression .* no decoder for it is installed;"
                                         r" it needs one of: .*pylibjpeg"):
        read_volume(path)


IDENTIFIERS = {  # invented values, each one distinct so a leak is unambiguous
    "PatientName": "DOE^JANE^Q", "PatientID": "PID-778899", "PatientBirthDate": "19611224",
    "PatientAddress": "12 Elm Row, Springfield", "AccessionNumber": "ACC-556677",
    "ReferringPhysicianName": "HOUSE^GREGORY",
    "PatientTelephoneNumbers": "555-0199", "InstitutionAddress": "1 Clinic Way",
    "OperatorsName": "SMITH^OPERATOR", "PerformingPhysicianName": "GREY^MEREDITH",
    "StudyDescription": "SCREENING DOE", "ImageComments": "patient jane doe",
}


def test_patient_identifiers_never_reach_meta(small_volume, tmp_path):
    def identify(ds):
        for keyword, value in IDENTIFIERS.items():
            setattr(ds, keyword, value)
        other = pydicom.Dataset()
        other.PatientID, other.IssuerOfPatientID = "OTHER-3141", "HOSP-B"
        ds.OtherPatientIDsSequence = Sequence([other])
    path = _edit(write_dicom(small_volume(), tmp_path / "v.dcm"), identify)
    assert pydicom.dcmread(path).PatientName == "DOE^JANE^Q"  # the header does carry them
    vol = read_volume(path)
    text = json.dumps(dict(vol.meta))
    for value in list(IDENTIFIERS.values()) + ["OTHER-3141", "HOSP-B", "QA^PHANTOM"]:
        assert value not in text
    words = ("patient_name", "patient_id", "birth", "address", "accession", "physician",
             "operator", "comment", "telephone", "study_description")
    assert not [key for key in vol.meta for word in words if word in key]
    assert vol.meta["manufacturer"] == "Lacuna"  # unit identity is kept
