"""Coverage weights of a unit set on one grid, grouped by raster block.

A :class:`WeightSet` is the sparse matrix ``W[unit, pixel]`` stored as
entries sorted by block, then unit: ``unit`` (int32), ``pix`` (int32 pixel
index *local to its block*, so grids of more than 2³¹ pixels never overflow)
and ``cov`` (float64 coverage, so weighted values keep full precision).
``starts[b]:starts[b+1]`` are the entries of block ``windows[b]``. Blocks
without entries are left out, so they are never read.

Pixels of weight exactly 1 may instead be stored as *runs*: consecutive
pixels of one row of one block, ``(run_unit, run_pix, run_len)`` with
``run_pix`` the block-local index of the first pixel, grouped by block like
the entries (``run_starts``) and sorted by unit within a block. A run costs
12 bytes however long it is, so a 5 km buffer on a 100 m grid holds about a
hundred runs and a few hundred boundary entries instead of 8 000 entries.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass

import numpy as np

from covextract.core.grid import Grid
from covextract.engine.kernels import group_by_block

__all__ = ["weights_key", "WeightSet", "weights_from_coverage", "expand_runs"]


def expand_runs(run_unit, run_pix, run_len):
    """Per-pixel ``(unit, pix)`` (int32) of runs, in the runs' order."""
    n = np.asarray(run_len, dtype=np.int64)
    total = int(n.sum())
    src = np.repeat(np.arange(n.size), n)
    first = np.cumsum(n) - n
    pix = np.asarray(run_pix, dtype=np.int64)[src] + (np.arange(total) - first[src])
    return np.asarray(run_unit, dtype=np.int32)[src], pix.astype(np.int32)


@dataclass
class WeightSet:
    """Coverage weights of ``n_units`` units on one grid, by block.

    Attributes
    ----------
    n_units : int
        Number of units (rows of W).
    grid_fingerprint : str
        :attr:`Grid.fingerprint` of the grid the weights belong to.
    rule : str
        Pixel rule: ``overlap``, ``center``, ``touched``, ``nearest`` or ``bilinear``.
    windows : list of tuple
        ``(row_off, col_off, rows, cols)`` of each block holding entries.
    starts : ndarray of int64
        Offsets of each block's entries; length ``len(windows) + 1``.
    unit, pix : ndarray of int32
        Unit index and block-local pixel index (``row * cols + col`` in the block).
    cov : ndarray of float64
        Coverage weight of each entry, in (0, 1].
    offgrid : ndarray of float64
        Per unit, the coverage that falls outside the grid (pixel units).
    run_starts : ndarray of int64 or None
        Offsets of each block's runs; length ``len(windows) + 1``. ``None``:
        no runs (every weight is an entry).
    run_unit, run_pix, run_len : ndarray of int32 or None
        Unit, block-local index of the first pixel and number of pixels
        (>= 1, within one row of the block) of each run of weight-1 pixels.
    """

    n_units: int
    grid_fingerprint: str
    rule: str
    windows: list
    starts: np.ndarray
    unit: np.ndarray
    pix: np.ndarray
    cov: np.ndarray
    offgrid: np.ndarray
    run_starts: np.ndarray | None = None
    run_unit: np.ndarray | None = None
    run_pix: np.ndarray | None = None
    run_len: np.ndarray | None = None

    def __post_init__(self) -> None:
        if self.run_starts is None:
            z = np.zeros(0, dtype=np.int32)
            self.run_starts = np.zeros(len(self.windows) + 1, dtype=np.int64)
            self.run_unit, self.run_pix, self.run_len = z, z.copy(), z.copy()

    @property
    def n_entries(self) -> int:
        """Number of non-zero weights (per-pixel entries plus the pixels of every run)."""
        return int(self.unit.size) + int(self.run_len.sum(dtype=np.int64))

    @property
    def n_runs(self) -> int:
        """Number of stored runs."""
        return int(self.run_unit.size)

    @property
    def n_stored(self) -> int:
        """Stored items: per-pixel entries plus runs (what memory is proportional to)."""
        return int(self.unit.size) + self.n_runs

    def block_parts(self, b: int):
        """``(window, (unit, pix, cov), (run_unit, run_pix, run_len))`` of the b-th block.

        Entries and runs are each sorted by unit; a pixel of a unit is either
        an entry or in one run, never both.
        """
        s, e = int(self.starts[b]), int(self.starts[b + 1])
        rs, re = int(self.run_starts[b]), int(self.run_starts[b + 1])
        return (
            self.windows[b],
            (self.unit[s:e], self.pix[s:e], self.cov[s:e]),
            (self.run_unit[rs:re], self.run_pix[rs:re], self.run_len[rs:re]),
        )

    def block(self, b: int):
        """``(window, unit, pix, cov)`` of the b-th block, runs expanded to pixels.

        Every weight of the block as one entry per pixel, sorted by unit, then
        pixel index.
        """
        window, (unit, pix, cov), runs = self.block_parts(b)
        return (window, *merge_parts(window, unit, pix, cov, *runs))

    def units_on_grid(self) -> np.ndarray:
        """Boolean per unit: at least one weight on the grid."""
        out = np.zeros(self.n_units, dtype=bool)
        out[self.unit] = True
        out[self.run_unit] = True
        return out

    def coverage_totals(self) -> np.ndarray:
        """Σ coverage on the grid per unit (pixel units)."""
        total = np.bincount(
            self.unit, weights=self.cov.astype(np.float64), minlength=self.n_units
        ).astype(np.float64)  # an empty bincount is int64
        if self.run_unit.size:
            total += np.bincount(
                self.run_unit, weights=self.run_len.astype(np.float64), minlength=self.n_units
            )
        return total

    # ------------------------------------------------------------ persistence
    def to_arrays(self) -> dict[str, np.ndarray]:
        """Plain arrays for ``numpy.savez`` (no pickles)."""
        return {
            "n_units": np.array([self.n_units], dtype=np.int64),
            "grid_fingerprint": np.array([self.grid_fingerprint]),
            "rule": np.array([self.rule]),
            "windows": np.asarray(self.windows, dtype=np.int64).reshape(-1, 4),
            "starts": self.starts.astype(np.int64),
            "unit": self.unit,
            "pix": self.pix,
            "cov": self.cov,
            "offgrid": self.offgrid,
            "run_starts": self.run_starts.astype(np.int64),
            "run_unit": self.run_unit,
            "run_pix": self.run_pix,
            "run_len": self.run_len,
        }

    @classmethod
    def from_arrays(cls, arrays) -> WeightSet:
        """Inverse of :meth:`to_arrays`."""
        return cls(
            n_units=int(arrays["n_units"][0]),
            grid_fingerprint=str(arrays["grid_fingerprint"][0]),
            rule=str(arrays["rule"][0]),
            windows=[tuple(int(v) for v in w) for w in arrays["windows"]],
            starts=np.asarray(arrays["starts"], dtype=np.int64),
            unit=np.asarray(arrays["unit"], dtype=np.int32),
            pix=np.asarray(arrays["pix"], dtype=np.int32),
            cov=np.asarray(arrays["cov"], dtype=np.float64),
            offgrid=np.asarray(arrays["offgrid"], dtype=np.float64),
            run_starts=np.asarray(arrays["run_starts"], dtype=np.int64),
            run_unit=np.asarray(arrays["run_unit"], dtype=np.int32),
            run_pix=np.asarray(arrays["run_pix"], dtype=np.int32),
            run_len=np.asarray(arrays["run_len"], dtype=np.int32),
        )


def merge_parts(window, unit, pix, cov, run_unit, run_pix, run_len):
    """Entries and expanded runs of one block as ``(unit, pix, cov)`` sorted by unit, pixel."""
    if run_unit.size == 0:
        return unit, pix, cov
    ru, rp = expand_runs(run_unit, run_pix, run_len)
    size = int(window[2]) * int(window[3])
    if unit.size == 0:
        # runs alone are usually stored in (unit, row, column) order already
        key = ru.astype(np.int64) * size + rp
        if key.size < 2 or bool((key[1:] > key[:-1]).all()):
            return ru, rp, np.ones(ru.size)
    u = np.concatenate([unit, ru])
    p = np.concatenate([pix, rp])
    c = np.concatenate([cov, np.ones(ru.size)])
    order = np.argsort(u.astype(np.int64) * size + p, kind="stable")
    return u[order], p[order], c[order]


def weights_from_coverage(coverage, grid: Grid, rule: str) -> WeightSet:
    """Group coverage entries (unit, row, col, weight) by the grid's blocks.

    Parameters
    ----------
    coverage : covextract.engine.coverage.Coverage
        On-grid entries sorted by unit, with per-unit ``offgrid`` totals.
    grid : Grid
        The grid the coverage was computed on.
    rule : str
        Pixel rule, recorded with the weights.
    """
    windows = grid.block_windows()
    if not windows:
        raise ValueError("grid has no pixels")
    bh, bw = windows[0][2], windows[0][3]
    n_bcols = -(-grid.width // bw)
    runs = getattr(coverage, "runs", None)
    if runs is None:
        z = np.zeros(0, dtype=np.int64)
        runs = (z, z, z, z)
    # one stable counting sort by block, runs cut at block columns, indices
    # made block-local, in a compiled loop (kernels.group_by_block)
    counts, run_counts, unit, pix, cov, r_unit, r_pix, r_len = group_by_block(
        np.asarray(coverage.unit, dtype=np.int64),
        np.asarray(coverage.row, dtype=np.int64),
        np.asarray(coverage.col, dtype=np.int64),
        np.asarray(coverage.weight, dtype=np.float64),
        *(np.asarray(v, dtype=np.int64) for v in runs),
        int(grid.width),
        int(grid.height),
        int(bh),
        int(bw),
    )
    ids = np.flatnonzero(counts + run_counts)
    starts = np.concatenate([[0], np.cumsum(counts[ids])]).astype(np.int64)
    run_starts = np.concatenate([[0], np.cumsum(run_counts[ids])]).astype(np.int64)
    win_of = []
    for bid in ids:
        r0 = int(bid // n_bcols) * bh
        c0 = int(bid % n_bcols) * bw
        win_of.append((r0, c0, min(bh, grid.height - r0), min(bw, grid.width - c0)))
    return WeightSet(
        n_units=int(coverage.n_units),
        grid_fingerprint=grid.fingerprint,
        rule=rule,
        windows=win_of,
        starts=starts,
        unit=unit,
        pix=pix,
        cov=cov,
        offgrid=np.asarray(coverage.offgrid, dtype=np.float64),
        run_starts=run_starts,
        run_unit=r_unit,
        run_pix=r_pix,
        run_len=r_len,
    )


def weights_key(grid_fingerprint: str, units_fingerprint: str, rule: str) -> str:
    """Cache key of one weight set."""
    import pyproj

    from covextract.engine.coverage import KERNEL_VERSION

    text = "|".join(
        [str(KERNEL_VERSION), pyproj.proj_version_str, grid_fingerprint, units_fingerprint, rule]
    )
    return hashlib.sha256(text.encode()).hexdigest()[:32]
