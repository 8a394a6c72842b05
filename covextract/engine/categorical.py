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
    "categorical_columns",
    "finalize_categorical",
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


def _members(label: str, table, groups: dict) -> list[int]:
    """Class-table columns of a class label or group label."""
    if label in groups:
        codes = {float(c) for c in groups[label]}
        return [i for i, c in enumerate(table.codes) if c in codes]
    if label == "other":
        return [len(table.codes)]
    return [i for i, lbl in enumerate(table.labels) if lbl == label]


def categorical_columns(stats, table, groups: dict, pairs=()) -> list[tuple[str, str]]:
    """``(column suffix, statistic)`` of every column the statistics produce, in order."""
    cols = []
    for s in stats:
        if s == "share":
            cols += [(f"share_{lbl}", s) for lbl in table.labels]
            cols += [(f"share_{g}", s) for g in groups]
            cols.append(("share_other", s))
        elif s == "net_change":
            cols += [(f"net_change_{lbl}", s) for lbl in table.labels]
            cols += [(f"net_change_{g}", s) for g in groups]
        elif s == "transition":
            cols += [(f"transition_{a}_to_{b}", s) for a, b in pairs]
        else:
            cols.append((s, s))
    return cols


def finalize_categorical(
    acc: CategoricalAccumulator, stats, groups: dict, *, offgrid_w, pairs=()
) -> dict:
    """Arrays per column suffix (see :func:`categorical_columns`)."""
    table = acc.table_def
    n = acc.n_units
    if acc.paired:
        later = acc.table.sum(axis=1)
        earlier = acc.table.sum(axis=2)
    else:
        later = acc.table
        earlier = None
    valid_w = later.sum(axis=1)
    has = acc.count > 0
    with np.errstate(invalid="ignore", divide="ignore"):
        p_later = later / valid_w[:, None]
        p_earlier = earlier / valid_w[:, None] if earlier is not None else None
    nan = np.full(n, np.nan)
    out = {}
    for suffix, stat in categorical_columns(stats, table, groups, pairs):
        if stat == "share":
            label = suffix[len("share_") :]
            val = p_later[:, _members(label, table, groups)].sum(axis=1)
            out[suffix] = np.where(has, val, nan)
        elif stat == "net_change":
            label = suffix[len("net_change_") :]
            m = _members(label, table, groups)
            val = p_later[:, m].sum(axis=1) - p_earlier[:, m].sum(axis=1)
            out[suffix] = np.where(has, val, nan)
        elif stat == "transition":
            a, b = suffix[len("transition_") :].split("_to_", 1)
            to_cols = _members(b, table, groups)
            if a == "any":
                from_cols = [i for i in range(table.size) if i not in to_cols]
            else:
                from_cols = _members(a, table, groups)
            with np.errstate(invalid="ignore", divide="ignore"):
                val = acc.table[:, from_cols][:, :, to_cols].sum(axis=(1, 2)) / valid_w
            out[suffix] = np.where(has, val, nan)
        elif stat == "dominant":
            # argmax returns the first maximum: the lowest code wins a tie
            idx = np.argmax(np.where(np.isfinite(p_later), p_later, -1.0), axis=1)
            labels = np.array(list(table.labels) + ["other"], dtype=object)
            out[suffix] = np.where(has, labels[idx], None)
        elif stat == "classes_present":
            out[suffix] = np.where(has, (later > 0).sum(axis=1), 0).astype(np.int64)
        elif stat == "shannon":
            with np.errstate(invalid="ignore", divide="ignore"):
                terms = np.where(p_later > 0, -p_later * np.log(p_later), 0.0)
            out[suffix] = np.where(has, terms.sum(axis=1), nan)
        elif stat == "valid_share":
            denom = acc.w_all + offgrid_w
            with np.errstate(invalid="ignore", divide="ignore"):
                val = np.where(denom > 0, valid_w / denom, 0.0)
            out[suffix] = np.where(has, np.clip(val, 0, 1), 0.0)
        else:  # pragma: no cover - validated by the recipe
            raise ValueError(f"unknown categorical statistic {stat!r}")
    return out
