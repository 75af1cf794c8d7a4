"""Atomic file writing: a temporary file in the same folder, then a rename into place."""

from __future__ import annotations

import os
import tempfile
from contextlib import contextmanager
from pathlib import Path


@contextmanager
def atomic_path(path):
    """Yield a temporary path beside ``path``; on success it replaces ``path``.

    On any error the temporary file is removed and ``path`` is left as it was, so a
    reader never sees a half-written file.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    os.close(fd)
    try:
        yield Path(tmp)
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise


def write_bytes_atomic(path, data: bytes) -> Path:
    with atomic_path(path) as tmp:
        tmp.write_bytes(data)
    return Path(path)


def write_text_atomic(path, text: str) -> Path:
    return write_bytes_atomic(path, text.encode("utf-8"))


def sha256_of(path, *, chunk: int = 1 << 20) -> str:
    """SHA-256 of a file, or of a folder's files (sorted by relative path, names included)."""
    import hashlib

    path = Path(path)
    h = hashlib.sha256()
    files = [path] if path.is_file() else sorted(p for p in path.rglob("*") if p.is_file())
    for f in files:
        if f is not path:
            h.update(str(f.relative_to(path)).encode("utf-8") + b"\0")
        with open(f, "rb") as fh:
            for block in iter(lambda: fh.read(chunk), b""):
                h.update(block)
    return h.hexdigest()
