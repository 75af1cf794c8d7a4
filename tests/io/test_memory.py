"""Frame-by-frame reading: the reader's peak memory stays near one float32 volume.

Reference: numpy reports its allocations to the standard library's tracemalloc, which
measures the peak here. A reader that decoded all frames at once and then converted
them would hold the stored uint16 volume beside the float32 one (peak >= 1.5 volumes)
or two float32 copies (>= 2 volumes). Clinical sizes (about 70 x 2000 x 2500) are in
tests/benchmarks/test_io_large.py.
"""

from __future__ import annotations

import tracemalloc

import numpy as np

from qa.io import read_volume, write_dicom
from qa.volume import Volume


def _peak_bytes(fn):
    tracemalloc.start()
    try:
        result = fn()
        return result, tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


def test_multiframe_read_peak_is_about_one_volume(tmp_path):
    shape = (24, 256, 256)  # 6.3 MB as float32; one frame buffer is 0.5 MB
    data = np.random.default_rng(11).normal(0.5, 0.1, shape).astype(np.float32)
    path = write_dicom(Volume(data, (1.0, 0.1, 0.1)), tmp_path / "v.dcm")
    del data
    vol, peak = _peak_bytes(lambda: read_volume(path))
    # limit 1.3 volumes: one float32 volume + a float64 and a uint16 frame (1/24 + 1/96
    # of it) + header; a full second copy of any kind would pass 1.5
    assert peak < 1.3 * vol.data.nbytes
    assert not vol.data.flags.writeable  # handed to Volume read-only: kept, not copied


def test_folder_read_peak_is_about_one_volume(slice_folder):
    folder, _, _ = slice_folder("CT_small.dcm", 16)  # 16 slices of 128 x 128 (1 MB)
    vol, peak = _peak_bytes(lambda: read_volume(folder))
    assert vol.shape == (16, 128, 128)
    # same budget as above, plus 0.3 MB for the one parsed header held at a time
    # (about 0.1 MB as parsed by pydicom) and the decoder's work buffers
    assert peak < 1.3 * vol.data.nbytes + 0.3e6
