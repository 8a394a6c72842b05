"""Block-streamed reduction: per-unit sufficient statistics from raster blocks.

For each block the engine gathers the pixels the weights need, applies the
valid mask, and computes a :class:`BlockPartial` of per-unit sums. Partials
are merged into an :class:`Accumulator` in block order (fixed), so any
execution order of the blocks gives bit-identical results.

Weights
-------
For entry *i* (a pixel of a unit) with coverage ``c`` and true ground area
``a`` (m²): the *statistical weight* is ``w = c·a`` when area weighting is on
and ``w = c`` when it is off. Means, spreads, percentiles, ``valid_share`` and
``share_above`` use ``w``; ``sum`` is Σ c·v; ``density_total`` is
Σ c·v·a/10⁶ and ``area_km2`` Σ c·a/10⁶ (always true areas).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from covextract.engine.kernels import reduce_runs_block

__all__ = ["BlockPartial", "Accumulator", "reduce_block", "reduce_block_runs"]


@dataclass
class BlockPartial:
    """Per-unit sums of one block (only the units present in it)."""

    units: np.ndarray  # global unit index, sorted
    w_all: np.ndarray  # Σ w over every entry (valid or not)
    area_all: np.ndarray  # Σ c·a/1e6 over every entry, km²
    count: np.ndarray  # valid entries
    w: np.ndarray  # Σ w over valid entries
    mean: np.ndarray  # Σ w·v / Σ w (NaN where w == 0), within [vmin, vmax]
    m2: np.ndarray  # Σ w·(v − mean)²
    csum: np.ndarray  # Σ c·v
    dens: np.ndarray  # Σ c·v·a/1e6
    vmin: np.ndarray
    vmax: np.ndarray
    above_area: dict  # threshold -> Σ c·a/1e6 over valid v > thr
    above_w: dict  # threshold -> Σ w over valid v > thr
    dist: tuple | None = None  # (unit, value, w) of valid entries, when asked for
    w_base: np.ndarray | None = None  # Σ w over valid entries without the weight_by factor
    # the mean in two parts for the merge: a valid value of the unit in the
    # block, and Σ w·(v − shift) / Σ w, which keeps digits that mean rounds
    # away when the spread is far below the values (1e6 ± 1e-3)
    shift: np.ndarray | None = None
    rel: np.ndarray | None = None


def reduce_block(
    unit: np.ndarray,
    pix: np.ndarray,
    cov: np.ndarray,
    values: np.ndarray,
    valid: np.ndarray,
    areas: np.ndarray,
    *,
    weighting: bool,
    thresholds=(),
    keep_distribution: bool = False,
    factor: np.ndarray | None = None,
) -> BlockPartial:
    """Reduce one block.

    Parameters
    ----------
    unit, pix, cov : ndarray
        The block's weight entries (sorted by unit), block-local pixel index.
    values, valid : ndarray
        Physical values (float64) and valid mask of the block, flattened.
    areas : ndarray
        True ground area (m²) of each entry's pixel (same length as ``pix``).
    weighting : bool
        Weight by area (``w = c·a``) or not (``w = c``).
    thresholds : iterable of float
        Thresholds for ``area_above`` / ``share_above`` (strictly greater).
    keep_distribution : bool
        Keep (unit, value, weight) of valid entries for percentiles.
    factor : ndarray, optional
        Per-entry extra weight (``weight_by``: population density), multiplied
        into ``w`` only; sums, totals and areas are not weighted by it.
    """
    n = unit.size
    c = cov.astype(np.float64)
    a = np.asarray(areas, dtype=np.float64)
    w = c * a if weighting else c
    w_base = w  # without the weight_by factor: valid_share stays a share of area
    if factor is not None:
        w = w * factor
    is_start = np.empty(n, dtype=bool)
    is_start[:1] = True
    np.not_equal(unit[1:], unit[:-1], out=is_start[1:])
    starts = np.flatnonzero(is_start)
    units = unit[starts].astype(np.int64)
    k = units.size
    local = np.cumsum(is_start) - 1

    v_all = values[pix]
    ok = valid[pix]
    ca_km2 = c * a / 1e6
    w_all = np.bincount(local, weights=w_base, minlength=k)
    area_all = np.bincount(local, weights=ca_km2, minlength=k)

    lv = local[ok]
    v = v_all[ok]
    wv = w[ok]
    cv = c[ok]
    count = np.bincount(lv, minlength=k).astype(np.int64)
    wsum = np.bincount(lv, weights=wv, minlength=k)
    wbase = wsum if factor is None else np.bincount(lv, weights=w_base[ok], minlength=k)

    vmin = np.full(k, np.nan)
    vmax = np.full(k, np.nan)
    shift = np.zeros(k)
    if lv.size:
        vs = np.flatnonzero(np.r_[True, lv[1:] != lv[:-1]])
        present = lv[vs]
        vmin[present] = np.minimum.reduceat(v, vs)
        vmax[present] = np.maximum.reduceat(v, vs)
        shift[present] = v[vs]
    # the mean as the unit's first valid value plus the weighted mean of the
    # deviations from it, not Σw·v / Σw (which may round off a value that all
    # pixels share), kept within the unit's extremes as in the run reduction;
    # a unit of equal values gets its value and m2 = 0 exactly
    d = v - shift[lv]
    with np.errstate(invalid="ignore", divide="ignore"):
        rel = np.bincount(lv, weights=wv * d, minlength=k) / wsum
    mean = np.minimum(np.maximum(shift + rel, vmin), vmax)
    dev = v - mean[lv]
    m2 = np.bincount(lv, weights=wv * dev * dev, minlength=k)
    csum = np.bincount(lv, weights=cv * v, minlength=k)
    dens = np.bincount(lv, weights=cv * v * a[ok] / 1e6, minlength=k)

    above_area, above_w = {}, {}
    for thr in thresholds:
        hit = v > thr
        above_area[thr] = np.bincount(lv[hit], weights=ca_km2[ok][hit], minlength=k)
        above_w[thr] = np.bincount(lv[hit], weights=wv[hit], minlength=k)

    dist = None
    if keep_distribution:
        dist = (unit[ok].astype(np.int32), v.copy(), wv.copy())
    return BlockPartial(
        units,
        w_all,
        area_all,
        count,
        wsum,
        mean,
        m2,
        csum,
        dens,
        vmin,
        vmax,
        above_area,
        above_w,
        dist,
        wbase,
        shift,
        rel,
    )


def reduce_block_runs(
    entries,
    runs,
    values: np.ndarray,
    valid: np.ndarray,
    entry_areas: np.ndarray,
    *,
    run_areas: np.ndarray | None = None,
    pixel_areas: np.ndarray | None = None,
    weighting: bool,
    thresholds=(),
) -> BlockPartial:
    """Reduce one block whose weights are per-pixel entries plus runs of weight 1.

    The result is the :class:`BlockPartial` of :func:`reduce_block` on the
    expanded weights, with the same definitions, computed in one compiled
    loop (:func:`covextract.engine.kernels.reduce_runs_block`): per unit its
    entries pixel by pixel, then each run over its pixels, so the cost is
    per covered pixel, with no temporaries of the block's size and no
    expansion of the runs. Each unit's squared deviations are accumulated
    around its own first valid value in the block and turned into
    Σw·(v − mean)², equal to the per-pixel result to float rounding (about
    1e-13 relative on smooth data), and exactly 0 for a unit whose valid
    values are all equal.

    Parameters
    ----------
    entries : tuple
        ``(unit, pix, cov)`` of the block's per-pixel entries, sorted by unit.
    runs : tuple
        ``(unit, start, length)`` of the block's runs: block-local index of
        the first pixel and number of pixels (>= 1, within one row).
    values, valid : ndarray
        Physical values (float64) and valid mask of the whole block, flattened.
    entry_areas : ndarray
        True ground area (m²) of each entry's pixel.
    run_areas : ndarray, optional
        Area (m²) of the pixels of each run, when pixel area is constant along
        a row (lat/lon grids, projected grids of constant area).
    pixel_areas : ndarray, optional
        Area (m²) of every pixel of the block, flattened (projected grids whose
        area varies); exactly one of ``run_areas`` and ``pixel_areas`` is given.
    weighting : bool
        Weight by area (``w = c·a``) or not (``w = c``).
    thresholds : iterable of float
        Thresholds for ``area_above`` / ``share_above`` (strictly greater).
    """
    if (run_areas is None) == (pixel_areas is None):
        raise ValueError("give exactly one of run_areas and pixel_areas")
    thresholds = tuple(thresholds)
    thr = np.asarray(thresholds, dtype=np.float64)
    values = np.ascontiguousarray(values, dtype=np.float64).ravel()
    valid = np.ascontiguousarray(valid, dtype=bool).ravel()
    eu, ep, ec = entries
    ru, rs, rl = runs
    per_pixel_area = pixel_areas is not None
    empty = np.zeros(0)
    (
        units,
        w_all,
        area_all,
        count,
        wsum,
        mean,
        m2,
        csum,
        dens,
        vmin,
        vmax,
        above_a,
        above_w,
        shift,
        rel,
    ) = reduce_runs_block(
        values,
        valid,
        np.asarray(eu, dtype=np.int32),
        np.asarray(ep, dtype=np.int32),
        np.asarray(ec, dtype=np.float64),
        np.asarray(entry_areas, dtype=np.float64),
        np.asarray(ru, dtype=np.int32),
        np.asarray(rs, dtype=np.int32),
        np.asarray(rl, dtype=np.int32),
        empty if per_pixel_area else np.asarray(run_areas, dtype=np.float64),
        np.asarray(pixel_areas, dtype=np.float64).ravel() if per_pixel_area else empty,
        per_pixel_area,
        bool(weighting),
        thr,
    )
    above_area = {t: above_a[j] for j, t in enumerate(thresholds)}
    above_wd = {t: above_w[j] for j, t in enumerate(thresholds)}
    return BlockPartial(
        units,
        w_all,
        area_all,
        count,
        wsum,
        mean,
        m2,
        csum,
        dens,
        vmin,
        vmax,
        above_area,
        above_wd,
        None,
        wsum,
        shift,
        rel,
    )


@dataclass
class Accumulator:
    """Running per-unit statistics over all blocks of one pass."""

    n_units: int
    thresholds: tuple = ()
    keep_distribution: bool = False
    w_all: np.ndarray = field(init=False)
    w_base: np.ndarray = field(init=False)
    area_all: np.ndarray = field(init=False)
    count: np.ndarray = field(init=False)
    w: np.ndarray = field(init=False)
    mean: np.ndarray = field(init=False)
    m2: np.ndarray = field(init=False)
    shift: np.ndarray = field(init=False)
    rel: np.ndarray = field(init=False)
    csum: np.ndarray = field(init=False)
    dens: np.ndarray = field(init=False)
    vmin: np.ndarray = field(init=False)
    vmax: np.ndarray = field(init=False)
    above_area: dict = field(init=False)
    above_w: dict = field(init=False)
    dist_parts: list = field(init=False)

    def __post_init__(self) -> None:
        n = self.n_units
        self.w_all = np.zeros(n)
        self.w_base = np.zeros(n)
        self.area_all = np.zeros(n)
        self.count = np.zeros(n, dtype=np.int64)
        self.w = np.zeros(n)
        self.mean = np.zeros(n)
        self.m2 = np.zeros(n)
        self.shift = np.zeros(n)
        self.rel = np.zeros(n)
        self.csum = np.zeros(n)
        self.dens = np.zeros(n)
        self.vmin = np.full(n, np.inf)
        self.vmax = np.full(n, -np.inf)
        self.above_area = {t: np.zeros(n) for t in self.thresholds}
        self.above_w = {t: np.zeros(n) for t in self.thresholds}
        self.dist_parts = []

    def merge(self, p: BlockPartial) -> None:
        """Add a block's partial; call in block order for reproducible sums.

        Means and squared deviations are merged with the pairwise update of
        Chan, Golub & LeVeque (1979), which keeps float64 precision where a
        raw Σw·v² would cancel (temperatures in kelvin). The running mean is
        kept as ``shift + rel``: ``shift`` the unit's shift in its first block
        with valid values, ``rel`` the mean's offset from it. The difference
        of two blocks' means is then ``(shift_b − shift) + (rel_b − rel)``, the
        first term exact for values of one magnitude, so it keeps the digits
        below the values' rounding (a spread of 1e-3 on values of 1e6 loses
        about 1e-9 of its value to means rounded at 1e6, measured).
        """
        u = p.units
        self.w_all[u] += p.w_all
        self.w_base[u] += p.w if p.w_base is None else p.w_base
        self.area_all[u] += p.area_all
        self.count[u] += p.count
        self.csum[u] += p.csum
        self.dens[u] += p.dens
        has = p.w > 0
        uh = u[has]
        wa = self.w[uh]
        wb = p.w[has]
        tot = wa + wb
        if p.shift is None:  # a partial that gives only its mean
            p_shift, p_rel = p.mean[has], np.zeros(uh.size)
        else:
            p_shift, p_rel = p.shift[has], p.rel[has]
        shift = np.where(wa > 0, self.shift[uh], p_shift)
        self.shift[uh] = shift
        rel = self.rel[uh]
        delta = (p_shift - shift) + (p_rel - rel)
        self.rel[uh] = rel + delta * (wb / tot)
        self.m2[uh] += p.m2[has] + delta * delta * (wa * wb / tot)
        self.w[uh] = tot
        present = p.count > 0
        up = u[present]
        self.vmin[up] = np.minimum(self.vmin[up], p.vmin[present])
        self.vmax[up] = np.maximum(self.vmax[up], p.vmax[present])
        # equal block means give delta = 0 (mean and m2 unchanged, a unit of
        # equal values keeps m2 = 0); the mean stays within the merged
        # extremes, which the update could otherwise pass by a rounding
        mean = shift + self.rel[uh]
        self.mean[uh] = np.minimum(np.maximum(mean, self.vmin[uh]), self.vmax[uh])
        for t in self.thresholds:
            self.above_area[t][u] += p.above_area[t]
            self.above_w[t][u] += p.above_w[t]
        if self.keep_distribution and p.dist is not None:
            self.dist_parts.append(p.dist)

    def distribution(self):
        """All kept (unit, value, weight) triples sorted by unit, then value."""
        if not self.dist_parts:
            return (np.zeros(0, np.int32), np.zeros(0), np.zeros(0))
        u = np.concatenate([d[0] for d in self.dist_parts])
        v = np.concatenate([d[1] for d in self.dist_parts])
        w = np.concatenate([d[2] for d in self.dist_parts])
        order = np.lexsort((v, u))
        return u[order], v[order], w[order]
