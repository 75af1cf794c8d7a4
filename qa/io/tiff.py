"""TIFF stacks: one grey-level page per plane, spacing from a sidecar.

Plane ``k`` of the volume is page ``k`` of the file (page 0 nearest the detector, by the
convention of :mod:`qa.volume`); each page's rows are ``y`` and its columns ``x``. TIFF
resolution tags and ImageJ metadata are not read: the spacing is never guessed from a
file that may have been resampled for display, it comes from the sidecar
(``<name>.spacing.json`` or ``.yaml``, see :mod:`qa.io._files`).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..errors import InputError
from ..volume import Volume
from ._files import check_stack, frozen, one_line, read_sidecar


def _tifffile():
    try:
        import tifffile
    except ImportError:
        raise InputError("reading TIFF needs the 'tifffile' package: "
                         "pip install 'lacuna[tiff]'") from None
    return tifffile


def read_tiff(path) -> Volume:
    """Read a TIFF stack [z, y, x] and its spacing sidecar.

    Pages are decoded one at a time into a single preallocated float32 array.

    Raises
    ------
    InputError
        Not a readable TIFF, a single 2D page, colour (multi-sample) pages, pages of
        different sizes, or no (or a bad) sidecar.
    """
    tifffile = _tifffile()
    path = Path(path)
    spacing, origin, meta = read_sidecar(path)
    try:
        with tifffile.TiffFile(path) as tif:
            data = _read_pages(tif, path)
    except InputError:
        raise
    except (tifffile.TiffFileError, OSError, ValueError, EOFError) as exc:
        raise InputError("not a readable TIFF (truncated or corrupt?): " + one_line(exc),
                         source=str(path)) from None
    meta = {**meta, "source_file": str(path)}
    try:
        return Volume(frozen(data), spacing, origin, meta)
    except InputError as exc:
        raise InputError(exc.message, source=str(path), field=exc.field) from None


def _read_pages(tif, path: Path) -> np.ndarray:
    pages = list(tif.pages)
    if not pages:
        raise InputError("not a readable TIFF: it holds no pages", source=str(path))
    first = pages[0]
    grey = [p.samplesperpixel == 1 and len(p.shape) == 2 for p in pages]
    if all(grey) and len(pages) > 1:
        shapes = {p.shape for p in pages}
        if len(shapes) > 1:
            raise InputError(f"pages of different sizes {sorted(shapes)}; a stack needs "
                             "one size", source=str(path))
        check_stack((len(pages),) + first.shape, first.dtype, path)
        out = np.empty((len(pages),) + first.shape, dtype=np.float32)
        for k, page in enumerate(pages):
            out[k] = page.asarray()
        return out
    series = tif.series[0]
    if "S" in series.axes:
        raise InputError(f"colour or multi-sample TIFF (axes {series.axes}, shape "
                         f"{series.shape}); a grey-level stack is expected", source=str(path))
    check_stack(tuple(series.shape), np.dtype(series.dtype), path)
    data = series.asarray()
    return data if data.dtype == np.float32 else data.astype(np.float32)
