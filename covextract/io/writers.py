"""Atomic writers: a temporary file in the target folder, fsync, ``os.replace``.

An interrupted run leaves the previous file intact: the new content only
appears under the final name once it is complete on disk.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from collections.abc import Callable
from pathlib import Path

from covextract.crashpoints import crash_point
from covextract.errors import OutputError

__all__ = ["atomic_write", "atomic_write_text", "atomic_write_bytes"]


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def _fsync_dir(folder: Path) -> None:
    with contextlib.suppress(OSError):
        fd = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def atomic_write(path, write: Callable[[Path], None], *, durable: bool = True) -> Path:
    """Write ``path`` atomically by calling ``write(tmp_path)``.

    Parameters
    ----------
    path : str or Path
        Final destination; its folder is created if needed.
    write : callable
        Writes the complete content to the temporary path it is given.
    durable : bool
        fsync the file and its folder, so the new content survives a power
        loss. Files that can be recomputed and are checked when read (the
        state folder's pieces) skip it: the rename is still atomic.
    """
    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create the output folder {path.parent}: {exc}") from exc
    fd, tmp = tempfile.mkstemp(
        prefix=f".{path.name}.", suffix=f".tmp{path.suffix}", dir=path.parent
    )
    os.close(fd)
    tmp_path = Path(tmp)
    try:
        write(tmp_path)
        if durable:
            with open(tmp_path, "rb+") as fh:
                os.fsync(fh.fileno())
        # mkstemp creates 0600; give the file the mode a plain open() would (umask)
        os.chmod(tmp_path, 0o666 & ~_umask())
        crash_point(f"before_rename:{path.name}")
        os.replace(tmp_path, path)
    except BaseException:
        with contextlib.suppress(OSError):
            tmp_path.unlink()
        raise
    if durable:
        _fsync_dir(path.parent)
    return path


def atomic_write_bytes(path, data: bytes, *, durable: bool = True) -> Path:
    """Write bytes atomically (see :func:`atomic_write` for ``durable``)."""
    return atomic_write(path, lambda p: p.write_bytes(data), durable=durable)


def atomic_write_text(path, text: str) -> Path:
    """Write UTF-8 text atomically (the text's own line endings are kept)."""
    return atomic_write_bytes(path, text.encode("utf-8"))
