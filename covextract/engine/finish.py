"""Finishing the statistics of continuous layers from the accumulated per-unit sums.

Definitions (``c`` coverage, ``a`` true pixel area, ``w`` the statistical
weight: ``c·a`` with area weighting, ``c`` without; sums over valid pixels
unless said otherwise):

==============  ==============================================================
count           number of pixels with coverage ≥ 1e-10 and a valid value
valid_share     Σ w (valid) / Σ w (all, including the part off the grid)
sum             Σ c·v — the right total for per-pixel counts
density_total   Σ c·v·a in km² — totals of densities (people/km², radiance)
area_km2        Σ c·a / 10⁶ over the unit's pixels on the grid, valid or not
mean            Σ w·v / Σ w
std             √(Σ w·(v − mean)² / Σ w): ddof = 0, weights are areas
min, max        extreme valid values among covered pixels
median, qNN     weighted percentile, see :func:`weighted_percentiles`
area_above      Σ c·a / 10⁶ over valid pixels with v > threshold, km²
share_above     Σ w (v > threshold) / Σ w (valid)
==============  ==============================================================

A unit with no valid pixel has count 0, valid_share 0 and every other
statistic missing (NaN), never 0.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from covextract.engine.reduce import Accumulator

__all__ = ["FinishContext", "finalize", "weighted_percentiles"]


@dataclass(frozen=True)
class FinishContext:
    """What finishing a continuous statistic needs besides the accumulator.

    ``has`` marks units with at least one valid pixel, ``valid_share`` is the
    finished valid share, ``threshold`` the covariate's threshold and
    ``percentiles`` the weighted percentiles already computed (name → array).
    """

    has: np.ndarray
    valid_share: np.ndarray
    threshold: float | None = None
    percentiles: dict = field(default_factory=dict)


def weighted_percentiles(unit, values, weights, n_units: int, qs) -> np.ndarray:
    """Weighted percentiles per unit; equal weights give numpy's ``linear`` method.

    The k-th of a unit's n sorted values (cumulative weight ``S_k``, weight
    ``w_k``) sits at plotting position
    ``p_k = (S_k − w_k/2 − w_1/2) / (S_n − w_1/2 − w_n/2)``, so ``p_1 = 0``,
    ``p_n = 1``, and with equal weights ``p_k = (k−1)/(n−1)`` — numpy's
    default (Hyndman & Fan 1996 type 7). The q-th percentile interpolates
    linearly between the values whose positions bracket ``q/100``.

    Parameters
    ----------
    unit, values, weights : ndarray
        Triples sorted by unit, then value; weights > 0.
    n_units : int
        Number of units.
    qs : sequence of float
        Percentiles in [0, 100].

    Returns
    -------
    ndarray of shape (len(qs), n_units)
        NaN for units without values.
    """
    qs = np.asarray(qs, dtype=np.float64)
    out = np.full((qs.size, n_units), np.nan)
    if values.size == 0:
        return out
    unit = np.asarray(unit, dtype=np.int64)
    starts = np.flatnonzero(np.r_[True, unit[1:] != unit[:-1]])
    bounds = np.r_[starts, unit.size]
    frac_q = qs / 100.0
    # One unit at a time: a unit's percentiles never depend on the other units in
    # the array (bit-identical whatever the grouping of units).
    for k in range(starts.size):
        s0, s1 = bounds[k], bounds[k + 1]
        v = values[s0:s1]
        if v.size == 1:
            out[:, unit[s0]] = v[0]
            continue
        w = weights[s0:s1]
        s_k = np.cumsum(w)
        denom = s_k[-1] - w[0] / 2 - w[-1] / 2
        if denom <= 0:
            out[:, unit[s0]] = v[0]
            continue
        pos = np.clip((s_k - w / 2 - w[0] / 2) / denom, 0.0, 1.0)
        out[:, unit[s0]] = np.interp(frac_q, pos, v)
    return out


def finalize(acc: Accumulator, stats: list, *, offgrid_w: np.ndarray, threshold=None):
    """Turn an accumulator into one array per requested statistic.

    Parameters
    ----------
    acc : Accumulator
        Merged sums of every block.
    stats : list of Statistic (see :mod:`covextract.stats.registry`)
        Requested statistics.
    offgrid_w : ndarray
        Per unit, the statistical weight of the part off the grid (counts as
        invalid in ``valid_share``).
    threshold : float, optional
        For ``area_above`` / ``share_above``.

    Returns
    -------
    dict
        ``name -> ndarray`` (float64 with NaN for missing; ``count`` int64).
    """
    n = acc.n_units
    has = acc.count > 0
    denom_all = acc.w_all + offgrid_w
    with np.errstate(invalid="ignore", divide="ignore"):
        valid_share = np.where(denom_all > 0, acc.w_base / denom_all, 0.0)
    valid_share = np.where(has, np.clip(valid_share, 0.0, 1.0), 0.0)
    pct = [s for s in stats if s.needs_distribution]
    pct_values = {}
    if pct:
        u, v, w = acc.distribution()
        table = weighted_percentiles(u, v, w, n, [s.q for s in pct])
        for s, row in zip(pct, table, strict=True):
            pct_values[s.name] = row
    out = {}
    for s in stats:
        ctx = FinishContext(
            has=has,
            valid_share=valid_share,
            threshold=threshold,
            percentiles={**pct_values, None: pct_values.get(s.name)},
        )
        out[s.name] = s.finish(acc, ctx)
    return out
