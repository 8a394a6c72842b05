"""Connecting to an existing dask.distributed cluster for the block tasks.

Workers must see the same file paths as the machine that submits the run
(a shared file system, or the same folders mounted everywhere). Unit
geometries — confidential locations — travel to the workers with the
weights, so a scheduler on another machine gets a warning.
"""

from __future__ import annotations

import contextlib
import socket
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
    try:
        return Client(address, timeout=timeout, set_as_default=False)
    except (OSError, TimeoutError) as exc:
        raise SchedulerError(
            f"cannot reach the dask scheduler at {address} within {timeout:g} s ({exc}). "
            "Check that it is running and the address (tcp://HOST:PORT), or run without "
            "--scheduler to use local threads."
        ) from exc
