"""Helpers shared by the readers: spacing sidecars, read-only arrays, shape checks.

A *sidecar* gives the geometry a bare array file cannot carry. For ``stack.npy`` or
``stack.tif`` it is ``stack.spacing.json`` or ``stack.spacing.yaml`` beside it::

    spacing_mm: [1.0, 0.1, 0.1]      # (dz, dy, dx), required
    origin_mm: [0.0, 0.0, 0.0]       # (z, y, x) of voxel [0, 0, 0], optional
    meta: {manufacturer: Example}    # plain facts about the unit, optional
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..yamlio import Fields, load_yaml

SIDECAR_SUFFIXES = (".spacing.json", ".spacing.yaml", ".spacing.yml")


def one_line(exc: BaseException) -> str:
    """An exception's text on one line (decoders report plugin by plugin on new lines)."""
    return " ".join(str(exc).split())


def frozen(arr: np.ndarray) -> np.ndarray:
    """Mark a freshly built array read-only, so :class:`~qa.volume.Volume` keeps it as is.

    ``Volume`` copies a writeable array it is given (so as not to freeze the caller's
    array); a reader owns its array, and freezing it first avoids a second full copy.
    """
    arr.flags.writeable = False
    return arr


def sidecar_of(path) -> Path:
    """The one spacing sidecar of an array file; refuses none or several."""
    path = Path(path)
    stem = path.with_suffix("")
    found = [Path(str(stem) + s) for s in SIDECAR_SUFFIXES if Path(str(stem) + s).is_file()]
    if not found:
        raise InputError(f"no spacing sidecar: expected {stem.name}.spacing.json or "
                         f"{stem.name}.spacing.yaml beside it giving spacing_mm (dz, dy, dx)",
                         source=str(path))
    if len(found) > 1:
        raise InputError("two spacing sidecars, keep one: "
                         + ", ".join(p.name for p in found), source=str(path))
    return found[0]


def read_sidecar(path) -> tuple[tuple[float, float, float], tuple[float, float, float], dict]:
    """Read the sidecar of ``path``: ``(spacing_mm, origin_mm, meta)``."""
    side = sidecar_of(path)
    if side.suffix == ".json":
        try:
            doc = json.loads(side.read_text(encoding="utf-8"))
        except json.JSONDecodeError as exc:
            raise InputError(f"not valid JSON: {exc.msg}", source=str(side),
                             line=exc.lineno) from None
        except (OSError, UnicodeDecodeError) as exc:
            raise InputError(f"cannot read: {exc}", source=str(side)) from None
    else:
        doc = load_yaml(side)
    fields = Fields(doc, str(side))
    spacing = fields.vector("spacing_mm", 3, positive=True)
    origin = fields.vector("origin_mm", 3, (0.0, 0.0, 0.0))
    meta = fields.raw("meta", {})
    if not isinstance(meta, dict):
        raise fields.error("meta", f"expected a mapping of facts, got {meta!r}")
    fields.reject_unknown()
    return spacing, origin, dict(meta)


def check_stack(arr_shape: tuple, dtype: np.dtype, source) -> None:
    """Refuse arrays that are not a 3D stack of real numbers."""
    if len(arr_shape) == 2:
        raise InputError(f"a 2D image (shape {arr_shape}) where a volume [z, y, x] is "
                         "expected", source=str(source))
    if len(arr_shape) != 3:
        raise InputError(f"expected a 3D stack [z, y, x], got shape {arr_shape}",
                         source=str(source))
    if not (np.issubdtype(dtype, np.integer) or np.issubdtype(dtype, np.floating)
            or dtype == np.bool_):
        raise InputError(f"expected real numbers, got data type {dtype}", source=str(source))
