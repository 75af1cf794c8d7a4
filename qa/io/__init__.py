"""Volume readers and writers: the boundary between files and :class:`~qa.volume.Volume`.

:func:`read_volume` picks a reader from what the path is:

============================  ============================================================
path                          reader
============================  ============================================================
a folder                      single-frame DICOM slices (:mod:`qa.io.dicom_folder`)
``*.npz``                     Lacuna's volume archive (:mod:`qa.io.npz`)
``*.npy``                     a bare stack + ``<name>.spacing.json``/``.yaml`` sidecar
``*.tif``, ``*.tiff``         a TIFF stack + sidecar (:mod:`qa.io.tiff`)
anything else                 a DICOM file if it carries the ``DICM`` marker
                              (:mod:`qa.io.dicom_read`), else refused
============================  ============================================================

A large DICOM volume with uncompressed pixel data is not loaded: its volume's
``data`` is a :class:`~qa.io.lazy.FrameStack` that reads the planes and blocks it is
indexed for (the ``lazy`` option of :func:`read_volume`).

Writers: :func:`write_npz` (bit-exact) and :func:`write_dicom` (Breast Tomosynthesis
Image Storage, within half a quantum). Both write atomically. Every bad input raises
:class:`~qa.errors.InputError` with a one-line message naming the file.

Examples
--------
>>> import numpy as np, tempfile, pathlib
>>> from qa.volume import Volume
>>> vol = Volume(np.zeros((3, 4, 5), np.float32), (1.0, 0.1, 0.1))
>>> path = pathlib.Path(tempfile.mkdtemp()) / "v.npz"
>>> read_volume(write_npz(vol, path)).shape
(3, 4, 5)
"""

from __future__ import annotations

from pathlib import Path
from typing import Callable

from ..errors import InputError
from ..volume import Volume
from .dicom_folder import read_dicom_folder
from .dicom_read import read_dicom_file
from .dicom_write import write_dicom
from .npz import read_npy, read_npz, write_npz
from .tiff import read_tiff

#: File suffix -> reader. DICOM files are recognised by content, whatever their name.
READERS: dict[str, Callable[[Path], Volume]] = {
    ".npz": read_npz,
    ".npy": read_npy,
    ".tif": read_tiff,
    ".tiff": read_tiff,
}


def _is_dicom(path: Path) -> bool:
    with path.open("rb") as fh:
        head = fh.read(132)
    return len(head) == 132 and head[128:] == b"DICM"


#: Where a unit stores its direction of source travel: along the rows of its images (the
#: volume's x is the column index, as DICOM's row direction cosines give it) or down the
#: columns (the volume is read transposed, so that x is still the source travel).
TRAVEL_AXES = ("rows", "columns")


def read_volume(path, *, series: str | None = None, lazy: bool | None = None,
                travel_axis: str = "rows") -> Volume:
    """Read a volume from a file or folder.

    Parameters
    ----------
    path : str or Path
        A ``.npz``/``.npy``/``.tif(f)`` file, a DICOM file, or a folder of DICOM slices.
    series : str, optional
        For a folder holding several series: the Series Instance UID, Series Description
        or Series Number to read.
    lazy : bool, optional
        For DICOM (a multi-frame file or a folder of slices): read the voxels on demand
        rather than into memory (``None``: for volumes of at least
        :data:`qa.io.dicom_read.LAZY_MIN_BYTES` as float32; ``True``: whenever the pixel
        data are uncompressed; ``False``: never). Other formats are read into memory.
    travel_axis : {"rows", "columns"}
        Where the stored images hold the direction of source travel. DICOM does not say;
        ``"rows"`` (the default) takes it along the rows, so x is the column index.
        ``"columns"`` reads the volume transposed (:meth:`qa.volume.Volume.transposed`;
        a lazy volume stays lazy), for a unit that stores its travel down the columns.
        The choice is kept as ``meta["travel_axis"]``.

    Returns
    -------
    Volume
        Array [z, y, x] float32, spacing (dz, dy, dx) mm, origin (z, y, x) mm, and meta
        holding the unit's identity and acquisition facts (never patient identifiers).

    Raises
    ------
    InputError
        The path does not exist, is of an unknown kind, or its reader refuses it; an
        unknown ``travel_axis``.
    """
    if travel_axis not in TRAVEL_AXES:
        raise InputError(f"travel axis must be one of {', '.join(TRAVEL_AXES)}, got "
                         f"{travel_axis!r}", source=str(path), field="travel_axis")
    volume = _read(Path(path), series=series, lazy=lazy)
    if travel_axis == "rows":
        return volume.with_meta(travel_axis="rows")
    extra = {"travel_axis": "columns"}
    if "axes_from_dicom" in volume.meta:
        extra["axes_from_dicom"] = (
            "x = column direction cosines, y = row direction cosines (source travel down "
            "the columns: the stored frames transposed, a mirror image of patient "
            "coordinates), z = row x column direction cosines; plane 0 at the lowest "
            "position along it")
    return volume.transposed().with_meta(**extra)


def _read(path: Path, *, series: str | None, lazy: bool | None) -> Volume:
    """The reader's volume, as stored (see :func:`read_volume`)."""
    if not path.exists():
        raise InputError("file not found", source=str(path))
    if path.is_dir():
        return read_dicom_folder(path, series=series, lazy=lazy)
    if series is not None:
        raise InputError("the series option applies to a folder of DICOM slices only",
                         source=str(path))
    reader = READERS.get(path.suffix.lower())
    if reader is not None:
        return reader(path)
    try:
        dicom = _is_dicom(path)
    except OSError as exc:
        raise InputError(f"cannot read: {exc}", source=str(path)) from None
    if dicom or path.suffix.lower() == ".dcm":
        return read_dicom_file(path, lazy=lazy)
    raise InputError("unknown volume format: expected .npz, .npy or .tif/.tiff with a "
                     "spacing sidecar, a DICOM file, or a folder of DICOM slices",
                     source=str(path))


__all__ = ["read_volume", "TRAVEL_AXES",
           "write_npz", "write_dicom", "READERS", "read_npz", "read_npy",
           "read_tiff", "read_dicom_file", "read_dicom_folder"]
