"""Whether numba's on-disk cache of the kernels is there: checked on a module of its own.

The real cache beside covextract/engine/kernels.py is never touched: the
freshness rule is exercised on a one-function module written to a
temporary folder, whose first call compiles it (well under a second).
"""

from __future__ import annotations

import importlib.util
import sys
import uuid
from pathlib import Path

import pytest

from covextract.engine import kernels
from covextract.engine.compile_state import (
    COMMON_KERNELS,
    kernels_for,
    kernels_need_compiling,
)

SOURCE = """from numba import njit


@njit(cache=True)
def twice(x):
    return 2.0 * x
"""


def load(path):
    """Import ``path`` as a fresh module (a new process would do the same)."""
    name = f"cx_compile_state_{uuid.uuid4().hex}"
    spec = importlib.util.spec_from_file_location(name, path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.fixture
def tiny(tmp_path, monkeypatch):
    # the in-tree cache folder is what this test inspects; a NUMBA_CACHE_DIR would move it
    monkeypatch.delenv("NUMBA_CACHE_DIR", raising=False)
    path = tmp_path / "tinykernel.py"
    path.write_text(SOURCE, encoding="utf-8")
    return path


def test_missing_then_written_then_stale(tiny):
    module = load(tiny)
    assert kernels_need_compiling(dispatchers=[module.twice]) is True
    assert module.twice(1.5) == 3.0  # compiles and writes the cache
    assert kernels_need_compiling(dispatchers=[module.twice]) is False
    # numba's name for the index (numba/core/caching.py): <module>.<qualname>-<line>.pyXY.nbi
    tag = f"py{sys.version_info[0]}{sys.version_info[1]}{getattr(sys, 'abiflags', '')}"
    assert (tiny.parent / "__pycache__" / f"tinykernel.twice-4.{tag}.nbi").is_file()
    # a later process with the same source loads it: nothing to compile
    assert kernels_need_compiling(dispatchers=[load(tiny).twice]) is False
    # the source changes (an upgrade): numba ignores the old index, so compiling is due
    tiny.write_text(SOURCE + "\n# changed\n", encoding="utf-8")
    assert kernels_need_compiling(dispatchers=[load(tiny).twice]) is True


def test_a_corrupt_index_means_compiling(tiny):
    module = load(tiny)
    module.twice(1.0)
    for index in (tiny.parent / "__pycache__").glob("*.nbi"):
        index.write_bytes(b"\x80not a pickle")
    assert kernels_need_compiling(dispatchers=[load(tiny).twice]) is True


def test_any_kernel_without_cache_is_enough(tiny):
    done = load(tiny)
    done.twice(1.0)
    fresh_path = tiny.parent / "other.py"
    fresh_path.write_text(SOURCE, encoding="utf-8")
    fresh = load(fresh_path)
    assert kernels_need_compiling(dispatchers=[done.twice]) is False
    assert kernels_need_compiling(dispatchers=[done.twice, fresh.twice]) is True


def test_kernels_follow_the_pixel_rules():
    names = lambda rules: [d.py_func.__name__ for d in kernels_for(rules)]  # noqa: E731
    assert names([]) == list(COMMON_KERNELS)
    assert names(["overlap", "touched"]) == [*COMMON_KERNELS, "area_weights"]
    assert names(["center"]) == [*COMMON_KERNELS, "center_runs"]
    assert names(["nearest", "bilinear"]) == list(COMMON_KERNELS)
    assert all(
        getattr(kernels, n) is d
        for n, d in zip(names(["center"]), kernels_for(["center"]), strict=True)
    )
    with pytest.raises(ValueError, match="unknown pixel rule 'middle'.*use one of overlap"):
        kernels_for(["middle"])


def test_the_real_kernels_are_looked_up_under_numba_s_names():
    # read-only: the index each real kernel is checked against is the file numba writes
    # for it, <module>.<function>-<first line>.pyXY.nbi (the cache is not touched)
    tag = f"py{sys.version_info[0]}{sys.version_info[1]}{getattr(sys, 'abiflags', '')}"
    for dispatcher in kernels_for(["overlap", "center"]):
        func = dispatcher.py_func
        expected = f"kernels.{func.__name__}-{func.__code__.co_firstlineno}.{tag}.nbi"
        assert Path(dispatcher._cache._cache_file._index_path).name == expected
