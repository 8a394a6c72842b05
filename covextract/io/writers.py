"""Atomic writers, and the commit of a whole output set as one unit.

A single file is written to a temporary file in its own folder, fsynced and
renamed over the final name (:func:`atomic_write`): an interrupted run leaves
the previous file intact.

A set of outputs (table, codebook, panel folder, manifest) is written by a
:class:`Commit`: inside :meth:`Commit.staging` every atomic write stops
before its rename and is recorded instead; the panel folder is written as a
new sibling folder. :meth:`Commit.commit` then writes a journal of the
renames into the state folder, performs them in the order staged (the
manifest last) and removes the journal. A crash before the journal leaves
the old set (the temporaries are removed by the next run); a crash after it
is completed by :func:`recover_commit`, which the next run or refresh calls
under the state lock before anything else. DEVELOPERS.md, "Committing the
outputs", describes the scheme.

Write failures a user can fix (full disk, quota, permissions, read-only file
system) are raised as :class:`WriteFailedError`, one line saying what to do.
"""

from __future__ import annotations

import contextlib
import contextvars
import ctypes
import errno as errno_mod
import json
import os
import secrets
import shutil
import string
import tempfile
from collections.abc import Callable
from pathlib import Path

from covextract.crashpoints import crash_point
from covextract.errors import OutputError

__all__ = [
    "COMMIT_JOURNAL",
    "Commit",
    "DISK_ERRNOS",
    "WriteFailedError",
    "atomic_write",
    "atomic_write_bytes",
    "atomic_write_text",
    "disk_reason",
    "fsync_dir",
    "recover_commit",
    "swap_folder",
]

#: Name of the commit journal in the state folder.
COMMIT_JOURNAL = "commit.json"

#: errno -> (what happened, what to do). Other errors are not the user's to fix.
DISK_ERRNOS = {
    errno_mod.ENOSPC: ("the disk is full", "free space or choose another {where}"),
    errno_mod.EDQUOT: ("the disk quota is used up", "free space or choose another {where}"),
    errno_mod.EACCES: ("permission denied", "get write permission or choose another {where}"),
    errno_mod.EPERM: ("permission denied", "get write permission or choose another {where}"),
    errno_mod.EROFS: ("the file system is read-only", "choose another {where}"),
}

_STAGE: contextvars.ContextVar = contextvars.ContextVar("covextract_stage", default=None)


def disk_reason(exc: OSError, where: str = "output folder") -> tuple[str, str] | None:
    """``(what happened (strerror), what to do)`` for a write error a user can fix, else None."""
    known = DISK_ERRNOS.get(getattr(exc, "errno", None))
    if known is None:
        return None
    text = exc.strerror or os.strerror(exc.errno)
    return f"{known[0]} ({text})", known[1].format(where=where)


class WriteFailedError(OutputError):
    """A file could not be written: full disk, quota, permission or read-only file system.

    ``path`` is the file, ``errno`` the system's error number. The message
    names the file as the caller shows it (:meth:`shown_as`).
    """

    def __init__(self, path, exc: OSError, *, shown=None, intact=True, where=None):
        self.path = Path(path)
        self.errno = exc.errno
        self.strerror = exc.strerror
        self.intact = intact
        self.cause = exc
        where = where or "output folder"
        reason, todo = disk_reason(exc, where) or (str(exc), f"choose another {where}")
        tail = (
            "the previous outputs are intact"
            if intact
            else "the next run or refresh completes the interrupted commit"
        )
        super().__init__(self.errno, f"cannot write {shown or self.path}: {reason}; {todo}; {tail}")

    def __str__(self) -> str:
        return self.args[1]

    def shown_as(self, shown: str, where: str | None = None) -> WriteFailedError:
        """The same error naming the file as ``shown`` (``where``: the folder's name)."""
        return WriteFailedError(self.path, self.cause, shown=shown, intact=self.intact, where=where)


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def fsync_dir(folder: Path) -> None:
    """Make the renames in a folder survive a power loss (fsync, best effort)."""
    with contextlib.suppress(OSError):
        fd = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def atomic_write(path, write: Callable[[Path], None], *, durable: bool = True) -> Path:
    """Write ``path`` atomically by calling ``write(tmp_path)``.

    Inside :meth:`Commit.staging` the complete temporary file is recorded in
    the commit instead of being renamed (the commit renames it).

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

    Raises
    ------
    WriteFailedError
        The disk is full, the quota used up, or the folder not writable.
    """
    path = Path(path)
    stage = _STAGE.get()
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        if disk_reason(exc) is not None:
            raise WriteFailedError(path, exc) from None
        raise OutputError(f"cannot create the output folder {path.parent}: {exc}") from exc
    tmp_path = None
    try:
        fd, tmp = tempfile.mkstemp(
            prefix=f".{path.name}.", suffix=f".tmp{path.suffix}", dir=path.parent
        )
        os.close(fd)
        tmp_path = Path(tmp)
        write(tmp_path)
        if durable or stage is not None:
            with open(tmp_path, "rb+") as fh:
                os.fsync(fh.fileno())
        # mkstemp creates 0600; give the file the mode a plain open() would (umask)
        os.chmod(tmp_path, 0o666 & ~_umask())
        if stage is not None:
            stage.add_file(tmp_path, path)
            return path
        crash_point(f"before_rename:{path.name}")
        os.replace(tmp_path, path)
    except BaseException as exc:
        if tmp_path is not None:
            with contextlib.suppress(OSError):
                tmp_path.unlink()
        if isinstance(exc, OSError) and not isinstance(exc, OutputError):
            if disk_reason(exc) is not None:
                raise WriteFailedError(path, exc) from None
        raise
    if durable:
        fsync_dir(path.parent)
    return path


def atomic_write_bytes(path, data: bytes, *, durable: bool = True) -> Path:
    """Write bytes atomically (see :func:`atomic_write` for ``durable``)."""
    return atomic_write(path, lambda p: p.write_bytes(data), durable=durable)


def atomic_write_text(path, text: str) -> Path:
    """Write UTF-8 text atomically (the text's own line endings are kept)."""
    return atomic_write_bytes(path, text.encode("utf-8"))


# ---------------------------------------------------------------- folders
_RENAME_EXCHANGE = 2  # linux/fs.h
_AT_FDCWD = -100


def _exchange(a: Path, b: Path) -> bool:
    """Swap two paths atomically (Linux ``renameat2(RENAME_EXCHANGE)``); False if unsupported."""
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        fn = libc.renameat2
    except (OSError, AttributeError):
        return False
    fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
    rc = fn(_AT_FDCWD, os.fsencode(a), _AT_FDCWD, os.fsencode(b), _RENAME_EXCHANGE)
    if rc == 0:
        return True
    err = ctypes.get_errno()
    if err in (errno_mod.EINVAL, errno_mod.ENOSYS, errno_mod.EOPNOTSUPP, errno_mod.ENOTSUP):
        return False  # this file system cannot swap: fall back to two renames
    raise OSError(err, os.strerror(err), str(b))


def _token() -> str:
    return "".join(secrets.choice(string.ascii_letters + string.digits) for _ in range(8))


def swap_folder(new: Path, final: Path, ino: int) -> None:
    """Make ``new`` (inode ``ino``) the folder ``final``; remove the old one. Idempotent.

    One atomic swap where the file system allows it (readers always see a
    complete folder at ``final``); otherwise ``final`` is renamed aside and
    ``new`` into place, and a crash between the two is completed by
    :func:`recover_commit`.
    """
    new, final = Path(new), Path(final)
    old = final.with_name(f".{final.name}.{new.name.split('.')[-2]}.old")
    done = final.is_dir() and not final.is_symlink() and final.stat().st_ino == ino
    if not done:
        if not final.exists() and not final.is_symlink():
            os.rename(new, final)
        elif final.is_dir() and not final.is_symlink() and _exchange(new, final):
            os.rename(new, old)  # after the swap ``new`` holds the previous folder
        else:
            if final.is_dir() and not final.is_symlink():
                os.rename(final, old)
            else:
                os.unlink(final)
            os.rename(new, final)
        fsync_dir(final.parent)
    for leftover in (old, new):
        if leftover.is_dir() and not leftover.is_symlink():
            shutil.rmtree(leftover, ignore_errors=True)


# ---------------------------------------------------------------- commit
class Commit:
    """Stage files and folders, then rename them into place as one unit, journal first.

    Parameters
    ----------
    journal : Path
        Where the journal goes (``<state folder>/commit.json``).
    """

    def __init__(self, journal) -> None:
        self.journal = Path(journal)
        self.entries: list[dict] = []  # in rename order
        self.staged: dict = {}  # final path -> staged path (files)
        self.started = False

    @contextlib.contextmanager
    def staging(self):
        """Within this block :func:`atomic_write` stages its file into this commit."""
        token = _STAGE.set(self)
        try:
            yield self
        finally:
            _STAGE.reset(token)

    def add_file(self, tmp: Path, final: Path) -> None:
        """Record a complete temporary file to rename over ``final``."""
        final = Path(final)
        old = self.staged.get(final)
        if old is not None:  # written twice in one commit: the later content wins
            with contextlib.suppress(OSError):
                Path(old).unlink()
            self.entries = [e for e in self.entries if Path(e["final"]) != final]
        self.staged[final] = Path(tmp)
        self.entries.append({"kind": "file", "tmp": str(tmp), "final": str(final)})

    def stage_folder(self, final) -> Path:
        """A new empty folder beside ``final``, to become ``final`` at the commit."""
        final = Path(final)
        final.parent.mkdir(parents=True, exist_ok=True)
        tmp = final.with_name(f".{final.name}.{_token()}.tmp")
        tmp.mkdir()
        self.entries.append(
            {"kind": "folder", "tmp": str(tmp), "final": str(final), "ino": tmp.stat().st_ino}
        )
        return tmp

    def staged_path(self, final) -> Path:
        """Where the new content of ``final`` is until the commit."""
        return self.staged.get(Path(final), Path(final))

    def abort(self) -> None:
        """Remove every staged file and folder (before :meth:`commit` started)."""
        for e in self.entries:
            p = Path(e["tmp"])
            with contextlib.suppress(OSError):
                if e["kind"] == "folder":
                    shutil.rmtree(p)
                else:
                    p.unlink()
        self.entries, self.staged = [], {}

    def commit(self, owned: list | None = None) -> None:
        """Write the journal, rename everything in order (the last entry last), drop the journal.

        ``owned`` lists ``{"path", "sha256"}`` of every file of the new set, so
        a guard can recognise them while the commit is pending.
        """
        doc = {"journal_version": 1, "entries": self.entries, "owned": owned or []}
        with contextlib.suppress(OSError):
            self.journal.parent.mkdir(parents=True, exist_ok=True)
        atomic_write_text(self.journal, json.dumps(doc, indent=1) + "\n")
        self.started = True
        crash_point("after_journal")
        _apply(self.entries)
        with contextlib.suppress(FileNotFoundError):
            self.journal.unlink()
        fsync_dir(self.journal.parent)


def _apply(entries: list[dict]) -> None:
    """Perform (or complete) a journal's renames; the last once the others are durable."""
    for i, e in enumerate(entries):
        tmp, final = Path(e["tmp"]), Path(e["final"])
        if i == len(entries) - 1:
            for folder in {Path(x["final"]).parent for x in entries[:-1]}:
                fsync_dir(folder)
        crash_point(f"before_rename:{final.name}")
        if e["kind"] == "folder":
            swap_folder(tmp, final, e["ino"])
        elif tmp.exists():
            os.replace(tmp, final)
    if entries:
        fsync_dir(Path(entries[-1]["final"]).parent)


def read_journal(state_folder) -> dict | None:
    """The pending commit journal of a state folder, or None."""
    path = Path(state_folder) / COMMIT_JOURNAL
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return doc if isinstance(doc, dict) and isinstance(doc.get("entries"), list) else None


def recover_commit(state_folder) -> bool:
    """Complete a commit that a killed run left half done (call with the state lock held).

    Returns True when there was one. The journal is written only once every
    staged file is complete, so completing its renames gives the new set.
    """
    doc = read_journal(state_folder)
    if doc is None:
        return False
    _apply(doc["entries"])
    with contextlib.suppress(FileNotFoundError):
        (Path(state_folder) / COMMIT_JOURNAL).unlink()
    return True
