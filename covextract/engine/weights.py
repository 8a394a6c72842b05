"""Coverage weights of a unit set on one grid, grouped by raster block.

A :class:`WeightSet` is the sparse matrix ``W[unit, pixel]`` stored as
entries sorted by block, then unit: ``unit`` (int32), ``pix`` (int32 pixel
index *local to its block*, so grids of more than 2³¹ pixels never overflow)
and ``cov`` (float64 coverage, so weighted values keep full precision).
``starts[b]:starts[b+1]`` are the entries of block ``windows[b]``. Blocks
without entries are left out, so they are never read.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from covextract.engine.grid import Grid

__all__ = ["WeightSet", "weights_from_coverage"]


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

    @property
    def n_entries(self) -> int:
        """Number of non-zero weights."""
        return int(self.unit.size)

    def block(self, b: int):
        """``(window, unit, pix, cov)`` of the b-th block with entries."""
        s, e = int(self.starts[b]), int(self.starts[b + 1])
        return self.windows[b], self.unit[s:e], self.pix[s:e], self.cov[s:e]

    def units_on_grid(self) -> np.ndarray:
        """Boolean per unit: at least one weight on the grid."""
        out = np.zeros(self.n_units, dtype=bool)
        out[self.unit] = True
        return out

    def coverage_totals(self) -> np.ndarray:
        """Σ coverage on the grid per unit (pixel units)."""
        return np.bincount(self.unit, weights=self.cov.astype(np.float64), minlength=self.n_units)

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
        )


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
    row = np.asarray(coverage.row, dtype=np.int64)
    col = np.asarray(coverage.col, dtype=np.int64)
    n_blocks = n_bcols * -(-grid.height // bh)
    block_id = (row // bh) * n_bcols + (col // bw)
    # A stable sort keeps each block's entries in (unit, row, col) order. With fewer
    # than 65 536 blocks the ids fit in uint16, for which numpy's stable sort is a
    # radix sort: linear in the number of entries.
    if n_blocks < 2**16:
        order = np.argsort(block_id.astype(np.uint16), kind="stable")
    else:
        order = np.argsort(block_id, kind="stable")
    counts = np.bincount(block_id, minlength=n_blocks)
    ids = np.flatnonzero(counts)
    starts = np.concatenate([[0], np.cumsum(counts[ids])]).astype(np.int64)
    block_id = block_id[order]
    win_of = []
    for bid in ids:
        r0 = int(bid // n_bcols) * bh
        c0 = int(bid % n_bcols) * bw
        win_of.append((r0, c0, min(bh, grid.height - r0), min(bw, grid.width - c0)))
    row_o, col_o = row[order], col[order]
    r0s = (block_id // n_bcols) * bh
    c0s = (block_id % n_bcols) * bw
    widths = np.minimum(bw, grid.width - c0s)
    pix = (row_o - r0s) * widths + (col_o - c0s)
    return WeightSet(
        n_units=int(coverage.n_units),
        grid_fingerprint=grid.fingerprint,
        rule=rule,
        windows=win_of,
        starts=starts,
        unit=np.asarray(coverage.unit, dtype=np.int32)[order],
        pix=pix.astype(np.int32),
        cov=np.asarray(coverage.weight, dtype=np.float64)[order],
        offgrid=np.asarray(coverage.offgrid, dtype=np.float64),
    )
