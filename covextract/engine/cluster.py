"""Connecting to an existing dask.distributed cluster for the block tasks.

Workers must see the same file paths as the machine that submits the run
(a shared file system, or the same folders mounted everywhere). Unit
geometries — confidential locations — travel to the workers with the
weights, so a scheduler on another machine gets a warning.
"""

from __future__ import annotations

import contextlib
import socket
import struct
import time
import warnings
from urllib.parse import urlparse

from covextract.errors import RemoteSchedulerWarning, SchedulerError

__all__ = ["connect", "is_local_address"]

#: Seconds to wait for a scheduler before giving up.
CONNECT_TIMEOUT = 5.0


def is_local_address(address: str) -> bool:
    """True when the scheduler address names this machine."""
    host = urlparse(address if "://" in address else f"tcp://{address}").hostname or ""
    if host in ("localhost", "") or host.startswith("127.") or host == "::1":
        return True
    with contextlib.suppress(OSError):
        mine = {socket.gethostname(), socket.getfqdn()}
        mine |= {info[4][0] for info in socket.getaddrinfo(socket.gethostname(), None)}
        if host in mine:
            return True
    return False


def connect(address: str, *, timeout: float = CONNECT_TIMEOUT):
    """A ``distributed.Client`` for ``address`` (``tcp://HOST:PORT``).

    Raises
    ------
    SchedulerError
        The scheduler cannot be reached within ``timeout`` seconds.
    """
    try:
        from distributed import Client
    except ImportError as exc:  # pragma: no cover - distributed is a dependency
        raise SchedulerError(
            "running on a cluster needs dask.distributed: pip install distributed"
        ) from exc
    if not is_local_address(address):
        warnings.warn(
            f"the dask scheduler {address} is not on this machine: unit geometries "
            "(confidential locations) and raster paths will be sent to it and its workers. "
            "Make sure this is allowed by the study's data-protection rules.",
            RemoteSchedulerWarning,
            stacklevel=2,
        )
    _check_answers_as_scheduler(address, timeout)
    try:
        return Client(address, timeout=timeout, set_as_default=False)
    except (MemoryError, ValueError) as exc:
        # A reply that is not dask's framing is read as a huge frame length.
        raise SchedulerError(_not_a_scheduler(address, timeout, type(exc).__name__)) from None
    except (OSError, TimeoutError) as exc:
        raise SchedulerError(
            f"cannot reach the dask scheduler at {address} within {timeout:g} s ({exc}). "
            "Check that it is running and the address (tcp://HOST:PORT), or run without "
            "--scheduler to use local threads."
        ) from exc


#: Largest first message a scheduler's handshake may take (it is a few hundred bytes).
_MAX_HANDSHAKE_BYTES = 1 << 20


def _not_a_scheduler(address: str, timeout: float, why: str) -> str:
    return (
        f"could not connect to the dask scheduler at {address} within {timeout:g} s: it did "
        f"not answer as a dask scheduler ({why}). Check the address and port (a dask "
        "scheduler listens on tcp://HOST:8786 by default; 8787 is its dashboard), or run "
        "without --scheduler to use local threads."
    )


def _read_exactly(sock, n: int, deadline: float) -> bytes:
    data = b""
    while len(data) < n:
        left = deadline - time.monotonic()
        if left <= 0:
            raise TimeoutError
        sock.settimeout(left)
        chunk = sock.recv(min(n - len(data), 65536))
        if not chunk:
            raise ConnectionResetError("the connection was closed")
        data += chunk
    return data


def _check_answers_as_scheduler(address: str, timeout: float) -> None:
    """Refuse, within ``timeout``, an address where something else than dask answers.

    A dask scheduler sends its handshake as soon as a client connects: an
    8-byte length, then the frames (a count and one length per frame, then
    the frames themselves). ``distributed`` trusts that length and tries to
    allocate it, so a web server's ``HTTP/1.1`` (read as 3 EiB) ends in a
    MemoryError, and a silent server in a hang at close. Reading the first
    bytes here, with a deadline, gives one clear message instead. Only plain
    ``tcp://`` addresses are checked; TLS and other transports go straight
    to ``distributed``.
    """
    parsed = urlparse(address if "://" in address else f"tcp://{address}")
    if parsed.scheme != "tcp" or parsed.hostname is None or parsed.port is None:
        return
    deadline = time.monotonic() + timeout
    try:
        sock = socket.create_connection((parsed.hostname, parsed.port), timeout=timeout)
    except OSError:
        return  # nothing listens: distributed's own retry and message apply
    try:
        first = _read_exactly(sock, 8, deadline)
        (total,) = struct.unpack("<Q", first)
        if not 16 <= total <= _MAX_HANDSHAKE_BYTES:
            raise ValueError(f"its first bytes {first!r} are not a dask handshake")
        body = _read_exactly(sock, total, deadline)
        (n_frames,) = struct.unpack_from("<Q", body)
        if not 1 <= n_frames <= 64 or 8 * (1 + n_frames) > total:
            raise ValueError("its first message is not framed as dask frames")
        sizes = struct.unpack_from(f"<{n_frames}Q", body, 8)
        if 8 * (1 + n_frames) + sum(sizes) != total:
            raise ValueError("its first message is not framed as dask frames")
    except TimeoutError:
        raise SchedulerError(
            _not_a_scheduler(address, timeout, "it accepted the connection but sent nothing")
        ) from None
    except (OSError, ValueError, struct.error) as exc:
        raise SchedulerError(_not_a_scheduler(address, timeout, str(exc))) from None
    finally:
        sock.close()
