"""Uncompressed DICOM frames read from the file when indexed: :class:`FrameStack`.

A clinical DBT reconstruction (about 70 planes of 2000 x 2500 voxels, 0.7 GB as the
file's uint16) would take twice its file as a float32 array. A :class:`FrameStack`
holds none of it: it is a :class:`~qa.volume.LazyStack` that, when indexed, reads only
the frames and the rows asked for (one read per frame of the rows' span) and returns
float32 voxels computed exactly as the in-memory reader computes them
(:func:`qa.io.dicom_read.fill_planes`):

* frame order: plane ``z`` is stored frame ``frame_of_plane[z]``, the frames being
  ordered by position along the plane normal (:mod:`qa.io.dicom_geometry`);
* stored values: the Bits Stored low bits of each word, sign-extended when Pixel
  Representation is 1 (two's complement), as pydicom decodes them;
* value mapping per frame: ``float32(float64(stored) * slope + intercept)``.

For 8- and 16-bit words the last two steps are one table look-up: every possible word
is mapped once per (slope, intercept), with the same float64 arithmetic, so the values
are bit for bit those of the in-memory reader.

Only uncompressed, little-endian pixel data qualify (Explicit or Implicit VR Little
Endian): there a frame is ``rows x columns`` words at a known offset. Compressed files
are read into memory as before. The file must stay in place and unchanged while the
volume is in use: every read checks its size and modification time and refuses a file
that changed.

References
----------
DICOM PS3.5 Section 8.1.1 (Pixel Data encoding of uncompressed data) and Annex A.1-A.2
(Little Endian transfer syntaxes); PS3.3 C.7.6.3.1 (Bits Stored, High Bit, Pixel
Representation).
"""

from __future__ import annotations

import os
import threading
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np

from ..errors import InputError
from ..volume import LazyStack


@dataclass(frozen=True)
class PixelLayout:
    """How one frame's stored words lie in a file (uncompressed, little endian)."""

    rows: int
    columns: int
    bits_allocated: int   # 8, 16 or 32
    bits_stored: int
    signed: bool          # Pixel Representation 1

    def __post_init__(self):
        if self.bits_allocated not in (8, 16, 32):
            raise ValueError(f"bits allocated must be 8, 16 or 32, got {self.bits_allocated}")
        if not 1 <= self.bits_stored <= self.bits_allocated:
            raise ValueError(f"bits stored {self.bits_stored} outside 1..{self.bits_allocated}")

    @property
    def word(self) -> np.dtype:
        """The raw word, read unsigned; masking and sign give the stored value."""
        return np.dtype(f"<u{self.bits_allocated // 8}")

    @property
    def frame_bytes(self) -> int:
        return self.rows * self.columns * self.word.itemsize

    def stored(self, words: np.ndarray) -> np.ndarray:
        """Stored values of raw words (int64): low Bits Stored bits, sign-extended if signed."""
        v = np.asarray(words).astype(np.int64) & ((1 << self.bits_stored) - 1)
        if self.signed:
            top = 1 << (self.bits_stored - 1)
            v = np.where(v >= top, v - (top << 1), v)
        return v


#: Voxels converted at a time (64 Ki: 256 kB of float32, 512 kB of indices).
_BLOCK = 1 << 16


def _as_slice(r: range) -> slice:
    """A numpy slice selecting exactly ``r`` (a stop of -1 would mean the last element)."""
    return slice(r.start, r.stop if r.stop >= 0 else None, r.step)


class FrameStack(LazyStack):
    """Frames of uncompressed pixel data, mapped to float32 voxels when indexed.

    Parameters
    ----------
    frames : sequence of (path, offset)
        For each stored frame, its file and the byte offset of its first word (the frames
        of a multi-frame object lie one after another in one file).
    layout : PixelLayout
        Rows, columns and word format, shared by all frames.
    plane_of_frame : (n,) array_like of int
        Volume plane of each stored frame (a permutation of ``0 .. n-1``).
    maps : sequence of (slope, intercept)
        Value mapping of each stored frame: ``value = slope * stored + intercept``.

    Notes
    -----
    One full plane (the last one read whole) is kept, since several metric families
    read the in-focus plane in turn; nothing else is held. Thread-safe: every read opens
    its own handle.
    """

    def __init__(self, frames: Sequence, layout: PixelLayout, *, plane_of_frame, maps):
        self._frames = [(str(p), int(o)) for p, o in frames]
        self._layout = layout
        plane_of_frame = np.asarray(plane_of_frame, dtype=np.intp)
        n = len(self._frames)
        if sorted(plane_of_frame.tolist()) != list(range(n)) or len(maps) != n:
            raise ValueError("plane_of_frame must be a permutation of the frames and maps "
                             "must give one (slope, intercept) per frame")
        self._frame_of_plane = np.argsort(plane_of_frame)
        self._maps = [(float(s), float(b)) for s, b in maps]
        self._stamps = {p: self._stamp(os.stat(p)) for p in {p for p, _ in self._frames}}
        self._setup()

    def _setup(self):
        self._lock = threading.Lock()
        self._luts: dict = {}
        self._kept: tuple | None = None   # (plane, read-only array) of the last whole plane

    def __getstate__(self):  # pickled without tables, cache and lock (process pools)
        state = dict(self.__dict__)
        for key in ("_lock", "_luts", "_kept"):
            state.pop(key)
        return state

    def __setstate__(self, state):
        self.__dict__.update(state)
        self._setup()

    @staticmethod
    def _stamp(st: os.stat_result) -> tuple[int, int]:
        return st.st_size, st.st_mtime_ns

    @property
    def shape(self) -> tuple[int, int, int]:
        return (len(self._frames), self._layout.rows, self._layout.columns)

    @property
    def files(self) -> tuple[str, ...]:
        """The files the frames are read from."""
        return tuple(sorted(self._stamps))

    def __repr__(self) -> str:
        where = self.files[0] if len(self._stamps) == 1 else f"{len(self._stamps)} files"
        return f"<FrameStack {self.shape} float32 from {where}, read on demand>"

    # --- values -----------------------------------------------------------------------
    def _lut(self, slope: float, intercept: float) -> np.ndarray:
        """float32 value of every possible word (8 and 16 bits) for one mapping."""
        key = (slope, intercept)
        lut = self._luts.get(key)
        if lut is None:
            layout = self._layout
            stored = np.arange(1 << layout.bits_allocated, dtype=np.int32)  # every word
            stored &= (1 << layout.bits_stored) - 1
            if layout.signed:
                top = 1 << (layout.bits_stored - 1)
                stored[stored >= top] -= top << 1
            values = stored.astype(np.float64)
            values *= slope
            values += intercept
            lut = values.astype(np.float32)
            with self._lock:
                self._luts[key] = lut
        return lut

    def _values(self, words: np.ndarray, frame: int, out: np.ndarray) -> None:
        """Voxel values of a frame's ``words`` into ``out``, in blocks of rows that stay
        in the processor's cache (a whole-plane gather or float64 pass is 3-5 x slower)."""
        slope, intercept = self._maps[frame]
        step = max(1, _BLOCK // max(1, words.shape[1]))
        if self._layout.bits_allocated <= 16:
            lut = self._lut(slope, intercept)
            for r in range(0, words.shape[0], step):
                np.take(lut, words[r:r + step], out=out[r:r + step], mode="clip")
            return
        for r in range(0, words.shape[0], step):
            tmp = np.multiply(self._layout.stored(words[r:r + step]), slope, dtype=np.float64)
            tmp += intercept
            out[r:r + step] = tmp

    # --- reading ----------------------------------------------------------------------
    def _open(self, path: str, handles: dict):
        fh = handles.get(path)
        if fh is None:
            try:
                fh = open(path, "rb", buffering=0)
            except OSError as exc:
                raise InputError(f"cannot read the pixel data any more: {exc.strerror}",
                                 source=path) from None
            if self._stamp(os.fstat(fh.fileno())) != self._stamps[path]:
                fh.close()
                raise InputError("the file changed on disk after it was opened; read the "
                                 "volume again", source=path)
            handles[path] = fh
        return fh

    def _read_rows(self, fh, path: str, offset: int, buf: np.ndarray) -> None:
        fh.seek(offset)
        view = memoryview(buf).cast("B")
        got = 0
        while got < len(view):
            n = fh.readinto(view[got:])
            if not n:
                raise InputError(f"truncated pixel data: {len(view) - got} bytes missing at "
                                 f"offset {offset + got}", source=path)
            got += n

    def read(self, planes: range, rows: range, cols: range) -> np.ndarray:
        layout = self._layout
        whole = (len(planes) == 1 and rows == range(layout.rows)
                 and cols == range(layout.columns))
        if whole:
            kept = self._kept
            if kept is not None and kept[0] == planes[0]:
                return kept[1][None]
        out = np.empty((len(planes), len(rows), len(cols)), dtype=np.float32)
        if out.size == 0:
            return out
        lo, hi = min(rows), max(rows) + 1
        row_bytes = layout.columns * layout.word.itemsize
        local = _as_slice(range(rows.start - lo, rows.stop - lo, rows.step))
        buf = np.empty((hi - lo, layout.columns), dtype=layout.word)
        handles: dict = {}
        try:
            for i, z in enumerate(planes):
                frame = int(self._frame_of_plane[z])
                path, offset = self._frames[frame]
                self._read_rows(self._open(path, handles), path, offset + lo * row_bytes, buf)
                self._values(buf[local, _as_slice(cols)], frame, out[i])
        finally:
            for fh in handles.values():
                fh.close()
        if whole:
            out.flags.writeable = False
            self._kept = (planes[0], out[0])
        return out


def frames_of_file(path, offset: int, layout: PixelLayout, n: int) -> list:
    """``(path, offset)`` of the ``n`` frames of a multi-frame object's pixel data."""
    return [(Path(path), offset + k * layout.frame_bytes) for k in range(n)]
