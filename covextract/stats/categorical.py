"""Statistics of categorical layers from per-unit class areas.

Definitions (``w`` the statistical weight, sums over valid pixels, i.e. not
nodata; for transitions, valid in both years):

===================  ========================================================
share_<label>        Σw of the class (or of the group's codes) / Σw valid;
                     the shares of the classes plus ``share_other`` sum to 1
dominant             label of the class with the largest share; a tie goes to
                     the class with the lowest code; ``other`` when codes
                     outside the class table cover the most
classes_present      number of classes with a positive share (``other``
                     counts as one class)
shannon              −Σ p·ln p over the classes and ``other`` (Shannon 1948)
transition_A_to_B    share of the valid area that was A in the earlier layer
                     and is B in the later one (``any`` as A: any class not in
                     B)
net_change_<label>   later share − earlier share of the class, on pixels
                     valid in both layers
valid_share          Σw valid / Σw of the whole unit (off-grid part invalid)
===================  ========================================================

A unit without valid pixels gets valid_share 0 and every other statistic
missing.
"""

from __future__ import annotations

import numpy as np

from covextract.engine.categorical import CategoricalAccumulator

__all__ = ["CATEGORICAL_STAT_NAMES", "categorical_columns", "finalize_categorical"]

CATEGORICAL_STAT_NAMES = (
    "share",
    "dominant",
    "classes_present",
    "shannon",
    "valid_share",
    "transition",
    "net_change",
)


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
