"""Clinical-size DICOM read: peak memory and time (not in the default test run).

Run with ``python -m pytest tests/benchmarks/test_io_large.py -s``. The size follows a
clinical DBT reconstruction, about 70 planes of 2000 x 2500 pixels (common practice);
set ``LACUNA_BENCH_SHAPE=nz,ny,nx`` to try another. Writing needs about 1.5 GB of disk
and memory for the default size; reading must stay near one float32 volume (1.4 GB).
"""

from __future__ import annotations

import os
import time
import tracemalloc

import numpy as np

from qa.io import read_volume, write_dicom
from qa.volume import Volume


def test_clinical_size_read_stays_near_one_volume(tmp_path):
    shape = tuple(int(v) for v in os.environ.get("LACUNA_BENCH_SHAPE", "70,2000,2500")
                  .split(","))
    data = np.zeros(shape, np.float32)  # untouched zero pages cost no memory
    data[:, 100:200, 100:200] = 1.0
    path = write_dicom(Volume(data, (1.0, 0.1, 0.1)), tmp_path / "big.dcm")
    del data
    tracemalloc.start()
    t0 = time.perf_counter()
    vol = read_volume(path)
    seconds = time.perf_counter() - t0
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    print(f"\n{shape}: read in {seconds:.1f} s, peak {peak / 1e9:.2f} GB for a "
          f"{vol.data.nbytes / 1e9:.2f} GB volume ({peak / vol.data.nbytes:.3f} volumes)")
    # one float32 volume plus one float64 and one uint16 frame (3 % of 70 planes)
    assert peak < 1.1 * vol.data.nbytes
