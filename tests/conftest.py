"""Shared fixtures: small volumes and folders of DICOM slices.

Used by the reader/writer tests (``tests/io``) and the command-line tests of bad input
and read options (``tests/cli``).

Reference (used throughout): pydicom's bundled sample files
(``pydicom.data.get_testdata_file``, described in pydicom's test_files/README.txt) and
pydicom's own decoding of them.
"""

from __future__ import annotations

import numpy as np
import pydicom
import pytest
from pydicom.data import get_testdata_file
from pydicom.uid import generate_uid

from qa.volume import Volume


def sample(name: str) -> str:
    """Path of a pydicom sample bundled with the package (never downloaded)."""
    path = get_testdata_file(name, download=False)
    if path is None:
        pytest.skip(f"pydicom sample {name} is not installed here")
    return path


@pytest.fixture(name="sample")
def sample_fixture():
    """:func:`sample` as a fixture (test modules cannot import conftest)."""
    return sample


@pytest.fixture
def small_volume():
    """A (6, 24, 32) volume whose planes differ, seeded; meta with unit facts."""
    def make(shape=(6, 24, 32), *, spacing=(1.0, 0.085, 0.085), origin=(3.5, -12.0, 7.25),
             meta=None, seed=0):
        rng = np.random.default_rng(seed)
        z = np.arange(shape[0], dtype=np.float32)[:, None, None]
        data = (0.05 * z + rng.normal(0.4, 0.02, shape)).astype(np.float32)
        return Volume(data, spacing, origin, meta or {})
    return make


@pytest.fixture
def slice_folder(tmp_path):
    """Write ``n`` single-frame copies of a pydicom sample as a shuffled folder.

    Slice ``k`` lies at ``z0 + k dz`` along the sample's own normal and, for an
    uncompressed sample, holds the sample's stored values plus ``k`` so planes differ.
    Returns the folder, the (uncompressed) stored arrays in position order and the
    file name of each slice in position order.
    """
    def make(name: str, n: int = 5, *, dz: float = 2.5, folder=None, seed=1,
             positions=None, series_uid=None, edit=None, prefix="img"):
        folder = folder or (tmp_path / "slices")
        folder.mkdir(exist_ok=True)
        base = pydicom.dcmread(sample(name))
        compressed = base.file_meta.TransferSyntaxUID.is_compressed
        r = np.array(base.ImageOrientationPatient[:3], float) if "ImageOrientationPatient" \
            in base else np.array([1.0, 0, 0])
        c = np.array(base.ImageOrientationPatient[3:], float) if "ImageOrientationPatient" \
            in base else np.array([0, 1.0, 0])
        p0 = np.array(base.get("ImagePositionPatient", [0, 0, 0]), float)
        series_uid = series_uid or generate_uid()
        order = np.random.default_rng(seed).permutation(n)
        stored, names = [], []
        for k in range(n):
            ds = pydicom.dcmread(sample(name))
            ds.ImageOrientationPatient = [float(v) for v in np.concatenate([r, c])]
            s = positions[k] if positions is not None else k * dz
            ds.ImagePositionPatient = [float(v) for v in p0 + s * np.cross(r, c)]
            ds.SOPInstanceUID = generate_uid()
            ds.file_meta.MediaStorageSOPInstanceUID = ds.SOPInstanceUID
            ds.SeriesInstanceUID = series_uid
            ds.InstanceNumber = int(order[k]) + 1
            if not compressed:
                arr = ds.pixel_array + k
                ds.PixelData = arr.astype(ds.pixel_array.dtype).tobytes()
                stored.append(arr)
            if edit:
                edit(ds, k)
            names.append(f"{prefix}{order[k]:03d}.dcm")
            ds.save_as(folder / names[-1])
        return folder, stored, names
    return make
