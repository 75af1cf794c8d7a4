"""Source paths that name the patient are scrubbed before they leave the reader."""

import json

import numpy as np
import pydicom

from qa.io import read_volume, write_dicom
from qa.io.deidentify import scrub_path
from qa.volume import Volume


def test_scrub_path_removes_name_parts_and_ids():
    ds = pydicom.Dataset()
    ds.PatientName = "Doe^Jane^Q"
    ds.PatientID = "MRN004217"
    ds.PatientBirthDate = "19610203"
    path = "/exports/DOE_JANE_MRN004217/19610203/dbt.dcm"
    out = scrub_path(path, ds)
    for word in ("DOE", "JANE", "MRN004217", "19610203"):
        assert word.lower() not in out.lower()
    assert out.endswith("dbt.dcm")


def test_reader_scrubs_a_patient_folder(tmp_path):
    folder = tmp_path / "Smithers_Waylon"
    folder.mkdir()
    vol = Volume(np.random.default_rng(0).random((4, 6, 8), dtype=np.float32), (1.0, 0.1, 0.1))
    path = write_dicom(vol, folder / "vol.dcm")
    ds = pydicom.dcmread(path)
    ds.PatientName = "Smithers^Waylon"
    ds.PatientID = "ID77331"
    ds.save_as(path)
    meta = read_volume(path).meta
    text = json.dumps(dict(meta))
    assert "Smithers" not in text and "Waylon" not in text and "ID77331" not in text
    assert meta["source_file"].endswith("vol.dcm")
