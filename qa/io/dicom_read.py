"""Read DICOM volumes: one enhanced multi-frame file, or a folder of single-frame slices.

Both paths end the same way: frames are placed by their positions along the plane
normal (:mod:`qa.io.dicom_geometry`, never by file or frame order), decoded one at a
time into a single preallocated float32 array with their value mapping applied, and the
header is reduced to the allow-listed facts of :mod:`qa.io.deidentify`.

A large multi-frame file with uncompressed little-endian pixel data is not decoded at
all: its volume is a :class:`qa.io.lazy.FrameStack` that reads the frames and rows it is
indexed for, with the same order and value mapping (see :data:`LAZY_MIN_BYTES` and the
``lazy`` option of :func:`read_dicom_file`).

Value mapping, per frame: Rescale Slope/Intercept (Pixel Value Transformation, shared
or per frame, or top-level for single-frame slices); when that is absent or the
identity, as the Breast Tomosynthesis IOD requires, a linear Real World Value Mapping
(first item) is used instead, which is where :func:`qa.io.write_dicom` puts the range of
the data. Frame values are computed in float64 one frame at a time, then stored as
float32.

References
----------
DICOM PS3.3 C.7.6.16.2 (Functional Group Macros: Pixel Measures, Plane Position and
Orientation (Patient), Pixel Value Transformation, Real World Value Mapping) and
C.7.6.2 (Image Plane Module); PS3.5 Section 10 and Annex A (transfer syntaxes).
"""

from __future__ import annotations

import contextlib
import os
import warnings
from pathlib import Path

import numpy as np
import pydicom
from pydicom.dataset import Dataset
from pydicom.errors import InvalidDicomError
from pydicom.pixels import get_decoder, iter_pixels
from pydicom.pixels.utils import get_expected_length

from ..errors import InputError
from ..volume import Volume
from ._files import frozen, one_line
from .deidentify import kept_meta, scrub_path
from .dicom_geometry import order_planes
from .lazy import FrameStack, PixelLayout, frames_of_file

_UNDEFINED = 0xFFFFFFFF
#: A multi-frame file whose volume would take at least this as float32 is read on demand
#: when its pixel data allow it (256 MiB: some 45 planes of 1200 x 1200 voxels).
LAZY_MIN_BYTES = 256 * 2 ** 20


@contextlib.contextmanager
def noted_warnings(notes: list):
    """Collect pydicom's warnings about a file into ``notes`` (kept in the meta).

    A non-conformant header is common in practice and not the caller's fault; its
    warnings are reported in ``meta["read_warnings"]`` rather than raised or lost.
    """
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            yield
        finally:
            notes.extend(str(w.message) for w in caught)


def read_header(path: Path, *, quiet_if_not_dicom: bool = False) -> tuple[Dataset | None, list]:
    """The header of a DICOM file (pixel data left on disk) and pydicom's warnings.

    Returns ``(None, [])`` for a file that is not DICOM when ``quiet_if_not_dicom``.
    """
    notes: list = []
    with noted_warnings(notes):
        try:
            ds = pydicom.dcmread(path, defer_size=4096)
        except InvalidDicomError:
            if quiet_if_not_dicom:
                return None, []
            raise InputError("not a DICOM file (no 'DICM' marker after the 128-byte "
                             "preamble)", source=str(path)) from None
        except Exception as exc:  # pydicom's parser raises many types; all mean this
            raise InputError("truncated or unreadable DICOM header: " + one_line(exc),
                             source=str(path)) from None
    return ds, notes


def check_pixels(ds: Dataset, path: Path) -> None:
    """Refuse images without pixel data, colour images, truncated data, no decoder.

    pydicom stops quietly at the end of a file cut short in its header, so a missing
    Pixel Data element is reported as what it most often is: a truncated file.
    """
    if "PixelData" not in ds:
        raise InputError("truncated file, or no image: no Pixel Data (7FE0,0010) found",
                         source=str(path))
    for keyword in ("Rows", "Columns", "BitsAllocated"):
        if keyword not in ds:
            raise InputError(f"not an image: no {keyword}", source=str(path))
    if int(ds.get("SamplesPerPixel", 1)) != 1:
        raise InputError(f"a colour image ({ds.get('PhotometricInterpretation')}, "
                         f"{ds.SamplesPerPixel} samples per pixel); a grey-level volume "
                         "is expected", source=str(path))
    tsyntax = ds.file_meta.get("TransferSyntaxUID")
    if tsyntax is None:
        raise InputError("no Transfer Syntax UID (0002,0010) in the file meta",
                         source=str(path))
    try:
        decoder = get_decoder(tsyntax)
    except NotImplementedError:
        raise InputError(f"unsupported transfer syntax {tsyntax.name} ({tsyntax}): pydicom "
                         "has no decoder for it; convert the file to Explicit VR Little "
                         "Endian first (for example with dcmtk's dcmconv or dcmdjpeg)",
                         source=str(path)) from None
    if not decoder.is_available:
        raise InputError(f"pixel data compressed as {tsyntax.name} ({tsyntax}) and no "
                         "decoder for it is installed; it needs one of: "
                         + "; ".join(decoder.missing_dependencies), source=str(path))
    raw = ds.get_item("PixelData", keep_deferred=True)
    length = getattr(raw, "length", None)
    if length is not None and length != _UNDEFINED:
        expected = get_expected_length(ds)
        on_disk = os.path.getsize(path) - getattr(raw, "value_tell", 0)
        if length < expected or on_disk < length:
            raise InputError(f"truncated file: pixel data hold {min(length, on_disk)} bytes "
                             f"of the {expected} that {ds.Rows} x {ds.Columns} x "
                             f"{int(ds.get('NumberOfFrames', 1) or 1)} frames need",
                             source=str(path))


def _group_items(ds: Dataset, k: int, group: str):
    """First items of functional group ``group`` for frame ``k``: per-frame, then shared."""
    for seq_name, index in (("PerFrameFunctionalGroupsSequence", k),
                            ("SharedFunctionalGroupsSequence", 0)):
        seq = ds.get(seq_name)
        if seq and index < len(seq):
            inner = seq[index].get(group)
            if inner:
                yield inner[0]


def _group_value(ds: Dataset, k: int, group: str, keyword: str):
    """``keyword`` of functional group ``group`` for frame ``k`` (None when absent)."""
    for item in _group_items(ds, k, group):
        if keyword in item:
            return item[keyword].value
    return None


def value_map(slope, intercept, rwvm: Dataset | None) -> tuple[float, float, str]:
    """``(slope, intercept, how)`` taking stored values to voxel values for one frame.

    Rescale Slope/Intercept when given and not the identity; else the linear Real World
    Value Mapping item ``rwvm`` if there is one; else the identity.
    """
    slope = 1.0 if slope is None else float(slope)
    intercept = 0.0 if intercept is None else float(intercept)
    if (slope, intercept) == (1.0, 0.0) and rwvm is not None \
            and "RealWorldValueSlope" in rwvm and "RealWorldValueIntercept" in rwvm:
        label = str(rwvm.get("LUTLabel", "")).strip()
        return (float(rwvm.RealWorldValueSlope), float(rwvm.RealWorldValueIntercept),
                f"real world value mapping {label}".strip())
    return slope, intercept, "rescale"


def _frame_maps(ds: Dataset, n: int) -> list[tuple[float, float, str]]:
    return [value_map(_group_value(ds, k, "PixelValueTransformationSequence", "RescaleSlope"),
                       _group_value(ds, k, "PixelValueTransformationSequence",
                                    "RescaleIntercept"),
                       next(_group_items(ds, k, "RealWorldValueMappingSequence"), None))
            for k in range(n)]


def pixel_spacing(values, path: Path) -> tuple[float, float]:
    """(dy, dx) in mm from Pixel Spacing (row spacing, column spacing), or refuse."""
    if values is None or len(values) != 2:
        raise InputError("missing Pixel Spacing (0028,0030) (Pixel Measures functional "
                         "group or Image Plane module); the voxel size cannot be known",
                         source=str(path))
    dy, dx = float(values[0]), float(values[1])
    if not (dy > 0 and dx > 0):
        raise InputError(f"Pixel Spacing must be positive, got {list(values)}",
                         source=str(path))
    return dy, dx


def fill_planes(out: np.ndarray, frames, planes, maps, path: Path, notes: list,
                names: list[str] | None = None) -> None:
    """Decode frames one at a time into ``out[planes[k]]`` with their value maps.

    ``frames`` yields one decoded frame at a time (stored values); only one frame and
    one float64 frame buffer exist besides ``out``.
    """
    tmp = np.empty(out.shape[1:], dtype=np.float64)
    done = 0
    try:
        with noted_warnings(notes):
            for k, frame in enumerate(frames):
                slope, intercept, _ = maps[k]
                np.multiply(frame, slope, out=tmp)
                tmp += intercept
                out[planes[k]] = tmp
                done = k + 1
    except InputError:
        raise
    except Exception as exc:  # decoders raise many types; all mean "cannot decode"
        which = names[done] if names else f"frame {done + 1}"
        raise InputError(f"cannot decode {which}: {type(exc).__name__}: "
                         + one_line(exc), source=str(path)) from None


def value_facts(maps) -> dict:
    """Meta entries saying how stored values were mapped (one mapping or per frame)."""
    slopes = {m[0] for m in maps}
    intercepts = {m[1] for m in maps}
    facts = {"value_mapping": maps[0][2]}
    if len(slopes) == 1 and len(intercepts) == 1:
        facts.update(value_slope=maps[0][0], value_intercept=maps[0][1])
    else:
        facts["value_mapping_per_frame"] = True
    return facts


def common_facts(ds: Dataset, path: Path, warned: list) -> dict:
    """The allow-listed header facts plus encoding facts, source and read warnings."""
    meta = kept_meta(ds)
    tsyntax = ds.file_meta.TransferSyntaxUID
    meta.update(transfer_syntax_uid=str(tsyntax), transfer_syntax=tsyntax.name,
                source_file=scrub_path(path, ds))
    for keyword, key in (("BitsStored", "bits_stored"),
                         ("PhotometricInterpretation", "photometric_interpretation")):
        if keyword in ds:
            meta[key] = ds[keyword].value if keyword == "BitsStored" else str(ds[keyword].value)
    if warned:
        meta["read_warnings"] = sorted(set(warned))
    return meta


def pixel_layout(ds: Dataset, nframes: int) -> tuple[PixelLayout, int] | None:
    """Word layout and file offset of uncompressed little-endian pixel data, else None.

    None for encapsulated (compressed), deflated or big-endian transfer syntaxes, words
    other than 8, 16 or 32 bits, and pixel data whose place in the file is not known
    (read with the header, or of undefined length).
    """
    tsyntax = ds.file_meta.TransferSyntaxUID
    if tsyntax.is_encapsulated or tsyntax.is_deflated or not tsyntax.is_little_endian:
        return None
    bits = int(ds.BitsAllocated)
    stored = int(ds.get("BitsStored", bits) or bits)
    if bits not in (8, 16, 32) or not 1 <= stored <= bits:
        return None
    raw = ds.get_item("PixelData", keep_deferred=True)
    offset, length = getattr(raw, "value_tell", None), getattr(raw, "length", None)
    if offset is None or length is None or length == _UNDEFINED:
        return None
    layout = PixelLayout(int(ds.Rows), int(ds.Columns), bits, stored,
                         int(ds.get("PixelRepresentation", 0) or 0) == 1)
    if length < nframes * layout.frame_bytes:
        return None
    return layout, int(offset)


def read_dicom_file(path, *, lazy: bool | None = None) -> Volume:
    """Read an enhanced multi-frame DICOM volume (Breast Tomosynthesis Image and kin).

    Parameters
    ----------
    path : str or Path
    lazy : bool, optional
        Read the voxels on demand (:class:`qa.io.lazy.FrameStack`) instead of into an
        array. ``None`` (default): when the float32 volume would take at least
        :data:`LAZY_MIN_BYTES`; ``True``: whenever the pixel data allow it
        (:func:`pixel_layout`); ``False``: never. Compressed pixel data are always read
        into memory, frame by frame. Either way the voxels are the same, bit for bit.

    Raises
    ------
    InputError
        Not DICOM, truncated, a single frame, a multi-frame object without per-frame
        Plane Position, missing pixel spacing, irregular or repeated positions, an
        unsupported transfer syntax or a missing decoder.
    """
    path = Path(path)
    ds, warned = read_header(path)
    check_pixels(ds, path)
    nframes = int(ds.get("NumberOfFrames", 1) or 1)
    if nframes < 2:
        kind = getattr(ds.get("SOPClassUID"), "name", "unknown SOP class")
        raise InputError(f"a 2D image (a single frame, {kind}) where a volume is expected; "
                         "for a series of slices give their folder", source=str(path))
    per_frame = ds.get("PerFrameFunctionalGroupsSequence")
    if not per_frame or len(per_frame) != nframes:
        raise InputError(f"{nframes} frames but no Per-frame Functional Groups with a Plane "
                         "Position (Patient) for each: the frames cannot be placed",
                         source=str(path))
    positions, orientations = [], []
    for k in range(nframes):
        pos = _group_value(ds, k, "PlanePositionSequence", "ImagePositionPatient")
        ori = _group_value(ds, k, "PlaneOrientationSequence", "ImageOrientationPatient")
        if pos is None or ori is None:
            missing = "Plane Position (Patient)" if pos is None else "Plane Orientation"
            raise InputError(f"frame {k + 1} has no {missing}: the frames cannot be placed",
                             source=str(path))
        positions.append([float(v) for v in pos])
        orientations.append([float(v) for v in ori])
    spacings = {tuple(float(v) for v in s) if s is not None else None for s in
                (_group_value(ds, k, "PixelMeasuresSequence", "PixelSpacing")
                 for k in range(nframes))}
    if len(spacings) > 1:
        raise InputError(f"frames have different pixel spacings {sorted(map(str, spacings))}",
                         source=str(path))
    dy_dx = pixel_spacing(spacings.pop(), path)
    stack = order_planes(positions, orientations, dy_dx, str(path))
    maps = _frame_maps(ds, nframes)
    shape = (nframes, int(ds.Rows), int(ds.Columns))
    found = pixel_layout(ds, nframes) if lazy is not False else None
    if found is not None and (lazy or 4 * int(np.prod(shape)) >= LAZY_MIN_BYTES):
        layout, offset = found
        data = FrameStack(frames_of_file(path, offset, layout, nframes), layout,
                          plane_of_frame=stack.plane_of_frame, maps=[m[:2] for m in maps])
    else:
        out = np.empty(shape, dtype=np.float32)
        fill_planes(out, iter_pixels(path), stack.plane_of_frame, maps, path, warned)
        data = frozen(out)

    meta = common_facts(ds, path, warned)
    meta.update(stack.facts)
    meta.update(value_facts(maps))
    meta["number_of_frames"] = nframes
    meta["pixel_spacing_mm"] = list(dy_dx)
    for keyword, key in (("SliceThickness", "slice_thickness_mm"),
                         ("SpacingBetweenSlices", "stated_spacing_between_slices_mm")):
        value = _group_value(ds, 0, "PixelMeasuresSequence", keyword)
        if value is not None:
            meta[key] = float(value)
    return Volume(data, stack.spacing_mm, stack.origin_mm, meta)
