"""The Breast Tomosynthesis writer: round trips, outside validators, atomicity.

Reference: pydicom (reads the stored values back), dcmtk's ``dcmdump`` (parses
the file), ``dcmconv`` and ``dcmcrle`` (re-encode it in other transfer syntaxes) and
dicom3tools' ``dciodvfy`` (checks it against the IOD tables of DICOM PS3.3 A.55, Breast
Tomosynthesis Image IOD).
"""

from __future__ import annotations

import os
import shutil
import subprocess

import numpy as np
import pydicom
import pytest

from qa.errors import InputError
from qa.io import read_volume, write_dicom
from qa.io.dicom_write import quantise

needs_dcmdump = pytest.mark.skipif(shutil.which("dcmdump") is None,
                                   reason="dcmdump (Debian package dcmtk) is not installed")
needs_dcmconv = pytest.mark.skipif(
    shutil.which("dcmconv") is None or shutil.which("dcmcrle") is None
    or shutil.which("dcmdump") is None,
    reason="dcmconv, dcmcrle and dcmdump (Debian package dcmtk) are not installed")
needs_dciodvfy = pytest.mark.skipif(
    shutil.which("dciodvfy") is None,
    reason="dciodvfy (Debian package dicom3tools) is not installed")

UNIT = {"manufacturer": "Example Imaging", "model": "Tomo 3000", "serial": "SN-0042",
        "station": "MAMMO-2", "software": ["4.1.7", "recon 2.3"],
        "institution": "Example Screening Service"}


def _bound(vol, slope):
    """Half a quantum, plus one float32 spacing at the largest |value| for storing the
    read-back value as float32 (numpy.spacing), which is the stated error bound."""
    return slope / 2 + float(np.spacing(np.float32(np.abs(vol.data).max())))


def test_dicom_round_trip_within_half_a_quantum(small_volume, tmp_path):
    vol = small_volume()
    path = write_dicom(vol, tmp_path / "v.dcm", unit=UNIT)
    back = read_volume(path)
    _, slope, _ = quantise(vol.data)
    assert slope == pytest.approx((vol.data.max() - vol.data.min()) / 65535)  # closed form
    err = np.abs(back.data.astype(np.float64) - vol.data)
    assert err.max() <= _bound(vol, slope)
    assert err.max() > 0  # a random volume is not on the grid: the check has teeth
    # DS text keeps at least 10 significant digits: 1e-9 mm relative is far inside it
    np.testing.assert_allclose(back.spacing_mm, vol.spacing_mm, rtol=1e-9)
    np.testing.assert_allclose(back.origin_mm, vol.origin_mm, rtol=1e-9, atol=1e-9)
    assert back.meta["image_orientation_patient"] == [1.0, 0.0, 0.0, 0.0, 1.0, 0.0]
    for key, value in UNIT.items():
        assert back.meta[key] == value


def test_constant_volume_is_stored_exactly(small_volume, tmp_path):
    vol = small_volume()
    flat = type(vol)(np.full(vol.shape, 0.75, np.float32), vol.spacing_mm)
    back = read_volume(write_dicom(flat, tmp_path / "flat.dcm"))
    assert np.all(back.data == np.float32(0.75))  # slope 1, intercept 0.75: exact


def test_oblique_orientation_and_origin_survive(small_volume, tmp_path):
    # rows along patient y, columns along -z: normal r x c = (-1, 0, 0) (right-hand rule)
    iop = [0.0, 1.0, 0.0, 0.0, 0.0, -1.0]
    vol = small_volume(meta={"image_orientation_patient": iop})
    back = read_volume(write_dicom(vol, tmp_path / "obl.dcm"))
    assert back.meta["plane_normal_patient"] == [-1.0, 0.0, 0.0]
    np.testing.assert_allclose(back.origin_mm, vol.origin_mm, atol=1e-9)
    np.testing.assert_allclose(back.spacing_mm, vol.spacing_mm, rtol=1e-9)
    _, slope, _ = quantise(vol.data)
    assert np.abs(back.data - vol.data).max() <= _bound(vol, slope)


def test_pydicom_reads_the_stored_values_bit_exact(small_volume, tmp_path):
    vol = small_volume()
    stored, slope, intercept = quantise(vol.data)
    ds = pydicom.dcmread(write_dicom(vol, tmp_path / "v.dcm"))
    # the UID of the brief; pydicom's UID dictionary names it
    assert ds.SOPClassUID == "1.2.840.10008.5.1.4.1.1.13.1.3"
    assert ds.SOPClassUID.name == "Breast Tomosynthesis Image Storage"
    assert ds.pixel_array.dtype == np.uint16
    np.testing.assert_array_equal(ds.pixel_array, stored)  # pydicom's decode, exact
    rwvm = ds.SharedFunctionalGroupsSequence[0].RealWorldValueMappingSequence[0]
    assert (rwvm.RealWorldValueSlope, rwvm.RealWorldValueIntercept) == (slope, intercept)
    assert ds.PatientName == "QA^PHANTOM" and ds.PatientID == "LACUNA-QA"
    positions = [float(f.PlanePositionSequence[0].ImagePositionPatient[2])
                 for f in ds.PerFrameFunctionalGroupsSequence]
    np.testing.assert_allclose(np.diff(positions), vol.spacing_mm[0], rtol=1e-9)


def test_acquisition_facts_are_written(small_volume, tmp_path):
    meta = {"source_to_image_mm": 650.0, "scan_arc_deg": 25.0, "kvp_kv": 29.0,
            "acquisition_datetime": "20240315093000"}
    ds = pydicom.dcmread(write_dicom(small_volume(meta=meta), tmp_path / "v.dcm"))
    assert float(ds.DistanceSourceToDetector) == 650.0
    assert float(ds.PrimaryPositionerScanArc) == 25.0 and float(ds.KVP) == 29.0
    content = ds.PerFrameFunctionalGroupsSequence[0].FrameContentSequence[0]
    assert content.FrameAcquisitionDateTime == "20240315093000"
    back = read_volume(tmp_path / "v.dcm")
    for key, value in meta.items():
        assert back.meta[key] == value
    assert back.meta["acquired"] == "2024-03-15"  # ISO date of the DT above
    assert back.meta["half_arc_deg"] == 12.5  # half of the 25 degree scan arc


def test_simulator_meta_names_are_understood(small_volume, tmp_path):
    """The simulator's meta (qa.scenario.UNIT style: site, half_arc_deg, acquired)."""
    meta = {"manufacturer": "Lacuna simulator", "serial": "FEN-DBT-1", "station": "FEN-1",
            "site": "Fenmoor Breast Screening Service (fictional)", "software": "sim 1.0",
            "half_arc_deg": 12.5, "source_to_image_mm": 650.0, "acquired": "2025-11-03"}
    ds = pydicom.dcmread(write_dicom(small_volume(meta=meta), tmp_path / "v.dcm"))
    assert ds.DeviceSerialNumber == "FEN-DBT-1" and ds.StationName == "FEN-1"
    assert ds.InstitutionName == meta["site"]
    assert float(ds.PrimaryPositionerScanArc) == 25.0
    assert ds.PerFrameFunctionalGroupsSequence[0].FrameContentSequence[0]\
        .FrameAcquisitionDateTime == "20251103"
    back = read_volume(tmp_path / "v.dcm")
    assert back.meta["acquired"] == "2025-11-03" and back.meta["serial"] == "FEN-DBT-1"


@needs_dcmdump
@pytest.mark.parametrize("with_facts", [False, True])
def test_dcmdump_parses_without_warning(small_volume, tmp_path, with_facts):
    meta = {"source_to_image_mm": 650.0} if with_facts else {}
    path = write_dicom(small_volume(meta=meta), tmp_path / "v.dcm", unit=UNIT)
    run = subprocess.run(["dcmdump", str(path)], capture_output=True, text=True, check=False)
    lines = (run.stdout + run.stderr).splitlines()
    assert run.returncode == 0
    assert [ln for ln in lines if ln.startswith(("W:", "E:"))] == []
    assert any("BreastTomosynthesisImageStorage" in ln for ln in lines)


@needs_dcmdump
def test_dcmdump_does_flag_a_damaged_file(small_volume, tmp_path):
    """Control: the check above can fail (dcmdump warns on a cut file)."""
    path = write_dicom(small_volume(), tmp_path / "v.dcm")
    data = path.read_bytes()
    path.write_bytes(data[: len(data) - 1000])
    run = subprocess.run(["dcmdump", str(path)], capture_output=True, text=True, check=False)
    assert run.returncode != 0 or any(ln.startswith(("W:", "E:"))
                                      for ln in (run.stdout + run.stderr).splitlines())


@needs_dcmconv
@pytest.mark.parametrize("command, syntax, name", [
    (["dcmconv", "+te"], "LittleEndianExplicit", "Explicit VR Little Endian"),
    (["dcmconv", "+ti"], "LittleEndianImplicit", "Implicit VR Little Endian"),
    (["dcmconv", "+tb"], "BigEndianExplicit", "Explicit VR Big Endian"),
    (["dcmcrle"], "RLELossless", "RLE Lossless"),
], ids=["explicit-little", "implicit-little", "explicit-big", "rle"])
def test_dcmtk_conversions_read_back_bit_exact(small_volume, tmp_path, command, syntax, name):
    """Our file re-encoded by dcmtk (dcmconv: other uncompressed transfer syntaxes, the
    retired big-endian one included, which dcmtk still writes; dcmcrle: RLE Lossless,
    PS3.5 Annex G) reads back to the same voxels, in memory and on demand."""
    ours = write_dicom(small_volume(), tmp_path / "ours.dcm", unit=UNIT)
    converted = tmp_path / "converted.dcm"
    run = subprocess.run(command + [str(ours), str(converted)], capture_output=True,
                         text=True, check=False)
    assert run.returncode == 0, run.stdout + run.stderr
    dump = subprocess.run(["dcmdump", "-M", "+P", "0002,0010", str(converted)],
                          capture_output=True, text=True, check=False)
    assert f"={syntax} " in dump.stdout, dump.stdout  # dcmtk's name of what it wrote
    # the stored values as pydicom decodes dcmtk's encoding: those of our file
    assert np.array_equal(pydicom.dcmread(converted).pixel_array,
                          pydicom.dcmread(ours).pixel_array)
    expected = read_volume(ours)
    for lazy in (False, True):
        back = read_volume(converted, lazy=lazy)
        assert back.meta["transfer_syntax"] == name
        assert np.asarray(back.data).tobytes() == np.asarray(expected.data).tobytes()
        assert back.spacing_mm == expected.spacing_mm and back.origin_mm == expected.origin_mm
        for key in ("serial", "model", "value_slope", "value_intercept"):
            assert back.meta[key] == expected.meta[key], key


def _dciodvfy(path):
    run = subprocess.run(["dciodvfy", str(path)], capture_output=True, text=True, check=False)
    return (run.stdout + run.stderr).splitlines()


@needs_dciodvfy
@pytest.mark.parametrize("with_facts", [False, True])
def test_dciodvfy_reports_no_error(small_volume, tmp_path, with_facts):
    meta = {"source_to_image_mm": 650.0, "scan_arc_deg": 25.0} if with_facts else {}
    lines = _dciodvfy(write_dicom(small_volume(meta=meta), tmp_path / "v.dcm", unit=UNIT))
    assert "BreastTomosynthesisImage" in lines  # validated against the right IOD
    assert [ln for ln in lines if ln.startswith("Error")] == []
    if not with_facts:  # without extra facts the object is plain standard: no warning
        assert [ln for ln in lines if ln.startswith("Warning")] == []


@needs_dciodvfy
def test_dciodvfy_does_flag_a_missing_type1_attribute(small_volume, tmp_path):
    """Control: the validator catches what the writer must supply (Breast View)."""
    path = write_dicom(small_volume(), tmp_path / "v.dcm")
    ds = pydicom.dcmread(path)
    del ds.ViewCodeSequence
    ds.save_as(path)
    assert any(ln.startswith("Error") and "ViewCodeSequence" in ln for ln in _dciodvfy(path))


def test_write_is_atomic(small_volume, tmp_path, monkeypatch):
    path = write_dicom(small_volume(), tmp_path / "v.dcm")
    before = path.read_bytes()

    def half_then_fail(self, filename, **kwargs):  # a disk filling up half way
        with open(filename, "wb") as fh:
            fh.write(b"\0" * 200)
        raise OSError("No space left on device")

    with monkeypatch.context() as m:
        m.setattr(pydicom.dataset.Dataset, "save_as", half_then_fail)
        with pytest.raises(OSError, match="No space left"):
            write_dicom(small_volume(seed=5), path)
    assert path.read_bytes() == before and os.listdir(tmp_path) == ["v.dcm"]


def test_refusals_leave_the_old_file(small_volume, tmp_path):
    path = write_dicom(small_volume(), tmp_path / "v.dcm")
    before = path.read_bytes()
    bad = small_volume()
    nan = bad.data.copy()
    nan[0, 0, 0] = np.nan
    with pytest.raises(InputError, match=r"NaN or infinite"):
        write_dicom(type(bad)(nan, bad.spacing_mm), path)
    with pytest.raises(InputError, match=r"unknown unit fields \['colour'\]"):
        write_dicom(bad, path, unit={"colour": "blue"})
    assert path.read_bytes() == before and os.listdir(tmp_path) == ["v.dcm"]


def test_bad_options_are_refused(small_volume, tmp_path):
    with pytest.raises(InputError, match=r"laterality must be 'R' or 'L'"):
        write_dicom(small_volume(), tmp_path / "v.dcm", laterality="left")
    with pytest.raises(InputError, match=r"view must be one of \['CC', 'MLO'\]"):
        write_dicom(small_volume(), tmp_path / "v.dcm", view="ML")
    # Station Name is SH, at most 16 characters (DICOM PS3.5 Table 6.2-1)
    with pytest.raises(InputError, match=r"field 'station': 'MAMMOGRAPHY-ROOM-12' is 19 "
                                         r"characters; DICOM StationName \(SH\) holds at most 16"):
        write_dicom(small_volume(), tmp_path / "v.dcm", unit={"station": "MAMMOGRAPHY-ROOM-12"})
