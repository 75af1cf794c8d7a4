"""Read a folder of single-frame DICOM slices (CT/MR-style series) as one volume.

Files are looked at in any order; those that are not DICOM (no ``DICM`` marker), and
DICOM files that are not images (no Rows and no Pixel Data: a DICOMDIR, a structured
report), are skipped; an image file cut short is refused, not skipped. Only
the folder itself is read, not its sub-folders. The slices of one series are ordered
by Image Position (Patient) along the plane normal (:mod:`qa.io.dicom_geometry`) and
checked like the frames of a multi-frame object. Large series of uncompressed slices are
read on demand, as large multi-frame files are (:class:`qa.io.lazy.FrameStack`).
"""

from __future__ import annotations

from collections import defaultdict
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from pydicom.pixels import pixel_array

from ..errors import InputError
from ..volume import Volume
from ._files import frozen
from .dicom_geometry import order_planes
from .dicom_read import (LAZY_MIN_BYTES, check_pixels, common_facts, fill_planes,
                         pixel_layout, pixel_spacing, read_header, value_facts, value_map)
from .lazy import FrameStack


@dataclass(frozen=True)
class _Slice:
    """What the reader keeps of one slice's header (not the parsed header itself)."""

    path: Path
    series_uid: str
    description: str
    number: str
    problem: InputError | None = None  # raised only if this slice's series is read
    position: tuple = ()
    orientation: tuple = ()
    pixel_spacing: tuple = ()
    size: tuple = ()
    value_map: tuple = ()
    pixels: tuple | None = None  # (PixelLayout, offset) of uncompressed pixel data


def _slice(f: Path, ds) -> _Slice:
    ident = dict(path=f, series_uid=str(ds.get("SeriesInstanceUID", "(none)")),
                 description=str(ds.get("SeriesDescription", "")).strip(),
                 number=str(ds.get("SeriesNumber", "")))
    try:
        check_pixels(ds, f)
        if int(ds.get("NumberOfFrames", 1) or 1) > 1:
            raise InputError("a multi-frame object among single-frame slices; read it on "
                             "its own", source=str(f))
        for keyword in ("ImagePositionPatient", "ImageOrientationPatient"):
            if keyword not in ds:
                raise InputError(f"no {keyword}: the slices cannot be placed", source=str(f))
        rwvm = ds.get("RealWorldValueMappingSequence")
        return _Slice(**ident, position=tuple(float(v) for v in ds.ImagePositionPatient),
                      orientation=tuple(float(v) for v in ds.ImageOrientationPatient),
                      pixel_spacing=pixel_spacing(ds.get("PixelSpacing"), f),
                      size=(int(ds.Rows), int(ds.Columns)),
                      value_map=value_map(ds.get("RescaleSlope"), ds.get("RescaleIntercept"),
                                          rwvm[0] if rwvm else None),
                      pixels=pixel_layout(ds, 1))
    except InputError as exc:
        return _Slice(**ident, problem=exc)


def _series_label(uid: str, slices: list) -> str:
    first = slices[0]
    parts = [f"series {uid}"]
    if first.number:
        parts.append(f"number {first.number}")
    if first.description:
        parts.append(f"'{first.description}'")
    return " ".join(parts) + f" ({len(slices)} files)"


def _select(series: dict, wanted: str | None, folder: Path) -> list:
    if wanted is None:
        if len(series) == 1:
            return next(iter(series.values()))
        raise InputError("mixed series in one folder, choose one with --series (its UID, "
                         "description or number): "
                         + "; ".join(_series_label(u, h) for u, h in sorted(series.items())),
                         source=str(folder))
    chosen = [h for uid, h in series.items() if wanted in (uid, h[0].description, h[0].number)]
    if len(chosen) != 1:
        what = "no series matches" if not chosen else "several series match"
        raise InputError(f"{what} '{wanted}' (UID, description or number); the folder has: "
                         + "; ".join(_series_label(u, h) for u, h in sorted(series.items())),
                         source=str(folder))
    return chosen[0]


def read_dicom_folder(path, *, series: str | None = None,
                      lazy: bool | None = None) -> Volume:
    """Read the single-frame DICOM slices in a folder as a volume.

    Parameters
    ----------
    path : str or Path
        The folder.
    series : str, optional
        Series Instance UID, Series Description or Series Number of the series to read
        when the folder holds several.
    lazy : bool, optional
        Read the voxels on demand from the slice files, as
        :func:`qa.io.dicom_read.read_dicom_file` does (``None``: for volumes of at least
        :data:`~qa.io.dicom_read.LAZY_MIN_BYTES` as float32; possible when every slice is
        uncompressed with the same word layout).

    Raises
    ------
    InputError
        No DICOM image in the folder, mixed series (named) and none chosen, a
        multi-frame file among the slices, slices of different sizes or pixel spacing,
        a slice without position or orientation, irregular or repeated positions, a
        single slice, truncated files, a transfer syntax that cannot be decoded.
    """
    folder = Path(path)
    try:
        files = sorted(p for p in folder.iterdir() if p.is_file())
    except OSError as exc:
        raise InputError(f"cannot list the folder: {exc.strerror}", source=str(folder)) from None
    by_series: dict = defaultdict(list)
    notes: list = []
    for f in files:
        ds, warned = read_header(f, quiet_if_not_dicom=True)
        if ds is None or ("PixelData" not in ds and "Rows" not in ds):
            continue  # not DICOM, or DICOM but no image (DICOMDIR, report)
        notes.extend(warned)
        record = _slice(f, ds)
        by_series[record.series_uid].append(record)
    if not by_series:
        raise InputError(f"no DICOM images in the folder ({len(files)} files looked at)",
                         source=str(folder))
    slices = _select(by_series, series, folder)
    for s in slices:
        if s.problem is not None:
            raise s.problem
    names = [s.path.name for s in slices]
    sizes = {s.size for s in slices}
    spacings = {s.pixel_spacing for s in slices}
    if len(sizes) > 1 or len(spacings) > 1:
        raise InputError(f"slices differ in size {sorted(sizes)} or pixel spacing "
                         f"{sorted(spacings)}: not one stack", source=str(folder))
    dy_dx = spacings.pop()
    stack = order_planes([s.position for s in slices], [s.orientation for s in slices],
                         dy_dx, str(folder), names)
    maps = [s.value_map for s in slices]
    shape = (len(slices),) + sizes.pop()
    layouts = {s.pixels[0] if s.pixels else None for s in slices}
    if (lazy is not False and len(layouts) == 1 and None not in layouts
            and (lazy or 4 * int(np.prod(shape)) >= LAZY_MIN_BYTES)):
        data = FrameStack([(s.path, s.pixels[1]) for s in slices], layouts.pop(),
                          plane_of_frame=stack.plane_of_frame, maps=[m[:2] for m in maps])
    else:
        out = np.empty(shape, dtype=np.float32)
        fill_planes(out, (pixel_array(s.path) for s in slices), stack.plane_of_frame, maps,
                    folder, notes, names)
        data = frozen(out)

    first, _ = read_header(slices[int(np.argmin(stack.plane_of_frame))].path)
    meta = common_facts(first, folder, notes)
    meta.update(stack.facts)
    meta.update(value_facts(maps))
    meta.update(number_of_files=len(slices), pixel_spacing_mm=list(dy_dx))
    for keyword, key in (("SliceThickness", "slice_thickness_mm"),
                         ("SpacingBetweenSlices", "stated_spacing_between_slices_mm")):
        if first.get(keyword) is not None:
            meta[key] = float(first.get(keyword))
    return Volume(data, stack.spacing_mm, stack.origin_mm, meta)
