"""NumPy (.npz, .npy + sidecar) and TIFF stacks: round trips and refusals.

Reference: numpy's own .npy/.npz format (numpy.lib.format) and tifffile's writer make
the inputs; values read back are compared with the arrays that were written.
"""

from __future__ import annotations

import json
import os

import numpy as np
import pytest
import tifffile

from qa.errors import InputError
from qa.io import read_volume, write_npz


def test_npz_round_trip_is_bit_exact(small_volume, tmp_path):
    vol = small_volume(meta={"manufacturer": "Example Imaging", "kvp_kv": 29.0,
                             "software": ["1.2", "rec 4"]})
    back = read_volume(write_npz(vol, tmp_path / "v.npz"))
    # bit-exact: the same float32 bytes, spacing and origin as float64 (no tolerance)
    assert back.data.dtype == np.float32
    assert back.data.tobytes() == vol.data.tobytes()
    assert back.spacing_mm == vol.spacing_mm and back.origin_mm == vol.origin_mm
    assert {k: back.meta[k] for k in vol.meta} == dict(vol.meta)
    assert back.meta["source_file"] == str(tmp_path / "v.npz")


def test_npz_write_is_atomic_and_keeps_old_file_on_error(small_volume, tmp_path, monkeypatch):
    path = tmp_path / "v.npz"
    write_npz(small_volume(), path)
    before = path.read_bytes()

    def half_then_fail(fh, **arrays):  # a disk filling up half way
        fh.write(b"PK" + b"\0" * 100)
        raise OSError("No space left on device")

    with monkeypatch.context() as m:
        m.setattr(np, "savez", half_then_fail)
        with pytest.raises(OSError, match="No space left"):
            write_npz(small_volume(seed=4), path)
    assert path.read_bytes() == before
    assert os.listdir(tmp_path) == ["v.npz"]
    bad = small_volume(meta={"not_json": object()})
    with pytest.raises(InputError, match=r"v\.npz.*meta cannot be written as JSON"):
        write_npz(bad, path)
    assert path.read_bytes() == before
    assert os.listdir(tmp_path) == ["v.npz"]  # no temporary file left behind


@pytest.mark.parametrize("arrays, message", [
    ({"volume": np.zeros((2, 3, 4), np.float32)}, r"missing array 'spacing_mm'"),
    ({"spacing_mm": np.ones(3)}, r"missing array 'volume'"),
    ({"volume": np.zeros((3, 4), np.float32), "spacing_mm": np.ones(3)},
     r"a 2D image .* where a volume"),
    ({"volume": np.zeros((2, 3, 4), np.float32), "spacing_mm": np.ones(2)},
     r"spacing_mm.*expected 3 numbers"),
    ({"volume": np.zeros((2, 3, 4), np.float32), "spacing_mm": np.array([1.0, 0, 1])},
     r"spacing must be three positive numbers"),
    ({"volume": np.zeros((2, 3, 4), np.float32), "spacing_mm": np.ones(3),
      "meta": np.asarray("[1, 2]")}, r"meta.*expected a JSON object"),
    ({"volume": np.zeros((2, 3, 4), np.float32), "spacing_mm": np.ones(3),
      "extra": np.ones(1)}, r"unknown arrays \['extra'\]"),
])
def test_npz_bad_content_is_refused(tmp_path, arrays, message):
    path = tmp_path / "bad.npz"
    np.savez(path, **arrays)
    with pytest.raises(InputError, match=message):
        read_volume(path)


def test_npz_truncated_or_pickled_is_refused(small_volume, tmp_path):
    path = write_npz(small_volume(), tmp_path / "v.npz")
    cut = tmp_path / "cut.npz"
    cut.write_bytes(path.read_bytes()[: path.stat().st_size // 2])
    with pytest.raises(InputError, match=r"cut\.npz: not a readable \.npz archive"):
        read_volume(cut)
    pickled = tmp_path / "obj.npz"
    np.savez(pickled, volume=np.array([{"a": 1}], dtype=object), spacing_mm=np.ones(3))
    with pytest.raises(InputError, match=r"obj\.npz: cannot read the archive.*pickle"):
        read_volume(pickled)


@pytest.mark.parametrize("suffix, text", [
    (".spacing.json", '{"spacing_mm": [2.0, 0.1, 0.1], "origin_mm": [1, 2, 3],'
                      ' "meta": {"model": "M1"}}'),
    (".spacing.yaml", "spacing_mm: [2.0, 0.1, 0.1]\norigin_mm: [1, 2, 3]\nmeta: {model: M1}\n"),
])
def test_npy_with_sidecar(tmp_path, suffix, text):
    data = np.arange(2 * 3 * 4, dtype=np.uint16).reshape(2, 3, 4)
    np.save(tmp_path / "stack.npy", data)
    (tmp_path / ("stack" + suffix)).write_text(text)
    vol = read_volume(tmp_path / "stack.npy")
    np.testing.assert_array_equal(vol.data, data.astype(np.float32))  # integers: exact
    assert vol.spacing_mm == (2.0, 0.1, 0.1) and vol.origin_mm == (1.0, 2.0, 3.0)
    assert vol.meta["model"] == "M1"


def test_npy_sidecar_problems(tmp_path):
    np.save(tmp_path / "s.npy", np.zeros((2, 3, 4), np.float32))
    with pytest.raises(InputError, match=r"s\.npy: no spacing sidecar: expected "
                                         r"s\.spacing\.json or s\.spacing\.yaml"):
        read_volume(tmp_path / "s.npy")
    (tmp_path / "s.spacing.yaml").write_text("spacing_mm: [1, 1]\n")
    with pytest.raises(InputError, match=r"s\.spacing\.yaml:1, field 'spacing_mm': "
                                         r"expected a list of 3 numbers"):
        read_volume(tmp_path / "s.npy")
    (tmp_path / "s.spacing.yaml").write_text("spacing_mm: [1, 1, 1]\nspacing: 2\n")
    with pytest.raises(InputError, match=r"unknown field 'spacing'"):
        read_volume(tmp_path / "s.npy")
    (tmp_path / "s.spacing.json").write_text('{"spacing_mm": [1, 1, 1]')
    with pytest.raises(InputError, match=r"two spacing sidecars"):
        read_volume(tmp_path / "s.npy")
    (tmp_path / "s.spacing.yaml").unlink()
    with pytest.raises(InputError, match=r"s\.spacing\.json:1: not valid JSON"):
        read_volume(tmp_path / "s.npy")


def test_tiff_stack_round_trip(tmp_path):
    rng = np.random.default_rng(3)
    data = rng.integers(0, 4096, size=(5, 16, 12), dtype=np.uint16)
    # one page per plane; 'minisblack' so tifffile does not read a short axis as colour
    tifffile.imwrite(tmp_path / "stack.tif", data, photometric="minisblack")
    (tmp_path / "stack.spacing.json").write_text(json.dumps({"spacing_mm": [1, 0.1, 0.1]}))
    vol = read_volume(tmp_path / "stack.tif")
    np.testing.assert_array_equal(vol.data, data.astype(np.float32))  # integers: exact
    assert vol.spacing_mm == (1.0, 0.1, 0.1)


def test_tiff_written_page_by_page(tmp_path):
    data = np.linspace(0, 1, 3 * 8 * 9, dtype=np.float32).reshape(3, 8, 9)
    with tifffile.TiffWriter(tmp_path / "pages.tiff") as tw:
        for plane in data:
            tw.write(plane)
    (tmp_path / "pages.spacing.yaml").write_text("spacing_mm: [0.5, 0.2, 0.2]\n")
    vol = read_volume(tmp_path / "pages.tiff")
    assert vol.data.tobytes() == data.tobytes()  # float32 pages: bit-exact


def test_tiff_refusals(tmp_path):
    (tmp_path / "one.spacing.json").write_text('{"spacing_mm": [1, 1, 1]}')
    tifffile.imwrite(tmp_path / "one.tif", np.zeros((8, 9), np.uint16))
    with pytest.raises(InputError, match=r"one\.tif: a 2D image \(shape \(8, 9\)\)"):
        read_volume(tmp_path / "one.tif")
    (tmp_path / "rgb.spacing.json").write_text('{"spacing_mm": [1, 1, 1]}')
    tifffile.imwrite(tmp_path / "rgb.tif", np.zeros((2, 8, 9, 3), np.uint8), photometric="rgb")
    with pytest.raises(InputError, match=r"rgb\.tif: colour or multi-sample TIFF"):
        read_volume(tmp_path / "rgb.tif")
    (tmp_path / "junk.spacing.json").write_text('{"spacing_mm": [1, 1, 1]}')
    (tmp_path / "junk.tif").write_bytes(b"II*\x00" + b"\x00" * 20)
    with pytest.raises(InputError, match=r"junk\.tif: not a readable TIFF"):
        read_volume(tmp_path / "junk.tif")


def test_dispatch_refusals(tmp_path):
    with pytest.raises(InputError, match=r"nowhere\.npz: file not found"):
        read_volume(tmp_path / "nowhere.npz")
    (tmp_path / "notes.txt").write_text("hello")
    with pytest.raises(InputError, match=r"notes\.txt: unknown volume format"):
        read_volume(tmp_path / "notes.txt")
    np.savez(tmp_path / "v.npz", volume=np.zeros((2, 2, 2)), spacing_mm=np.ones(3))
    with pytest.raises(InputError, match=r"series option applies to a folder"):
        read_volume(tmp_path / "v.npz", series="1.2.3")
