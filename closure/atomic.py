"""Atomic file writes: a temporary file in the target folder, fsynced, then renamed into place.

A reader never sees a half-written file, and a failed write leaves the old file (or none).
The result gets the permissions an ordinary ``open()`` would give (0666 less the umask), not
the 0600 of a bare ``mkstemp``.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def ordinary_mode(path: str | os.PathLike) -> None:
    """Give ``path`` the mode an ordinary ``open()`` would (0666 less the umask), instead of
    the 0600 that ``mkstemp`` leaves on a temporary file written in place by a library."""
    os.chmod(path, 0o666 & ~_umask())


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; on success it is renamed to ``path``.

    The caller writes the whole file to the yielded path (by any library); on an exception the
    temporary file is removed and ``path`` is left untouched.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    os.close(fd)
    try:
        yield Path(tmp)
        ordinary_mode(tmp)
        with open(tmp, "rb") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    finally:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)


def write_bytes(path: str | os.PathLike, data: bytes) -> Path:
    """Write ``data`` to ``path`` atomically."""
    with atomic_path(path) as tmp:
        tmp.write_bytes(data)
    return Path(path)


def write_text(path: str | os.PathLike, text: str) -> Path:
    """Write UTF-8 ``text`` to ``path`` atomically."""
    return write_bytes(path, text.encode("utf-8"))
