"""Whether the engine's compiled kernels still have to be compiled in this installation.

The kernels in :mod:`covextract.engine.kernels` are numba functions with
``cache=True``: the first process that calls one compiles it (seconds) and
numba keeps the machine code on disk; later processes load it in
milliseconds. A run uses this module to tell the user, before the first
block, that the wait ahead is a one-time compilation and not a hang.

numba (0.68, ``numba/core/caching.py``) writes, per function, an index
``<module>.<qualname>-<first line>.py<major><minor><abiflags>.nbi`` and one
``.nbc`` file per compiled signature, into the module's ``__pycache__``
folder (or ``NUMBA_CACHE_DIR``, or a per-user folder when the package folder
is read-only). The index starts with the numba version and a stamp of the
source file (its time and size); numba ignores an index whose version or
stamp does not match, and compiles again. This module asks numba's own cache
object of each kernel for that index, so it follows the same choice of
folder and the same freshness rule.
"""

from __future__ import annotations

from collections.abc import Iterable

__all__ = ["KERNELS_BY_RULE", "COMMON_KERNELS", "kernels_for", "kernels_need_compiling"]

#: Kernels every zonal pass calls, whatever its pixel rule (the reduction of a
#: block and the grouping of weights by block). Their helpers are compiled with them.
COMMON_KERNELS = ("reduce_runs_block", "group_by_block")

#: The coverage kernel of each pixel rule or point method (points need none).
KERNELS_BY_RULE = {
    "overlap": ("area_weights",),
    "touched": ("area_weights",),
    "center": ("center_runs",),
    "nearest": (),
    "bilinear": (),
}


def kernels_for(rules: Iterable[str] = ()) -> list:
    """The compiled kernels a run with these pixel rules calls, as numba dispatchers.

    Parameters
    ----------
    rules : iterable of str
        Pixel rules (``overlap``, ``center``, ``touched``) or point methods
        (``nearest``, ``bilinear``) of the run's covariates.

    Raises
    ------
    ValueError
        For a rule this module does not know.
    """
    from covextract.engine import kernels

    names = list(COMMON_KERNELS)
    for rule in rules:
        if rule not in KERNELS_BY_RULE:
            raise ValueError(
                f"unknown pixel rule {rule!r} asked of the kernel cache check; "
                f"use one of {', '.join(KERNELS_BY_RULE)}"
            )
        names.extend(KERNELS_BY_RULE[rule])
    return [getattr(kernels, name) for name in dict.fromkeys(names)]


def kernels_need_compiling(rules: Iterable[str] = (), *, dispatchers=None) -> bool:
    """``True`` when numba has no usable on-disk cache for a kernel the run will call.

    Parameters
    ----------
    rules : iterable of str
        The run's pixel rules or point methods; the kernels every pass calls
        are always checked, the coverage kernel of each rule in addition
        (``overlap`` and ``touched`` share one, ``center`` has its own).
    dispatchers : list, optional
        numba functions to check instead of the engine's kernels (for tests).

    Returns
    -------
    bool
        ``True`` if any of them has no index file, or one numba would ignore
        (another numba version, or the source changed since), so its first
        call compiles. Cheap: reads a few small files and compiles nothing.
    """
    for dispatcher in kernels_for(rules) if dispatchers is None else dispatchers:
        if not _has_fresh_index(dispatcher):
            return True
    return False


def _has_fresh_index(dispatcher) -> bool:
    cache = getattr(dispatcher, "_cache", None)
    index = getattr(cache, "_cache_file", None)
    if index is None:
        # not a caching dispatcher (cache=False), or a numba that keeps its cache elsewhere:
        # nothing on disk to find, so every new process compiles it
        return False
    try:
        # numba's own reader: {} when the file is missing, from another numba version,
        # or stamped with another time and size of the source file
        return bool(index._load_index())
    except Exception:  # a truncated or foreign file; numba will rewrite it
        return False
