"""The refresh lock: exclusive across processes, freed on release and on kill -9.

flock facts relied on here are from flock(2) (common practice): the lock
belongs to the open file description and the kernel drops it when the last
descriptor closes, which includes the death of the process.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import warnings
from pathlib import Path

import pytest

from covextract.errors import CovextractError, CovextractWarning
from covextract.state.lock import (
    EXIT_CODES,
    LockedError,
    NetworkFileSystemWarning,
    StateLock,
    network_filesystem,
)

REPO = Path(__file__).resolve().parents[2]

# A second process tries the lock; exit status tells the test what happened.
TRY_LOCK = """
import sys
from covextract.state.lock import LockedError, StateLock
try:
    with StateLock(sys.argv[1], mounts_file=sys.argv[2]):
        print("acquired", flush=True)
except LockedError as exc:
    print(str(exc), flush=True)
    print("pid", exc.holder_pid, flush=True)
    sys.exit(5)
"""

HOLD_LOCK = """
import sys, time
from covextract.state.lock import StateLock
lock = StateLock(sys.argv[1], mounts_file=sys.argv[2])
lock.acquire()
print("locked", flush=True)
time.sleep(120)
"""


@pytest.fixture
def local_mounts(tmp_path):
    """A mount table that puts everything on a local ext4 root."""
    path = tmp_path / "mounts"
    path.write_text("/dev/sda1 / ext4 rw,relatime 0 0\n", encoding="utf-8")
    return path


def _env():
    env = dict(os.environ)
    env["PYTHONPATH"] = str(REPO) + os.pathsep + env.get("PYTHONPATH", "")
    return env


def _try_lock(state, mounts):
    return subprocess.run(
        [sys.executable, "-c", TRY_LOCK, str(state), str(mounts)],
        capture_output=True,
        text=True,
        env=_env(),
        timeout=60,
    )


def test_second_process_is_refused_while_held_then_gets_it(tmp_path, local_mounts):
    state = tmp_path / "state" / "nested"
    with StateLock(state, mounts_file=local_mounts) as lock:
        assert lock.held
        assert (state / "refresh.lock").is_file()
        refused = _try_lock(state, local_mounts)
        assert refused.returncode == EXIT_CODES["locked"], refused.stderr
        assert str(state / "refresh.lock") in refused.stdout
        assert f"pid {os.getpid()}" in refused.stdout
        assert "started 20" in refused.stdout
        assert "wait for that run to finish" in refused.stdout.lower()
        assert f"pid {os.getpid()}\n" in refused.stdout  # holder_pid attribute
    assert not lock.held
    after = _try_lock(state, local_mounts)
    assert after.returncode == 0, after.stdout + after.stderr
    assert after.stdout.strip() == "acquired"


def test_locked_error_in_process_has_attributes(tmp_path, local_mounts):
    with StateLock(tmp_path, mounts_file=local_mounts):
        second = StateLock(tmp_path, mounts_file=local_mounts)
        with pytest.raises(LockedError) as info:
            second.acquire()
    err = info.value
    assert isinstance(err, CovextractError)
    assert isinstance(err, BlockingIOError)
    assert err.lock_path == tmp_path / "refresh.lock"
    assert err.holder_pid == os.getpid()
    assert err.holder_started is not None and err.holder_started.endswith("+00:00")
    assert not second.held
    # released on exit: a fresh lock succeeds in this process too
    with StateLock(tmp_path, mounts_file=local_mounts) as again:
        assert again.held


def test_release_is_idempotent_and_double_acquire_refused(tmp_path, local_mounts):
    lock = StateLock(tmp_path, mounts_file=local_mounts)
    lock.acquire()
    with pytest.raises(RuntimeError, match="already holds"):
        lock.acquire()
    lock.release()
    lock.release()
    assert not lock.held
    assert (tmp_path / "refresh.lock").read_text() == ""


def test_killed_holder_leaves_the_lock_free(tmp_path, local_mounts):
    state = tmp_path / "state"
    holder = subprocess.Popen(
        [sys.executable, "-c", HOLD_LOCK, str(state), str(local_mounts)],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        env=_env(),
    )
    try:
        assert holder.stdout.readline().strip() == "locked"
        refused = _try_lock(state, local_mounts)
        assert refused.returncode == EXIT_CODES["locked"]
        assert f"pid {holder.pid}" in refused.stdout
        holder.send_signal(signal.SIGKILL)
        holder.wait(timeout=30)
    finally:
        if holder.poll() is None:
            holder.kill()
            holder.wait()
        holder.stdout.close()
        holder.stderr.close()
    assert holder.returncode == -signal.SIGKILL
    # the dead holder's text is still in the file; the lock itself is free
    assert f"pid={holder.pid}" in (state / "refresh.lock").read_text()
    with StateLock(state, mounts_file=local_mounts) as lock:
        assert lock.held
        assert f"pid={os.getpid()}" in (state / "refresh.lock").read_text()


def test_exit_codes_avoid_two_and_are_distinct():
    assert set(EXIT_CODES) == {"success", "nothing_to_do", "partial", "locked", "error"}
    assert EXIT_CODES["success"] == 0
    assert 2 not in EXIT_CODES.values()
    assert len(set(EXIT_CODES.values())) == len(EXIT_CODES)


def _fake_mounts(tmp_path, lines):
    path = tmp_path / "fake_mounts"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def test_network_filesystem_longest_prefix(tmp_path):
    root = tmp_path.resolve()
    share = root / "share"
    (share / "local_inside" / "state").mkdir(parents=True)
    (root / "shared").mkdir()
    mounts = _fake_mounts(
        tmp_path,
        [
            "/dev/sda1 / ext4 rw 0 0",
            f"server:/export {share} nfs4 rw 0 0",
            f"/dev/sdb1 {share / 'local_inside'} xfs rw 0 0",
        ],
    )
    assert network_filesystem(share, mounts_file=mounts) == "nfs4"
    assert network_filesystem(share / "local_inside" / "state", mounts_file=mounts) is None
    # "/x/shared" is not inside the mount "/x/share": prefixes match whole path parts
    assert network_filesystem(root / "shared", mounts_file=mounts) is None
    assert network_filesystem(root, mounts_file=tmp_path / "no_such_file") is None


@pytest.mark.parametrize("fs_type", ["nfs", "cifs", "smb3", "smbfs", "fuse.sshfs", "sshfs", "9p"])
def test_network_filesystem_types(tmp_path, fs_type):
    mounts = _fake_mounts(
        tmp_path, ["/dev/sda1 / ext4 rw 0 0", f"remote {tmp_path} {fs_type} rw 0 0"]
    )
    assert network_filesystem(tmp_path / "state", mounts_file=mounts) == fs_type


def test_network_filesystem_unescapes_mount_points(tmp_path):
    folder = tmp_path / "lake site"
    folder.mkdir()
    escaped = str(folder.resolve()).replace(" ", "\\040")
    mounts = _fake_mounts(tmp_path, ["/dev/sda1 / ext4 rw 0 0", f"srv:/x {escaped} nfs rw 0 0"])
    assert network_filesystem(folder, mounts_file=mounts) == "nfs"


def test_state_lock_warns_on_network_folder(tmp_path):
    state = tmp_path / "state"
    mounts = _fake_mounts(
        tmp_path, ["/dev/sda1 / ext4 rw 0 0", f"srv:/x {tmp_path.resolve()} nfs rw 0 0"]
    )
    with pytest.warns(NetworkFileSystemWarning, match="network file system") as record:
        with StateLock(state, mounts_file=mounts) as lock:
            assert lock.held
    assert record[0].filename == __file__  # stacklevel points at the caller
    assert not StateLock(state, mounts_file=mounts).held


def test_state_lock_silent_on_local_folder(tmp_path, local_mounts):
    with warnings.catch_warnings():
        warnings.simplefilter("error", CovextractWarning)
        with StateLock(tmp_path / "state", mounts_file=local_mounts) as lock:
            assert lock.held
