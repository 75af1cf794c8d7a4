"""The :class:`Volume`: a reconstructed stack of planes with its spacing and metadata.

Conventions (``DEVELOPERS.md``, section "Conventions"): the array is indexed
``[z, y, x]`` (plane, row, column) and held as float32; ``spacing_mm`` is
``(dz, dy, dx)``; ``origin_mm`` is the position ``(z, y, x)`` in mm of the centre of voxel
``[0, 0, 0]``; ``x`` is the direction of source travel, ``z`` the height above the
detector with plane 0 nearest to it.

The voxels are an ndarray, or, for volumes too large to hold twice, a
:class:`LazyStack` that makes the planes and blocks it is indexed for (a clinical DBT
reconstruction of 70 x 2000 x 2500 voxels is 1.4 GB as float32, twice its file).
"""

from __future__ import annotations

import abc
import operator
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Mapping

import numpy as np

from .errors import InputError


class LazyStack(abc.ABC):
    """A read-only ``[z, y, x]`` float32 stack whose voxels are made when indexed.

    The protocol a :class:`Volume` accepts in place of an array. A subclass gives
    :attr:`shape` and :meth:`read`; this class turns numpy's basic indexing into calls
    of :meth:`read`, so that code written for an array keeps working as long as it
    reads planes and blocks: ``data[k]``, ``data[k, a:b, c:d]``, ``data[:, rows, cols]``.

    ``stack[key]``, with ``key`` an integer, a slice (any step, negative indices), ``...``
    or a tuple of up to three of those, returns a new read-only float32 ndarray equal to
    ``np.asarray(stack)[key]``; an integer out of range raises IndexError, as numpy does.
    Index arrays, boolean masks and ``None`` raise TypeError. Whole-volume methods of
    ndarray (``mean``, ``astype``, ``sum``, ...) are absent on purpose, so that nothing
    builds the whole volume unnoticed; ``np.asarray(stack)`` builds it when that is
    really wanted.

    Examples
    --------
    >>> class Ramp(LazyStack):
    ...     shape = (3, 2, 4)
    ...     def read(self, planes, rows, cols):
    ...         z, y, x = np.ix_(np.asarray(planes), np.asarray(rows), np.asarray(cols))
    ...         return (100 * z + 10 * y + x).astype(np.float32)
    >>> Ramp()[2, 1, ::-2]
    array([213., 211.], dtype=float32)
    >>> Volume(Ramp(), (1.0, 0.1, 0.1)).shape
    (3, 2, 4)
    """

    dtype = np.dtype(np.float32)
    ndim = 3

    @property
    @abc.abstractmethod
    def shape(self) -> tuple[int, int, int]:
        """``(nz, ny, nx)``."""

    @abc.abstractmethod
    def read(self, planes: range, rows: range, cols: range) -> np.ndarray:
        """The voxels ``[planes][:, rows][:, :, cols]`` as a new float32 array.

        Parameters
        ----------
        planes, rows, cols : range
            Indices inside the stack (non-negative, any step, possibly empty).

        Returns
        -------
        (len(planes), len(rows), len(cols)) float32 ndarray
        """

    @property
    def size(self) -> int:
        return int(np.prod(self.shape))

    @property
    def nbytes(self) -> int:
        """Bytes the whole volume would take as an array (none are held)."""
        return self.size * self.dtype.itemsize

    def __len__(self) -> int:
        return self.shape[0]

    def __iter__(self):
        for k in range(self.shape[0]):
            yield self[k]

    def __array__(self, dtype=None, copy=None):
        if copy is False:
            raise ValueError(f"a {type(self).__name__} cannot be viewed as an array without "
                             "building it (copy=False)")
        arr = self[:]
        return arr if dtype is None else arr.astype(dtype, copy=False)

    def __getitem__(self, key) -> np.ndarray:
        key = key if isinstance(key, tuple) else (key,)
        ellipses = sum(k is Ellipsis for k in key)
        if ellipses > 1:
            raise IndexError("an index can only have a single ellipsis ('...')")
        if ellipses:
            i = next(j for j, k in enumerate(key) if k is Ellipsis)
            key = key[:i] + (slice(None),) * (4 - len(key)) + key[i + 1:]
        if len(key) > 3:
            raise IndexError(f"too many indices for a 3-D stack: {len(key)} were given")
        key = key + (slice(None),) * (3 - len(key))
        ranges, kept = [], []
        for axis, (k, n) in enumerate(zip(key, self.shape)):
            if isinstance(k, slice):
                ranges.append(range(*k.indices(n)))
                kept.append(slice(None))
                continue
            if isinstance(k, (bool, np.bool_)):
                raise TypeError(f"a {type(self).__name__} takes integers and slices as "
                                "indices, not booleans")
            try:
                i = operator.index(k)
            except TypeError:
                raise TypeError(f"a {type(self).__name__} takes integers and slices as "
                                f"indices, got {type(k).__name__}") from None
            if not -n <= i < n:
                raise IndexError(f"index {i} is out of bounds for axis {axis} with size {n}")
            ranges.append(range(i % n, i % n + 1))
            kept.append(0)
        out = self.read(*ranges)
        expected = tuple(len(r) for r in ranges)
        if out.shape != expected or out.dtype != np.float32:
            raise RuntimeError(f"{type(self).__name__}.read gave {out.dtype} {out.shape}, "
                               f"expected float32 {expected}")
        out = out[tuple(kept)]
        if isinstance(out, np.ndarray):  # (all three integers give a numpy scalar)
            out.flags.writeable = False
        return out

    def __repr__(self) -> str:
        return f"<{type(self).__name__} {self.shape} float32, read on demand>"


class TransposedStack(LazyStack):
    """Another stack seen with its rows and columns exchanged: ``t[z, i, j] == base[z, j, i]``.

    Nothing is read when the view is made; each request is passed on to ``base`` with
    its row and column ranges exchanged, so a block of the view costs what the same
    block of ``base`` costs.

    Parameters
    ----------
    base : LazyStack
        The stack to view.

    Examples
    --------
    >>> class Ramp(LazyStack):
    ...     shape = (2, 2, 3)
    ...     def read(self, planes, rows, cols):
    ...         z, y, x = np.ix_(np.asarray(planes), np.asarray(rows), np.asarray(cols))
    ...         return (100 * z + 10 * y + x).astype(np.float32)
    >>> view = TransposedStack(Ramp())
    >>> view.shape
    (2, 3, 2)
    >>> view[1, 2]
    array([102., 112.], dtype=float32)
    """

    def __init__(self, base: LazyStack):
        self._base = base

    @property
    def base(self) -> LazyStack:
        """The stack seen through this view."""
        return self._base

    @property
    def shape(self) -> tuple[int, int, int]:
        nz, ny, nx = self._base.shape
        return (nz, nx, ny)

    def read(self, planes: range, rows: range, cols: range) -> np.ndarray:
        block = self._base[_as_slice(planes), _as_slice(cols), _as_slice(rows)]
        return np.ascontiguousarray(block.transpose(0, 2, 1))

    def __repr__(self) -> str:
        return f"<TransposedStack {self.shape} float32 of {self._base!r}>"


def _as_slice(r: range) -> slice:
    """A slice selecting exactly ``r`` (a stop of -1 would mean the last element)."""
    return slice(r.start, r.stop if r.stop >= 0 else None, r.step)


def _frozen_mapping(values: Mapping | None) -> Mapping:
    return MappingProxyType(dict(values or {}))


@dataclass(frozen=True)
class Volume:
    """A reconstructed volume.

    Parameters
    ----------
    data : (nz, ny, nx) ndarray or LazyStack
        Voxel values. An array is converted to float32 and made read-only (a writeable
        array is copied first, so the caller's stays writeable); a :class:`LazyStack`
        is kept as it is and read plane by plane when indexed.
    spacing_mm : tuple of 3 floats
        ``(dz, dy, dx)`` in mm, all positive.
    origin_mm : tuple of 3 floats
        ``(z, y, x)`` in mm of the centre of voxel ``[0, 0, 0]``.
    meta : mapping
        Unit identity and acquisition facts (manufacturer, model, serial, software,
        geometry, source file, ...). Never patient identifiers: readers drop them.
    """

    data: np.ndarray | LazyStack
    spacing_mm: tuple[float, float, float]
    origin_mm: tuple[float, float, float] = (0.0, 0.0, 0.0)
    meta: Mapping = field(default_factory=dict)

    def __post_init__(self):
        lazy = isinstance(self.data, LazyStack)
        arr = self.data if lazy else np.asarray(self.data)
        shape = tuple(arr.shape)
        if len(shape) != 3:
            raise InputError(f"a volume needs 3 dimensions [z, y, x], got shape {shape}",
                             field="data")
        if min(shape) < 1:
            raise InputError(f"a volume cannot be empty, got shape {shape}", field="data")
        if lazy:
            if arr.dtype != np.float32:
                raise InputError(f"a lazy stack must give float32 voxels, got {arr.dtype}",
                                 field="data")
        else:
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
        return tuple(self.data.shape)

    @property
    def lazy(self) -> bool:
        """True when the voxels are read on demand (:class:`LazyStack`), not held."""
        return isinstance(self.data, LazyStack)

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

    def transposed(self) -> "Volume":
        """This volume with rows and columns exchanged: ``[z, y, x]`` becomes ``[z, x, y]``.

        Spacing and origin follow (``dy`` and ``dx`` change places); the metadata is kept.
        A :class:`LazyStack` is not read: the copy views it through a
        :class:`TransposedStack`. An in-memory array is copied once, plane order kept.
        The exchange is a mirror image about the diagonal ``x = y``.

        Returns
        -------
        Volume

        Examples
        --------
        >>> vol = Volume(np.arange(6, dtype=np.float32).reshape(1, 2, 3), (1.0, 0.1, 0.2),
        ...              (5.0, -1.0, 2.0))
        >>> t = vol.transposed()
        >>> t.shape, t.spacing_mm, t.origin_mm
        ((1, 3, 2), (1.0, 0.2, 0.1), (5.0, 2.0, -1.0))
        >>> bool(np.array_equal(t.data[0], vol.data[0].T))
        True
        """
        if isinstance(self.data, TransposedStack):
            data = self.data.base
        elif isinstance(self.data, LazyStack):
            data = TransposedStack(self.data)
        else:
            data = np.ascontiguousarray(self.data.transpose(0, 2, 1))
            data.flags.writeable = False  # a new array: no second copy in __post_init__
        dz, dy, dx = self.spacing_mm
        z0, y0, x0 = self.origin_mm
        return Volume(data, (dz, dx, dy), (z0, x0, y0), self.meta)

    def with_meta(self, **extra) -> "Volume":
        """A copy of this volume with ``extra`` merged into its metadata."""
        meta = dict(self.meta)
        meta.update(extra)
        return Volume(self.data, self.spacing_mm, self.origin_mm, meta)
