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


def check_writable(path, *, field: str | None = None) -> Path:
    """Refuse an output file that cannot be written, before any work is done.

    Nothing is created: the nearest existing folder on the way to ``path`` must be a
    folder one may write in, and ``path`` itself must not be a folder.

    Parameters
    ----------
    path : str or Path
        The file to be written.
    field : str, optional
        The command-line option that named it, for the message.

    Returns
    -------
    Path

    Raises
    ------
    InputError
        One line naming the file, the option and what is in the way.
    """
    from .errors import InputError

    path = Path(path)
    if path.is_dir():
        raise InputError("is a folder; expected the name of a file to write",
                         source=str(path), field=field)
    folder = path.parent
    while not folder.exists() and folder != folder.parent:
        folder = folder.parent
    if not folder.is_dir():
        raise InputError(f"cannot write here: {folder} is a file, not a folder",
                         source=str(path), field=field)
    if not os.access(folder, os.W_OK | os.X_OK):
        raise InputError(f"cannot write here: no permission to write in {folder}",
                         source=str(path), field=field)
    return path


def write_files_atomic(files) -> list[Path]:
    """Write several files all or nothing.

    Every file is first written to a temporary name beside its target; only when all
    of them are written are they renamed into place. If anything fails, the temporary
    files, any file already renamed and the folders made on the way are removed, so no
    half result is left.

    Parameters
    ----------
    files : iterable of (path, bytes, field)
        Target path, content and the command-line option that named it (or ``None``),
        for the message.

    Returns
    -------
    list of Path
        The written paths, in the order given.

    Raises
    ------
    InputError
        A file cannot be written (a folder in the way, no permission, disk full); the
        message names the file and the option.
    """
    from .errors import InputError

    staged, placed, made = [], [], []
    current = (None, None)
    try:
        for path, data, field in files:
            path = Path(path)
            current = (path, field)
            missing = []
            folder = path.parent
            while not folder.exists() and folder != folder.parent:
                missing.append(folder)
                folder = folder.parent
            path.parent.mkdir(parents=True, exist_ok=True)
            made.extend(reversed(missing))
            fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part",
                                       dir=path.parent)
            staged.append((Path(tmp), path, field))
            with os.fdopen(fd, "wb") as handle:
                handle.write(data)
        for tmp, path, field in staged:
            current = (path, field)
            os.replace(tmp, path)
            placed.append(path)
    except BaseException as exc:
        for tmp, _, _ in staged:
            tmp.unlink(missing_ok=True)
        for path in placed:
            path.unlink(missing_ok=True)
        for folder in reversed(made):      # the folders made here, deepest first
            try:
                folder.rmdir()
            except OSError:
                pass
        if isinstance(exc, OSError):
            path, field = current
            raise InputError(f"cannot write the file: {exc.strerror or exc}",
                             source=str(path), field=field) from None
        raise
    return [path for _, path, _ in staged]


def free_name(path) -> Path:
    """``path``, or ``<stem>_2<suffix>``, ``_3``... : the first name not yet taken.

    For outputs that must never overwrite an earlier run's (the demo's volume); a name
    taken between this call and the write is not guarded against.
    """
    path = Path(path)
    n = 1
    while True:
        candidate = path if n == 1 else path.with_name(f"{path.stem}_{n}{path.suffix}")
        if not candidate.exists():
            return candidate
        n += 1


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
