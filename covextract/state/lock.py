"""One refresh at a time: an exclusive ``flock`` on ``<state folder>/refresh.lock``.

A scheduled refresh may start while the previous one is still running (a slow
month, a cron line that fires twice). :class:`StateLock` lets only one of them
write: the second finds the lock taken and raises :class:`LockedError`, which
the command line turns into :data:`EXIT_CODES` ``["locked"]``.

Conventions
-----------
- The lock is ``flock(LOCK_EX | LOCK_NB)`` on an open file (flock(2), common
  practice): the kernel drops it when the holder closes the file or dies,
  including on ``kill -9``, so a stale lock file never blocks the next run and
  must not be deleted by hand.
- The holder writes its pid and start time (UTC, ISO 8601) into the file so
  that the refused run can say who holds it. The file itself is never removed:
  removing a flock'ed file lets a third process lock a new file of the same
  name while the second still waits on the old one.
- flock and SQLite locking are unreliable on network file systems (NFS, SMB,
  sshfs); a state folder on one gets a :class:`NetworkFileSystemWarning`.
"""

from __future__ import annotations

import datetime as dt
import fcntl
import os
import warnings
from pathlib import Path

from covextract.errors import CovextractError, CovextractWarning, OutputError

__all__ = [
    "EXIT_CODES",
    "LOCK_NAME",
    "LockedError",
    "NETWORK_FILESYSTEMS",
    "NetworkFileSystemWarning",
    "StateLock",
    "network_filesystem",
]

EXIT_CODES = {"success": 0, "nothing_to_do": 3, "partial": 4, "locked": 5, "error": 1}
"""Exit status of a refresh, for monitoring (cron mail, systemd, a wrapper script).

- ``success`` (0): every period that was due has been computed.
- ``nothing_to_do`` (3): nothing new since the last run; outputs untouched.
- ``partial`` (4): some periods were computed, some expected inputs are missing.
- ``locked`` (5): another run holds the lock; this one did nothing.
- ``error`` (1): the run failed; the previous outputs are intact.

2 is left out on purpose: typer (through click) exits with 2 on a usage error.
"""

LOCK_NAME = "refresh.lock"
"""File name of the lock inside the state folder."""

NETWORK_FILESYSTEMS = frozenset(
    {"nfs", "nfs4", "cifs", "smb3", "smbfs", "sshfs", "fuse.sshfs", "9p"}
)
"""File-system types (third field of ``/proc/mounts``) treated as network file systems."""


class LockedError(CovextractError, BlockingIOError):
    """Another process holds the refresh lock of this state folder.

    Attributes
    ----------
    lock_path : pathlib.Path
        The lock file.
    holder_pid : int or None
        Pid written by the holder, None if it could not be read.
    holder_started : str or None
        Start time written by the holder (UTC, ISO 8601), None if unknown.
    """

    def __init__(
        self,
        message: str,
        *,
        lock_path: Path,
        holder_pid: int | None = None,
        holder_started: str | None = None,
    ) -> None:
        super().__init__(message)
        self.lock_path = lock_path
        self.holder_pid = holder_pid
        self.holder_started = holder_started

    def __str__(self) -> str:
        # OSError.__str__ would format a one-argument error fine, but be explicit
        return str(self.args[0])


class NetworkFileSystemWarning(CovextractWarning):
    """The state folder is on a network file system, where flock and SQLite locks are unreliable."""


def _unescape_mount(field: str) -> str:
    # /proc/mounts writes space, tab, newline and backslash as octal escapes (\040 ...)
    out, i = [], 0
    while i < len(field):
        code = field[i + 1 : i + 4]
        if field[i] == "\\" and len(code) == 3 and all(c in "01234567" for c in code):
            out.append(chr(int(code, 8)))
            i += 4
        else:
            out.append(field[i])
            i += 1
    return "".join(out)


def network_filesystem(folder, *, mounts_file="/proc/mounts") -> str | None:
    """Return the network file-system type ``folder`` lives on, or None.

    Parameters
    ----------
    folder : str or Path
        A folder (resolved, symlinks followed, before matching).
    mounts_file : str or Path
        The mount table, in the format of ``/proc/mounts`` (device, mount
        point, type, ...). Where it does not exist (not Linux) the answer is
        None.

    Returns
    -------
    str or None
        The type of the mount with the longest mount point containing
        ``folder`` if it is in :data:`NETWORK_FILESYSTEMS`, else None.
    """
    try:
        lines = Path(mounts_file).read_text(encoding="utf-8", errors="replace").splitlines()
    except OSError:
        return None
    target = Path(folder).resolve()
    best: tuple[int, str] | None = None
    for line in lines:
        fields = line.split()
        if len(fields) < 3:
            continue
        mount_point = Path(_unescape_mount(fields[1]))
        if target != mount_point and mount_point not in target.parents:
            continue
        depth = len(mount_point.parts)
        # later lines win on equal depth: a mount stacked on the same point hides the earlier one
        if best is None or depth >= best[0]:
            best = (depth, fields[2])
    if best is None:
        return None
    return best[1] if best[1] in NETWORK_FILESYSTEMS else None


class StateLock:
    """Exclusive, non-blocking lock of a state folder, as a context manager.

    Parameters
    ----------
    state_folder : str or Path
        The folder holding the ledger; created if missing. The lock file is
        ``state_folder / "refresh.lock"``.
    mounts_file : str or Path
        Mount table used to detect a network file system (tests pass a fake).

    Raises
    ------
    LockedError
        On entry, when another process holds the lock.
    covextract.errors.OutputError
        On entry, when the folder or the lock file cannot be created.

    Warns
    -----
    NetworkFileSystemWarning
        On entry, when the state folder is on a network file system.

    Examples
    --------
    >>> with StateLock(state):  # doctest: +SKIP
    ...     run_the_refresh()
    """

    def __init__(self, state_folder, *, mounts_file="/proc/mounts") -> None:
        self.folder = Path(state_folder)
        self.path = self.folder / LOCK_NAME
        self._mounts_file = mounts_file
        self._fd: int | None = None

    @property
    def held(self) -> bool:
        """Whether this object currently holds the lock."""
        return self._fd is not None

    def acquire(self) -> None:
        """Take the lock (see the class docstring); ``release`` or leave the ``with`` to drop it."""
        self._acquire(stacklevel=3)

    def _acquire(self, stacklevel: int) -> None:
        if self._fd is not None:
            raise RuntimeError(f"this StateLock already holds {self.path}")
        try:
            self.folder.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise OutputError(
                f"cannot create the state folder {self.folder}: {exc}; "
                "check the path and its permissions"
            ) from exc
        fs_type = network_filesystem(self.folder, mounts_file=self._mounts_file)
        if fs_type is not None:
            warnings.warn(
                f"the state folder {self.folder} is on a network file system ({fs_type}); "
                "file locks and SQLite are unreliable there, so two runs may both write: "
                "keep the state folder on a local disk",
                NetworkFileSystemWarning,
                stacklevel=stacklevel,
            )
        try:
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o666)
        except OSError as exc:
            raise OutputError(
                f"cannot create the lock file {self.path}: {exc}; "
                "check that the state folder is writable"
            ) from exc
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            try:
                text = os.pread(fd, 4096, 0).decode("utf-8", errors="replace")
            finally:
                os.close(fd)
            raise self._locked_error(text) from None
        except OSError as exc:
            os.close(fd)
            raise OutputError(f"cannot lock {self.path}: {exc}") from exc
        started = dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds")
        # truncate only once locked: the previous holder's text must stay readable until then
        os.ftruncate(fd, 0)
        os.pwrite(fd, f"pid={os.getpid()}\nstarted={started}\n".encode(), 0)
        self._fd = fd

    def _locked_error(self, text: str) -> LockedError:
        info = dict(line.split("=", 1) for line in text.splitlines() if "=" in line)
        pid = int(info["pid"]) if info.get("pid", "").strip().isdigit() else None
        started = info.get("started") or None
        who = f"pid {pid}" if pid is not None else "pid not yet written"
        since = f", started {started}" if started else ""
        message = (
            f"another covextract run holds the lock {self.path} ({who}{since}); "
            "this run did nothing. Wait for that run to finish, or stop it if it hangs"
            + (f" (kill {pid})" if pid is not None else "")
            + "; the lock is freed as soon as that process ends, so do not delete the file"
        )
        return LockedError(message, lock_path=self.path, holder_pid=pid, holder_started=started)

    def release(self) -> None:
        """Drop the lock; does nothing if it is not held."""
        if self._fd is None:
            return
        fd, self._fd = self._fd, None
        try:
            os.ftruncate(fd, 0)
            fcntl.flock(fd, fcntl.LOCK_UN)
        finally:
            os.close(fd)

    def __enter__(self) -> StateLock:
        self._acquire(stacklevel=3)
        return self

    def __exit__(self, *exc_info) -> None:
        self.release()
