"""Atomic writes: complete files only, ordinary permissions, no leftovers."""

import os
import stat

import pytest

from covextract.io.writers import atomic_write, atomic_write_text


def test_written_file_has_the_umask_mode(tmp_path):
    old = os.umask(0o022)
    try:
        path = atomic_write_text(tmp_path / "a.csv", "x\n")
    finally:
        os.umask(old)
    assert stat.S_IMODE(path.stat().st_mode) == 0o644
    assert path.read_text() == "x\n"


def test_failed_write_keeps_the_previous_file_and_leaves_no_temporary(tmp_path):
    path = atomic_write_text(tmp_path / "b.csv", "old\n")

    def broken(tmp):
        tmp.write_text("half")
        raise RuntimeError("interrupted")

    with pytest.raises(RuntimeError):
        atomic_write(path, broken)
    assert path.read_text() == "old\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["b.csv"]
