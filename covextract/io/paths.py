"""Paths as they may appear in files meant for sharing: no local folder names."""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

__all__ = ["shareable_path", "file_sha256", "inside"]


def file_sha256(path, *, chunk: int = 1 << 20) -> str:
    """SHA-256 of a file's bytes (for a folder: of its files, sorted by name)."""
    path = Path(path)
    h = hashlib.sha256()
    files = sorted(p for p in path.rglob("*") if p.is_file()) if path.is_dir() else [path]
    for f in files:
        if path.is_dir():
            h.update(str(f.relative_to(path)).encode())
        with open(f, "rb") as fh:
            while block := fh.read(chunk):
                h.update(block)
    return h.hexdigest()


def inside(path, base_dir) -> bool:
    """True when ``path`` lies inside ``base_dir`` (after resolving links)."""
    try:
        rel = os.path.relpath(Path(path).resolve(), Path(base_dir).resolve())
    except ValueError:  # another drive on Windows
        return False
    return not rel.startswith("..")


def shareable_path(path, base_dir, *, sha256=None) -> str:
    """``path`` relative to ``base_dir`` (the recipe's folder), with ``/`` separators.

    A file outside that folder is given by its name and content hash
    (``rain.tif (sha256 1a2b3c4d5e6f)``), which tells two same-named files
    apart without revealing where they are. ``sha256`` may pass a hash
    already known; otherwise the file is read.
    """
    path = Path(path)
    if inside(path, base_dir):
        return Path(os.path.relpath(path.resolve(), Path(base_dir).resolve())).as_posix()
    if sha256 is None:
        sha256 = file_sha256(path) if path.exists() else "missing"
    return f"{path.name} (sha256 {sha256[:12]})"


def symlink_loop(path: Path) -> bool:
    """True when resolving ``path`` runs in a circle (``Path.exists`` only says False)."""
    import errno

    try:
        Path(path).resolve(strict=True)
    except RuntimeError:  # Python < 3.13 raises RuntimeError for a loop
        return True
    except OSError as exc:
        return exc.errno == errno.ELOOP
    return False
