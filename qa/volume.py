"""The :class:`Volume`: a reconstructed stack of planes with its spacing and metadata.

Conventions (``DEVELOPERS.md``, section "Conventions"): the array is indexed
``[z, y, x]`` (plane, row, column) and held as float32; ``spacing_mm`` is
``(dz, dy, dx)``; ``origin_mm`` is the position ``(z, y, x)`` in mm of the centre of voxel
``[0, 0, 0]``; ``x`` is the direction of source travel, ``z`` the height above the
detector with plane 0 nearest to it.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Mapping

import numpy as np

from .errors import InputError


def _frozen_mapping(values: Mapping | None) -> Mapping:
    return MappingProxyType(dict(values or {}))


@dataclass(frozen=True)
class Volume:
    """A reconstructed volume.

    Parameters
    ----------
    data : (nz, ny, nx) ndarray
        Voxel values, converted to float32 and made read-only.
    spacing_mm : tuple of 3 floats
        ``(dz, dy, dx)`` in mm, all positive.
    origin_mm : tuple of 3 floats
        ``(z, y, x)`` in mm of the centre of voxel ``[0, 0, 0]``.
    meta : mapping
        Unit identity and acquisition facts (manufacturer, model, serial, software,
        geometry, source file, ...). Never patient identifiers: readers drop them.
    """

    data: np.ndarray
    spacing_mm: tuple[float, float, float]
    origin_mm: tuple[float, float, float] = (0.0, 0.0, 0.0)
    meta: Mapping = field(default_factory=dict)

    def __post_init__(self):
        arr = np.asarray(self.data)
        if arr.ndim != 3:
            raise InputError(f"a volume needs 3 dimensions [z, y, x], got shape {arr.shape}",
                             field="data")
        if min(arr.shape) < 1:
            raise InputError(f"a volume cannot be empty, got shape {arr.shape}", field="data")
        if arr.dtype != np.float32:
            arr = arr.astype(np.float32)
        if arr.flags.writeable:
            if arr is self.data:  # do not freeze the caller's array behind their back
                arr = arr.copy()
            arr.flags.writeable = False
        spacing = tuple(float(s) for s in self.spacing_mm)
        if len(spacing) != 3 or not all(np.isfinite(s) and s > 0 for s in spacing):
            raise InputError(f"spacing must be three positive numbers (dz, dy, dx) in mm, "
                             f"got {self.spacing_mm!r}", field="spacing_mm")
        origin = tuple(float(o) for o in self.origin_mm)
        if len(origin) != 3 or not all(np.isfinite(o) for o in origin):
            raise InputError(f"origin must be three finite numbers (z, y, x) in mm, "
                             f"got {self.origin_mm!r}", field="origin_mm")
        object.__setattr__(self, "data", arr)
        object.__setattr__(self, "spacing_mm", spacing)
        object.__setattr__(self, "origin_mm", origin)
        object.__setattr__(self, "meta", _frozen_mapping(self.meta))

    # --- geometry helpers -------------------------------------------------------------
    @property
    def shape(self) -> tuple[int, int, int]:
        return self.data.shape

    def axis_mm(self, axis: int) -> np.ndarray:
        """Positions in mm of the voxel centres along ``axis`` (0 = z, 1 = y, 2 = x)."""
        n = self.data.shape[axis]
        return self.origin_mm[axis] + self.spacing_mm[axis] * np.arange(n)

    def to_index(self, point_mm) -> np.ndarray:
        """Fractional voxel index ``(iz, iy, ix)`` of a point ``(z, y, x)`` in mm."""
        p = np.asarray(point_mm, dtype=float)
        return (p - np.asarray(self.origin_mm)) / np.asarray(self.spacing_mm)

    def to_mm(self, index) -> np.ndarray:
        """Position ``(z, y, x)`` in mm of a (fractional) voxel index."""
        i = np.asarray(index, dtype=float)
        return np.asarray(self.origin_mm) + i * np.asarray(self.spacing_mm)

    def plane_index(self, z_mm: float) -> int:
        """Index of the plane nearest to height ``z_mm``."""
        return int(np.clip(round(float(self.to_index((z_mm, 0, 0))[0])), 0, self.shape[0] - 1))

    def with_meta(self, **extra) -> "Volume":
        """A copy of this volume with ``extra`` merged into its metadata."""
        meta = dict(self.meta)
        meta.update(extra)
        return Volume(self.data, self.spacing_mm, self.origin_mm, meta)
