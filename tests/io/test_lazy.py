"""Voxels read on demand (:class:`qa.io.lazy.FrameStack`) are the voxels read into memory.

References: pydicom's decoding of the same files (``pydicom.dcmread(...).pixel_array``,
a reference library; it masks the bits above Bits Stored and sign-extends signed
values), numpy's own basic indexing of the in-memory array, and the standard library's
tracemalloc for memory. Files are written by :func:`qa.io.write_dicom` and edited with
pydicom, never with Lacuna.
"""

from __future__ import annotations

import os
import pickle
import tracemalloc

import numpy as np
import pydicom
import pytest
from pydicom.sequence import Sequence

from qa import PROJECT_ROOT
from qa.errors import InputError
from qa.io import dicom_read, read_volume, write_dicom
from qa.io.lazy import FrameStack
from qa.volume import TransposedStack, Volume

SHAPE = (7, 30, 41)
#: Every indexing form the locator and the metric families use (planes, plane windows,
#: depth profiles through a few rows), plus steps, negative indices and ellipses.
KEYS = [3, -1, np.int64(2), (4, slice(2, 20), slice(5, 33)), (slice(None), 7, slice(3, 30)),
        (slice(None), slice(10, 14), slice(0, 41, 4)), (slice(1, 6), slice(3, 9), 17),
        (slice(None, None, -2), slice(-5, None), slice(None, None, -3)),
        (slice(5, 1, -1), -3, -7), (slice(None), slice(29, 0, -9), slice(40, None, -1)),
        (Ellipsis, 5), (1, Ellipsis), (2, 3, 4), (-7, -30, -41), slice(2, 2),
        (slice(None), slice(50, 60)), (slice(-100, 100), slice(None), slice(None))]


def _edit(path, change):
    ds = pydicom.dcmread(path)
    change(ds)
    ds.save_as(path)
    return path


@pytest.fixture
def shuffled(small_volume, tmp_path):
    """A file with frames out of position order and a Rescale mapping per frame.

    Returns the path and, per stored frame, its plane, slope and intercept.
    """
    perm = np.random.default_rng(3).permutation(SHAPE[0])
    slopes = 0.37 + 0.11 * np.arange(SHAPE[0])       # not exact in binary: rounding shows
    intercepts = -1.3 + 0.7 * np.arange(SHAPE[0])

    def change(ds):
        frames = ds.pixel_array
        items = list(ds.PerFrameFunctionalGroupsSequence)
        ds.PerFrameFunctionalGroupsSequence = Sequence([items[i] for i in perm])
        ds.PixelData = frames[perm].tobytes()
        del ds.SharedFunctionalGroupsSequence[0].RealWorldValueMappingSequence
        del ds.SharedFunctionalGroupsSequence[0].PixelValueTransformationSequence
        for item, m, b in zip(ds.PerFrameFunctionalGroupsSequence, slopes, intercepts):
            pvt = pydicom.Dataset()
            pvt.RescaleSlope, pvt.RescaleIntercept, pvt.RescaleType = f"{m:.4f}", f"{b:.4f}", "US"
            item.PixelValueTransformationSequence = Sequence([pvt])

    path = _edit(write_dicom(small_volume(SHAPE), tmp_path / "v.dcm"), change)
    return path, perm, slopes, intercepts


@pytest.mark.parametrize("key", KEYS, ids=repr)
def test_every_indexing_form_matches_the_array(shuffled, key):
    lazy, eager = read_volume(shuffled[0], lazy=True), read_volume(shuffled[0], lazy=False)
    assert isinstance(lazy.data, FrameStack) and isinstance(eager.data, np.ndarray)
    got, want = lazy.data[key], eager.data[key]  # numpy's indexing is the reference
    assert np.shape(got) == np.shape(want) and got.dtype == np.float32
    assert np.array_equal(got, want)  # bit for bit
    if isinstance(got, np.ndarray):
        assert not got.flags.writeable  # like a view of the read-only array


@pytest.mark.parametrize("key", KEYS, ids=repr)
def test_travel_down_the_columns_stays_on_demand(shuffled, key):
    # Read with the travel axis down the columns, a lazy volume is a transposed view of
    # the same frames; numpy's indexing of the in-memory array's transpose is the reference.
    lazy = read_volume(shuffled[0], lazy=True, travel_axis="columns")
    eager = read_volume(shuffled[0], lazy=False)
    assert isinstance(lazy.data, TransposedStack) and isinstance(lazy.data.base, FrameStack)
    assert lazy.shape == (SHAPE[0], SHAPE[2], SHAPE[1])
    assert lazy.spacing_mm == tuple(eager.spacing_mm[i] for i in (0, 2, 1))
    assert lazy.origin_mm == tuple(eager.origin_mm[i] for i in (0, 2, 1))
    assert lazy.meta["travel_axis"] == "columns" and eager.meta["travel_axis"] == "rows"
    want_all = eager.data.transpose(0, 2, 1)
    try:
        want = want_all[key]
    except IndexError:
        with pytest.raises(IndexError, match="out of bounds"):
            lazy.data[key]
        return
    got = lazy.data[key]
    assert np.shape(got) == np.shape(want) and got.dtype == np.float32
    assert np.array_equal(got, want)  # bit for bit
    in_memory = read_volume(shuffled[0], lazy=False, travel_axis="columns").data
    assert np.array_equal(in_memory[key], want)
    assert isinstance(in_memory, np.ndarray) and in_memory.flags.c_contiguous


def test_planes_are_pydicom_values_mapped_in_position_order(shuffled):
    path, perm, slopes, intercepts = shuffled
    stored = pydicom.dcmread(path).pixel_array.astype(np.float64)
    expect = np.empty(SHAPE, np.float32)
    for k, plane in enumerate(perm):  # stored frame k holds plane perm[k]
        expect[plane] = stored[k] * round(slopes[k], 4) + round(intercepts[k], 4)
    vol = read_volume(path, lazy=True)
    assert not np.array_equal(perm, np.arange(SHAPE[0]))
    assert np.array_equal(np.asarray(vol.data), expect)
    assert vol.meta["value_mapping_per_frame"] and not vol.meta["frames_in_position_order"]


@pytest.mark.parametrize("bits,stored,signed", [(8, 8, False), (16, 12, False), (16, 12, True),
                                                (16, 16, True), (32, 32, False), (32, 20, True)])
def test_word_formats_decode_as_pydicom_does(small_volume, tmp_path, bits, stored, signed):
    rng = np.random.default_rng(bits + stored)
    # full-width random words: the bits above Bits Stored are garbage to be masked
    words = rng.integers(0, 2 ** bits, SHAPE, dtype=np.uint64).astype(f"<u{bits // 8}")

    def change(ds):
        ds.BitsAllocated, ds.BitsStored, ds.HighBit = bits, stored, stored - 1
        ds.PixelRepresentation = int(signed)
        ds.PixelData = words.tobytes()

    path = _edit(write_dicom(small_volume(SHAPE), tmp_path / "w.dcm"), change)
    ds = pydicom.dcmread(path)
    rwvm = ds.SharedFunctionalGroupsSequence[0].RealWorldValueMappingSequence[0]
    expect = (ds.pixel_array.astype(np.float64) * rwvm.RealWorldValueSlope
              + rwvm.RealWorldValueIntercept).astype(np.float32)
    lazy = read_volume(path, lazy=True)
    assert isinstance(lazy.data, FrameStack)
    assert np.array_equal(np.asarray(lazy.data), expect)
    assert np.array_equal(lazy.data[:, 5:9, ::-3], expect[:, 5:9, ::-3])
    assert np.array_equal(read_volume(path, lazy=False).data, expect)


def test_bad_indices_and_a_changed_file_are_refused(shuffled):
    path = shuffled[0]
    data = read_volume(path, lazy=True).data
    for key in (7, -8, (0, 30), (0, 0, -42)):
        with pytest.raises(IndexError, match="out of bounds"):
            data[key]
    for key in (np.array([0, 1]), True, None, (0, [1, 2])):
        with pytest.raises(TypeError, match="integers and slices"):
            data[key]
    with pytest.raises(IndexError, match="too many indices"):
        data[0, 0, 0, 0]
    with pytest.raises(ValueError, match="without building it"):
        np.asarray(data, copy=False)
    with open(path, "r+b") as fh:  # same size, new content: the modification time moves
        fh.seek(-2, 2)
        fh.write(b"\x01\x02")
    st = os.stat(path)
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns + 10 ** 9))
    with pytest.raises(InputError, match="changed on disk"):
        data[0]


def test_pickled_stack_holds_no_voxels(shuffled):
    data = read_volume(shuffled[0], lazy=True).data
    data[2]  # a plane kept in its cache must not travel either
    blob = pickle.dumps(data)
    assert len(blob) < 4096  # the paths, offsets and maps; the voxels are 8.6 kB as float32
    assert np.array_equal(pickle.loads(blob)[2:5, 3], data[2:5, 3])


def test_which_files_are_read_on_demand(small_volume, tmp_path, monkeypatch):
    path = write_dicom(small_volume(SHAPE), tmp_path / "v.dcm")
    assert isinstance(read_volume(path).data, np.ndarray)  # small: in memory, as before
    monkeypatch.setattr(dicom_read, "LAZY_MIN_BYTES", 4 * int(np.prod(SHAPE)))
    assert isinstance(read_volume(path).data, FrameStack)  # at the threshold: on demand
    assert isinstance(read_volume(path, lazy=False).data, np.ndarray)
    from pydicom.uid import RLELossless
    rle = _edit(write_dicom(small_volume(SHAPE), tmp_path / "r.dcm"),
                lambda ds: ds.compress(RLELossless))
    vol = read_volume(rle, lazy=True)  # compressed: decoded into memory whatever is asked
    assert isinstance(vol.data, np.ndarray)
    assert np.array_equal(vol.data, read_volume(path).data)


def test_folder_of_slices_on_demand(slice_folder):
    folder, _, _ = slice_folder("CT_small.dcm", 6)  # signed 16-bit with a rescale
    lazy, eager = read_volume(folder, lazy=True), read_volume(folder, lazy=False)
    assert isinstance(lazy.data, FrameStack) and len(lazy.data.files) == 6
    assert np.array_equal(np.asarray(lazy.data), eager.data)
    assert np.array_equal(lazy.data[::-2, 40:90:3, -5], eager.data[::-2, 40:90:3, -5])


def _phantom_volume() -> tuple:
    """The demo phantom's objects voxelised, blurred and noisy (seeded): enough structure
    for the locator and the families (a shortcut for a simulation, which takes longer)."""
    from scipy import ndimage

    from qa.phantom import load_phantom
    from qa.simulate.recon.grid import ReconGrid
    from qa.simulate.voxelise import voxelise

    phantom = load_phantom(PROJECT_ROOT / "phantoms" / "lacuna-dbt-demo.yaml")
    grid = ReconGrid.from_field((-30, 30), (-2, 50), (9, 32), pixel_mm=0.1, plane_mm=1.0)
    data = ndimage.gaussian_filter(voxelise(phantom, grid, supersample=1).data, (1.5, 0.8, 0.8))
    data += np.random.default_rng(5).normal(0.0, 0.0015, data.shape).astype(np.float32)
    return Volume(data, grid.spacing_mm, grid.origin_mm), phantom


def test_measurements_on_demand_equal_those_in_memory(tmp_path):
    from qa.session import measure_volume

    volume, phantom = _phantom_volume()
    path = write_dicom(volume, tmp_path / "tern.dcm")
    runs = [measure_volume(read_volume(path, lazy=lazy), phantom) for lazy in (True, False)]
    (lay_a, res_a), (lay_b, res_b) = runs
    assert {k: p.centre_xyz_mm for k, p in lay_a.placed.items()} == \
        {k: p.centre_xyz_mm for k, p in lay_b.placed.items()}
    figures_a = [m for r in res_a for m in r.measurements]
    figures_b = [m for r in res_b for m in r.measurements]
    assert figures_a == figures_b  # same voxels, seeded methods: the same numbers exactly
    measured = {m.name for m in figures_a if m.value is not None}
    # the figures that need the bead, the edge, the disks and the uniform region
    assert {"mtf50_x", "mtf50_y", "asf_fwhm", "sdnr_d6", "noise_sd"} <= measured


@pytest.mark.parametrize("travel_axis, budget", [("rows", 3.5e6), ("columns", 4.5e6)])
def test_one_plane_of_a_larger_file_costs_one_plane(tmp_path, travel_axis, budget):
    shape = (40, 512, 512)  # 42 MB as float32; a float32 plane is 1 MB
    data = np.random.default_rng(2).normal(0.0, 1.0, shape).astype(np.float32)
    path = write_dicom(Volume(data, (1.0, 0.1, 0.1)), tmp_path / "big.dcm")
    del data
    tracemalloc.start()
    try:
        vol = read_volume(path, lazy=True, travel_axis=travel_axis)
        plane = vol.data[17]
        block = vol.data[:, 200:210, 100:400]
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert plane.shape == (512, 512) and block.shape == (40, 10, 300)
    # budget 3.5 MB: the plane (1 MB), one frame's words (0.5 MB), the value table and
    # its making (1 MB: int32, float64 and float32 values of the 65536 words), the header
    # (some 0.3 MB for 40 frames as parsed) and small buffers; read transposed, 1 MB more
    # for the plane's transposed copy; reading the volume into memory would take 42 MB
    assert peak < budget


def test_a_volume_on_demand_is_written_like_the_array(shuffled, tmp_path):
    from qa.io import write_npz

    lazy, eager = read_volume(shuffled[0], lazy=True), read_volume(shuffled[0], lazy=False)
    a = pydicom.dcmread(write_dicom(lazy, tmp_path / "a.dcm"))
    b = pydicom.dcmread(write_dicom(eager, tmp_path / "b.dcm"))
    assert a.PixelData == b.PixelData  # same range, same quantisation, plane by plane
    npz = read_volume(write_npz(lazy, tmp_path / "a.npz"))
    assert np.array_equal(npz.data, eager.data)


@pytest.mark.parametrize("shape,sigma", [((300, 350), (1.77, 1.77)), ((61, 47), (1.2, 2.3)),
                                         ((12, 9), (0.4, 3.0))])
def test_plane_scan_smooths_as_scipy_does(shape, sigma):
    """The locator's plane scan (sped up for clinical planes) smooths in blocks of rows;
    scipy.ndimage.gaussian_filter (truncate=3, mirrored border) is the reference."""
    from scipy import ndimage

    from qa.locate import find

    plane = np.random.default_rng(8).normal(0.0, 1.0, shape).astype(np.float32)
    wy, wx = find._kernel(sigma[0]), find._kernel(sigma[1])
    padded = np.pad(plane, ((len(wy) // 2,) * 2, (len(wx) // 2,) * 2), mode="symmetric")
    want = ndimage.gaussian_filter(plane, sigma, truncate=3.0)
    got = np.concatenate([find._smooth_rows(padded, a, min(a + 7, shape[0]), wy, wx)
                          for a in range(0, shape[0], 7)])
    # float32 sums of 11-25 terms of unit-variance values: a few units of 1e-7
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-6)
