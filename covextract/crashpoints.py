"""Named crash points: test hooks that kill the process at a chosen step of writing.

A refresh must leave the previous outputs intact and the ledger consistent
however it ends. The tests prove it by running a refresh in a subprocess with
``COVEXTRACT_CRASH_AT=<name>``: when the run reaches :func:`crash_point` with
that name the process sends itself ``SIGKILL`` — no ``finally`` block, no
atexit handler, no flush runs, as when the machine loses power or the kernel's
out-of-memory killer strikes. ``COVEXTRACT_HOLD_AT=<name>`` instead writes
``covextract: holding at <name>`` to stderr and waits until its standard input
closes, so a test can kill the process from outside (a real ``kill -9``) at a
known moment without sleeping.

Names in use (see DEVELOPERS.md): ``after_pieces`` (new pieces on disk, no
output written), ``after_panel``, ``after_codebook``, ``after_table`` (each
output staged beside the old one), ``after_staging`` (the whole set staged,
the manifest too), ``after_journal`` (the commit journal in place: the commit
is decided), ``after_manifest`` (the commit done), ``before_ledger_commit``,
``after_ledger_commit`` and ``before_rename:<file name>`` in every atomic
write and before each rename of the output commit (``before_rename:panel``
for the panel folder): the complete new content exists, the final name still
holds the old one.

Unset, the variables cost one dictionary lookup per point.
"""

from __future__ import annotations

import os
import signal
import sys

__all__ = ["CRASH_ENV", "HOLD_ENV", "crash_point"]

CRASH_ENV = "COVEXTRACT_CRASH_AT"
HOLD_ENV = "COVEXTRACT_HOLD_AT"


def crash_point(name: str) -> None:
    """Die (``COVEXTRACT_CRASH_AT``) or wait (``COVEXTRACT_HOLD_AT``) when ``name`` is chosen."""
    if os.environ.get(HOLD_ENV) == name:
        sys.stderr.write(f"covextract: holding at {name}\n")
        sys.stderr.flush()
        sys.stdin.read()  # returns when the test closes our stdin (or kills us first)
    if os.environ.get(CRASH_ENV) == name:
        os.kill(os.getpid(), signal.SIGKILL)
