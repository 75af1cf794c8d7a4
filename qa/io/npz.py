"""NumPy files: Lacuna's own ``.npz`` volume archive, and bare ``.npy`` stacks.

The ``.npz`` archive holds

``volume``
    (nz, ny, nx) float32, indexed [z, y, x];
``spacing_mm``
    3 floats (dz, dy, dx) in mm;
``origin_mm`` (optional)
    3 floats (z, y, x) in mm of the centre of voxel [0, 0, 0], default (0, 0, 0);
``meta`` (optional)
    a 0-d unicode array holding a JSON object (:attr:`Volume.meta`).

It is written without pickles and read with ``allow_pickle=False``, so a round trip is
bit-exact and an archive cannot run code. A ``.npy`` stack carries only the array; its
spacing comes from a sidecar (see :mod:`qa.io._files`).
"""

from __future__ import annotations

import json
import zipfile
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..volume import Volume
from ..fileio import atomic_path
from ._files import check_stack, frozen, one_line, read_sidecar

_KEYS = ("volume", "spacing_mm", "origin_mm", "meta")


def write_npz(volume: Volume, path) -> Path:
    """Write ``volume`` as a Lacuna ``.npz`` archive, atomically.

    Parameters
    ----------
    volume : Volume
        The volume; its meta must be JSON-serialisable (plain str/float/int/list/dict).
    path : str or Path
        Target file; ``.npz`` is the expected suffix.

    Returns
    -------
    Path
        The path written.

    Raises
    ------
    InputError
        ``meta`` holds a value JSON cannot represent.
    """
    path = Path(path)
    try:
        meta_text = json.dumps(dict(volume.meta), allow_nan=False, sort_keys=True)
    except (TypeError, ValueError) as exc:
        raise InputError("volume meta cannot be written as JSON: " + one_line(exc),
                         source=str(path), field="meta") from None
    with atomic_path(path) as tmp, open(tmp, "wb") as fh:  # a file object: no suffix added
        np.savez(fh, volume=np.asarray(volume.data, dtype=np.float32),
                 spacing_mm=np.asarray(volume.spacing_mm, dtype=np.float64),
                 origin_mm=np.asarray(volume.origin_mm, dtype=np.float64),
                 meta=np.asarray(meta_text))
    return path


def _vector(arrays, key: str, source: Path, default=None):
    if key not in arrays:
        if default is not None:
            return default
        raise InputError(f"missing array '{key}' (3 numbers)", source=str(source), field=key)
    v = arrays[key]
    if v.shape != (3,) or not np.issubdtype(v.dtype, np.number):
        raise InputError(f"expected 3 numbers, got shape {v.shape} of {v.dtype}",
                         source=str(source), field=key)
    return tuple(float(x) for x in v)


def read_npz(path) -> Volume:
    """Read a Lacuna ``.npz`` archive (see the module notes for its arrays).

    Raises
    ------
    InputError
        Not a readable archive (truncated, not a zip), an array missing or of the wrong
        shape, an unknown array, pickled content, or ``meta`` that is not a JSON object.
    """
    path = Path(path)
    try:
        # an open file object, closed here even when numpy refuses the content
        with open(path, "rb") as fh, np.load(fh, allow_pickle=False) as arrays:
            unknown = sorted(set(arrays.files) - set(_KEYS))
            if unknown:
                raise InputError(f"unknown arrays {unknown}; expected {list(_KEYS)}",
                                 source=str(path))
            if "volume" not in arrays:
                raise InputError("missing array 'volume' [z, y, x]", source=str(path),
                                 field="volume")
            data = arrays["volume"]
            check_stack(data.shape, data.dtype, path)
            spacing = _vector(arrays, "spacing_mm", path)
            origin = _vector(arrays, "origin_mm", path, default=(0.0, 0.0, 0.0))
            meta = _meta(arrays["meta"], path) if "meta" in arrays else {}
    except (zipfile.BadZipFile, EOFError, OSError) as exc:
        raise InputError("not a readable .npz archive (truncated or corrupt?): "
                         + one_line(exc), source=str(path)) from None
    except ValueError as exc:  # pickled object arrays, bad headers
        raise InputError("cannot read the archive: " + one_line(exc),
                         source=str(path)) from None
    meta = {**meta, "source_file": str(path)}
    return _volume(data, spacing, origin, meta, path)


def _meta(arr: np.ndarray, path: Path) -> dict:
    if arr.shape != () or arr.dtype.kind != "U":
        raise InputError("expected a JSON text", source=str(path), field="meta")
    try:
        meta = json.loads(str(arr))
    except json.JSONDecodeError as exc:
        raise InputError(f"not valid JSON: {exc.msg}", source=str(path), field="meta") from None
    if not isinstance(meta, dict):
        raise InputError(f"expected a JSON object, got {type(meta).__name__}",
                         source=str(path), field="meta")
    return meta


def read_npy(path) -> Volume:
    """Read a bare ``.npy`` stack [z, y, x] whose spacing is in a sidecar file.

    Raises
    ------
    InputError
        The file is not a ``.npy`` array, holds pickles, is not 3D, or has no (or a bad)
        sidecar.
    """
    path = Path(path)
    spacing, origin, meta = read_sidecar(path)
    try:
        with open(path, "rb") as fh:
            data = np.load(fh, allow_pickle=False)
    except (ValueError, OSError, EOFError) as exc:
        raise InputError("not a readable .npy array (truncated or corrupt?): "
                         + one_line(exc), source=str(path)) from None
    if not isinstance(data, np.ndarray):
        raise InputError("expected a single array, found an archive", source=str(path))
    check_stack(data.shape, data.dtype, path)
    meta = {**meta, "source_file": str(path)}
    return _volume(data, spacing, origin, meta, path)


def _volume(data: np.ndarray, spacing, origin, meta: dict, path: Path) -> Volume:
    if data.dtype != np.float32:
        data = data.astype(np.float32)
    try:
        return Volume(frozen(data), spacing, origin, meta)
    except InputError as exc:
        raise InputError(exc.message, source=str(path), field=exc.field) from None
