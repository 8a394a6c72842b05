"""Categorical layers (land cover): per-unit area by class, and class transitions.

Each valid pixel's code is mapped to a column of a class table (the codes of
the recipe's ``classes:``, in ascending order, then one column ``other`` for
codes not in the table). Per unit the pass accumulates Σw per class, or —
for transitions between two layers on one grid — Σw per (earlier, later)
class pair over pixels valid in both. ``w`` is coverage × true pixel area
(or coverage alone with area weighting off), the same weights as for
continuous layers.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = [
    "ClassTable",
    "CategoricalPartial",
    "CategoricalAccumulator",
    "categorical_reducer",
    "PairedSource",
]


@dataclass(frozen=True)
class ClassTable:
    """Known class codes (ascending) and labels; index ``len(codes)`` is ``other``."""

    codes: tuple
    labels: tuple

    @classmethod
    def from_mapping(cls, classes: dict) -> ClassTable:
        """Build from ``{code: label}``."""
        items = sorted((float(k), str(v)) for k, v in classes.items())
        return cls(tuple(c for c, _ in items), tuple(lbl for _, lbl in items))

    @property
    def size(self) -> int:
        """Columns including ``other``."""
        return len(self.codes) + 1

    def index(self, values: np.ndarray) -> np.ndarray:
        """Column of each code; codes not in the table (or not whole) go to ``other``."""
        codes = np.asarray(self.codes, dtype=np.float64)
        v = np.asarray(values, dtype=np.float64)
        pos = np.searchsorted(codes, v)
        pos = np.clip(pos, 0, len(codes) - 1)
        hit = codes[pos] == v
        return np.where(hit, pos, len(codes)).astype(np.int64)


@dataclass
class CategoricalPartial:
    """Per-unit class areas of one block."""

    units: np.ndarray
    w_all: np.ndarray
    area_all: np.ndarray  # Σ c·a/1e6 over every entry, km²
    count: np.ndarray
    table: np.ndarray  # (k, K) or (k, K, K) for transitions (earlier, later)
    unknown_codes: np.ndarray


class PairedSource:
    """Two rasters on one grid read together: block values stacked as (2, h, w).

    Used for transitions (later layer first, earlier second) so both are read
    in the same task and compared pixel by pixel.
    """

    def __init__(self, first, second) -> None:
        if not first.grid.same_lattice(second.grid):
            from covextract.errors import RasterError

            raise RasterError(
                f"{first.path} and {second.path} are not on the same grid "
                f"({first.grid.width}x{first.grid.height} {first.grid.crs.to_string()} "
                f"transform {tuple(first.grid.transform)[:6]} vs {second.grid.width}x"
                f"{second.grid.height} {second.grid.crs.to_string()} transform "
                f"{tuple(second.grid.transform)[:6]}); pixel-by-pixel comparison needs "
                "one grid. Warp one raster onto the other's grid first."
            )
        self.first = first
        self.second = second
        self.grid = first.grid

    def read_block(self, window):
        """Both layers' stored values of ``window``."""
        return (self.first.read_block(window), self.second.read_block(window))

    def to_values(self, stored):
        """Stacked values and valid masks, shape (2, h, w)."""
        v1, m1 = self.first.to_values(stored[0])
        v2, m2 = self.second.to_values(stored[1])
        return np.stack([v1, v2]), np.stack([m1, m2])


class _Reducer:
    """Picklable per-block categorical reduction."""

    def __init__(self, table: ClassTable, weighting: bool, paired: bool) -> None:
        self.table = table
        self.weighting = weighting
        self.paired = paired

    def __call__(self, unit, pix, cov, values, valid, areas):
        c = cov.astype(np.float64)
        w = c * areas if self.weighting else c
        is_start = np.r_[True, unit[1:] != unit[:-1]] if unit.size else np.zeros(0, bool)
        starts = np.flatnonzero(is_start)
        units = unit[starts].astype(np.int64)
        k = units.size
        local = np.cumsum(is_start) - 1
        kk = self.table.size
        w_all = np.bincount(local, weights=w, minlength=k)
        area_all = np.bincount(local, weights=c * areas / 1e6, minlength=k)
        if self.paired:
            later = values[0].ravel()[pix]
            earlier = values[1].ravel()[pix]
            ok = valid[0].ravel()[pix] & valid[1].ravel()[pix]
            i_later = self.table.index(later[ok])
            i_earlier = self.table.index(earlier[ok])
            key = (local[ok] * kk + i_earlier) * kk + i_later
            table = np.bincount(key, weights=w[ok], minlength=k * kk * kk).reshape(k, kk, kk)
            seen = np.concatenate([later[ok][i_later == kk - 1], earlier[ok][i_earlier == kk - 1]])
        else:
            v = values.ravel()[pix]
            ok = valid.ravel()[pix]
            idx = self.table.index(v[ok])
            table = np.bincount(local[ok] * kk + idx, weights=w[ok], minlength=k * kk).reshape(
                k, kk
            )
            seen = v[ok][idx == kk - 1]
        count = np.bincount(local[ok], minlength=k).astype(np.int64)
        unknown = np.unique(seen)[:50]
        return CategoricalPartial(units, w_all, area_all, count, table, unknown)


def categorical_reducer(table: ClassTable, *, weighting: bool, paired: bool = False) -> _Reducer:
    """The block reducer for a categorical layer (``paired`` for transitions)."""
    return _Reducer(table, weighting, paired)


class CategoricalAccumulator:
    """Per-unit class areas merged over blocks (in block order)."""

    def __init__(self, n_units: int, table: ClassTable, *, paired: bool = False) -> None:
        kk = table.size
        self.n_units = n_units
        self.table_def = table
        self.paired = paired
        self.w_all = np.zeros(n_units)
        self.area_all = np.zeros(n_units)
        self.count = np.zeros(n_units, dtype=np.int64)
        self.table = np.zeros((n_units, kk, kk) if paired else (n_units, kk))
        self.unknown: set = set()

    def merge(self, p: CategoricalPartial) -> None:
        """Add one block's partial."""
        self.w_all[p.units] += p.w_all
        self.area_all[p.units] += p.area_all
        self.count[p.units] += p.count
        self.table[p.units] += p.table
        self.unknown.update(float(x) for x in p.unknown_codes)
