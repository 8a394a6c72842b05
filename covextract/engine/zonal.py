"""Zonal statistics of one raster band for one unit set: weights, pass, statistics.

This stage knows nothing about recipes or files: it takes a raster source
(an object with ``grid``, ``read_block(window)`` and ``to_values(stored)``,
see :class:`covextract.io.rasters.RasterSource`), unit geometries already in
the raster's CRS, and parsed statistic names.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from covextract.core.options import PIXEL_RULE_NAMES, POINT_METHOD_NAMES, uses_area_weights
from covextract.engine.coverage import point_coverage, polygon_coverage
from covextract.engine.finish import finalize
from covextract.engine.weights import WeightSet, weights_from_coverage

__all__ = [
    "MAX_ENTRIES",
    "PIXEL_RULES",
    "POINT_METHODS",
    "LOW_VALID_SHARE",
    "QA_CODES",
    "ZonalResult",
    "build_weights",
    "zonal",
    "zonal_units",
    "unit_groups",
]

#: Pixel rules for polygons and point methods for points (defined in core.options).
PIXEL_RULES = PIXEL_RULE_NAMES
POINT_METHODS = POINT_METHOD_NAMES

#: Units whose valid share is below this get the ``low_valid`` QA code.
LOW_VALID_SHARE = 0.5

#: QA reason codes written by the engine, with their meaning (for the codebook).
QA_CODES = {
    "outside_layer": "the unit lies wholly outside the layer's grid; values are missing",
    "partly_outside": "part of the unit lies outside the layer's grid; that part counts as invalid",
    "no_valid_pixel": "every pixel of the unit is nodata or out of range; values are missing",
    "low_valid": f"less than {LOW_VALID_SHARE:.0%} of the unit's area has valid pixels",
    "missed_by_centers": (
        "no pixel centre falls inside the unit (smaller than a pixel) under the "
        "center rule; use pixels: overlap or touched"
    ),
}


@dataclass
class ZonalResult:
    """Per-unit statistics of one pass."""

    values: dict
    qa: list = field(default_factory=list)
    valid_share: np.ndarray | None = None
    blocks_read: int = 0
    weights_built: bool = False
    read_seconds: float = 0.0
    reduce_seconds: float = 0.0
    workers: set = field(default_factory=set)
    groups: int = 1
    weights_builds: int = 0
    unknown_codes: list = field(default_factory=list)


def build_weights(geoms, grid, rule: str) -> WeightSet:
    """Coverage weights of ``geoms`` (in the grid's CRS) on ``grid``.

    ``rule`` is a pixel rule for polygons (``overlap``, ``center``,
    ``touched``) or a point method (``nearest``, ``bilinear``) for points.
    """
    if rule in POINT_METHODS:
        xs = np.array([g.x if g is not None else np.nan for g in geoms], dtype=np.float64)
        ys = np.array([g.y if g is not None else np.nan for g in geoms], dtype=np.float64)
        cov = point_coverage(xs, ys, grid.transform, grid.width, grid.height, method=rule)
    elif rule in PIXEL_RULES:
        # full-weight pixels as runs: a few runs per row instead of one entry per pixel
        cov = polygon_coverage(geoms, grid.transform, grid.width, grid.height, rule=rule, runs=True)
    else:
        raise ValueError(f"unknown pixel rule {rule!r}; use one of {PIXEL_RULES + POINT_METHODS}")
    return weights_from_coverage(cov, grid, rule)


def zonal(
    source,
    geoms,
    stats: list,
    *,
    rule: str = "overlap",
    area_weighting="auto",
    threshold: float | None = None,
    weights: WeightSet | None = None,
    progress=None,
    threads: int | None = None,
    client=None,
    categorical: dict | None = None,
) -> ZonalResult:
    """Compute statistics of ``source`` over each unit.

    Parameters
    ----------
    source : RasterSource-like
        ``grid``, ``read_block(window)``, ``to_values(stored)``.
    geoms : sequence of shapely geometries or None
        Units in the raster's CRS (polygons, or points for point rules).
    stats : list of Statistic
        Parsed statistic names.
    rule : str
        ``overlap`` (default), ``center``, ``touched``; ``nearest`` or
        ``bilinear`` for points.
    area_weighting : {"auto", "off"} or bool
        ``auto`` weights by true pixel area where it varies by more than
        0.1 % over the grid.
    threshold : float, optional
        For ``area_above`` / ``share_above``.
    weights : WeightSet, optional
        Prebuilt weights (from the cache); built when omitted.
    progress : callable, optional
        Called with the number of blocks finished.
    threads : int, optional
        Local threads for the block tasks (default: the machine's cores).
    client : distributed.Client, optional
        Run the block tasks on a dask.distributed cluster.
    categorical : dict, optional
        For a categorical layer: ``{"table": ClassTable, "groups": {label:
        [codes]}, "pairs": [(from, to)], "earlier": source or None}``; then
        ``stats`` are categorical statistic names (plain strings) and the
        result's values are keyed by column suffix (``share_forest``).
    """
    grid = source.grid
    built = weights is None
    if weights is None:
        weights = build_weights(geoms, grid, rule)
    weighting = uses_area_weights(area_weighting, grid.area_varies)
    from covextract.engine.stream import stream_pass

    cov_on = weights.coverage_totals()
    if categorical is not None:
        from covextract.engine.categorical import (
            CategoricalAccumulator,
            PairedSource,
            categorical_reducer,
            finalize_categorical,
        )

        earlier = categorical.get("earlier")
        table = categorical["table"]
        pass_source = PairedSource(source, earlier) if earlier is not None else source
        acc, pstats = stream_pass(
            weights,
            grid,
            pass_source,
            weighting=weighting,
            progress=progress,
            threads=threads,
            client=client,
            reducer=categorical_reducer(table, weighting=weighting, paired=earlier is not None),
            accumulator=CategoricalAccumulator(weights.n_units, table, paired=earlier is not None),
        )
        offgrid_w = _offgrid_weight(weights, cov_on, acc.area_all, weighting)
        values = finalize_categorical(
            acc,
            stats,
            categorical.get("groups") or {},
            offgrid_w=offgrid_w,
            pairs=categorical.get("pairs") or (),
        )
        valid_w = acc.table.sum(axis=tuple(range(1, acc.table.ndim)))
        unknown = sorted(acc.unknown)
    else:
        thresholds = (threshold,) if threshold is not None else ()
        keep = any(s.needs_distribution for s in stats)
        acc, pstats = stream_pass(
            weights,
            grid,
            source,
            weighting=weighting,
            thresholds=thresholds,
            keep_distribution=keep,
            progress=progress,
            threads=threads,
            client=client,
        )
        offgrid_w = _offgrid_weight(weights, cov_on, acc.area_all, weighting)
        values = finalize(acc, stats, offgrid_w=offgrid_w, threshold=threshold)
        valid_w = acc.w_base
        unknown = []
    denom = acc.w_all + offgrid_w
    with np.errstate(invalid="ignore", divide="ignore"):
        vshare = np.where((acc.count > 0) & (denom > 0), valid_w / denom, 0.0)

    qa = []
    on_grid = weights.units_on_grid()
    has_geom, touches_grid = geometry_flags(geoms, grid, weights.n_units)
    for i in range(weights.n_units):
        codes = []
        if not has_geom[i]:
            qa.append(codes)
            continue
        if not on_grid[i]:
            if rule == "center" and touches_grid[i]:
                codes.append("missed_by_centers")
            else:
                codes.append("outside_layer")
        else:
            if weights.offgrid[i] > 1e-9 * max(cov_on[i], 1.0):
                codes.append("partly_outside")
            if acc.count[i] == 0:
                codes.append("no_valid_pixel")
            elif vshare[i] < LOW_VALID_SHARE:
                codes.append("low_valid")
        qa.append(codes)
    result = ZonalResult(
        values,
        qa,
        vshare,
        pstats.blocks,
        built,
        pstats.read_seconds,
        pstats.reduce_seconds,
        pstats.workers,
    )
    result.unknown_codes = unknown
    return result


def _offgrid_weight(weights, cov_on, area_all, weighting: bool) -> np.ndarray:
    """Statistical weight of each unit's off-grid part (its mean on-grid pixel area)."""
    if not weighting:
        return weights.offgrid.copy()
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_area = np.where(cov_on > 0, area_all * 1e6 / cov_on, 0.0)
    return weights.offgrid * mean_area


def geometry_flags(geoms, grid, n: int):
    """Per unit: has a usable geometry; its bounding box meets the grid."""
    import shapely

    if geoms is None:
        return np.ones(n, bool), np.ones(n, bool)
    arr = np.array(list(geoms), dtype=object)
    present = np.array([g is not None for g in arr], dtype=bool)
    has = present.copy()
    has[present] = ~shapely.is_empty(arr[present].astype(object))
    bounds = np.full((n, 4), np.nan)
    if has.any():
        bounds[has] = shapely.bounds(arr[has].astype(object))
    gx0, gy0, gx1, gy1 = grid.bounds
    with np.errstate(invalid="ignore"):
        meets = (
            (bounds[:, 0] <= gx1)
            & (bounds[:, 2] >= gx0)
            & (bounds[:, 1] <= gy1)
            & (bounds[:, 3] >= gy0)
        )
    return has, meets & has


#: Default bound on the weights held at once, per group of units: weight
#: entries plus runs (about 12 bytes each, plus 32 bytes each while they are
#: built). When percentiles are asked for, every covered pixel of the group
#: also becomes a (unit, value, weight) triple (20 bytes per valid pixel), so
#: groups are then bounded by covered pixels instead (see :func:`unit_groups`).
MAX_ENTRIES = 12_000_000


def estimate_entries(geoms, grid, *, runs: bool = False) -> np.ndarray:
    """Estimated weights of each unit, from its bounding box in pixels.

    ``runs=False``: covered pixels, bounded by the box's area (one entry per
    pixel, or one percentile triple). ``runs=True``: stored items of weights
    built with runs, about the boundary cells (the box's perimeter) plus one
    run per row and block column crossed; far fewer for large units (a 5 km
    buffer at 100 m: about 600 + 200 instead of 10 000). An estimate, not a
    bound: a very jagged outline has more boundary cells than its box's perimeter.
    """
    import shapely

    n = len(geoms)
    est = np.zeros(n)
    arr = np.array(list(geoms), dtype=object)
    have = np.array([g is not None and not g.is_empty for g in arr], dtype=bool)
    if not have.any():
        return est
    b = shapely.bounds(arr[have].astype(object))
    t = grid.transform
    w = np.minimum(np.abs((b[:, 2] - b[:, 0]) / t.a) + 2, grid.width + 2)
    h = np.minimum(np.abs((b[:, 3] - b[:, 1]) / t.e) + 2, grid.height + 2)
    if not runs:
        est[have] = w * h
        return est
    bw = grid.block_shape[1] or grid.width
    # boundary cells of a convex outline are about its box's perimeter; the
    # overlap kernel also stores the cell after each boundary cell where the
    # cover lands, hence 1.5 perimeters (measured on discs in the tests)
    boundary = 3.0 * (w + h)
    est[have] = np.minimum(w * h, boundary + h * (1.0 + np.ceil(w / bw)))
    return est


def unit_groups(
    geoms, grid, max_entries: int = MAX_ENTRIES, *, runs: bool = False
) -> list[np.ndarray]:
    """Split units into spatially compact groups of bounded weight size.

    Units are ordered by the raster block holding their centre (row-major),
    so consecutive groups touch neighbouring blocks and few blocks are read
    by more than one group. One group (all units, in order) when they fit.
    ``runs`` chooses what ``max_entries`` bounds (:func:`estimate_entries`):
    stored entries plus runs (``True``, when no per-pixel distribution is
    kept) or covered pixels (``False``, the default: percentiles).
    """
    import shapely

    n = len(geoms)
    est = estimate_entries(geoms, grid, runs=runs)
    if est.sum() <= max_entries:
        return [np.arange(n)]
    arr = np.array(list(geoms), dtype=object)
    have = np.array([g is not None and not g.is_empty for g in arr], dtype=bool)
    key_row = np.full(n, np.inf)
    key_col = np.full(n, np.inf)
    if have.any():
        b = shapely.bounds(arr[have].astype(object))
        cx, cy = (b[:, 0] + b[:, 2]) / 2, (b[:, 1] + b[:, 3]) / 2
        inv = ~grid.transform
        col = inv.a * cx + inv.b * cy + inv.c
        row = inv.d * cx + inv.e * cy + inv.f
        bh = grid.block_shape[0] or 256
        key_row[have] = np.floor(row / bh)
        key_col[have] = col
    order = np.lexsort((key_col, key_row))
    groups, current, size = [], [], 0.0
    for i in order:
        if current and size + est[i] > max_entries:
            groups.append(np.array(sorted(current)))
            current, size = [], 0.0
        current.append(i)
        size += est[i]
    if current:
        groups.append(np.array(sorted(current)))
    return groups


def zonal_units(
    source,
    geoms,
    stats: list,
    *,
    rule: str = "overlap",
    area_weighting="auto",
    threshold: float | None = None,
    cache=None,
    units_fingerprint: str | None = None,
    max_entries: int = MAX_ENTRIES,
    progress=None,
    threads: int | None = None,
    client=None,
    categorical: dict | None = None,
) -> ZonalResult:
    """:func:`zonal` over many units in bounded groups, with cached weights.

    Memory is bounded by ``max_entries`` per group (stored entries plus
    runs, or covered pixels when percentiles are asked for; see
    :data:`MAX_ENTRIES`) rather than by the whole unit set; each group's
    weights are cached under a key made of the grid, the units'
    fingerprint, the rule and the group.
    Results are scattered back in the units' order.
    """
    import hashlib

    from covextract.engine.weights import weights_key

    geoms = np.array(list(geoms), dtype=object)
    n = len(geoms)
    # percentiles keep a triple per covered pixel of the group: bound the pixels then
    per_pixel = categorical is None and any(s.needs_distribution for s in stats)
    groups = unit_groups(geoms, source.grid, max_entries, runs=not per_pixel)
    out_values: dict = {}
    qa: list = [[] for _ in range(n)]
    vshare = np.zeros(n)
    total = ZonalResult(values=out_values, qa=qa, valid_share=vshare)
    built = 0
    for members in groups:
        sub = geoms[members]
        ws = None
        key = None
        if cache is not None and units_fingerprint is not None:
            tag = units_fingerprint
            if len(groups) > 1:
                tag += ":" + hashlib.sha256(members.astype(np.int64).tobytes()).hexdigest()[:16]
            key = weights_key(source.grid.fingerprint, tag, rule)
            ws = cache.get(key)
        if ws is None:
            ws = build_weights(sub, source.grid, rule)
            built += 1
            if cache is not None and key is not None:
                cache.put(key, ws)
        res = zonal(
            source,
            sub,
            stats,
            rule=rule,
            area_weighting=area_weighting,
            threshold=threshold,
            weights=ws,
            progress=progress,
            threads=threads,
            client=client,
            categorical=categorical,
        )
        total.unknown_codes = sorted(set(total.unknown_codes) | set(res.unknown_codes))
        for name, arr in res.values.items():
            if name not in out_values:
                if arr.dtype.kind in "iu":
                    out_values[name] = np.zeros(n, dtype=arr.dtype)
                elif arr.dtype.kind == "O":
                    out_values[name] = np.full(n, None, dtype=object)
                else:
                    out_values[name] = np.full(n, np.nan)
            out_values[name][members] = arr
        for j, i in enumerate(members):
            qa[i] = res.qa[j]
        vshare[members] = res.valid_share
        total.blocks_read += res.blocks_read
        total.read_seconds += res.read_seconds
        total.reduce_seconds += res.reduce_seconds
        total.workers |= res.workers
    total.weights_built = built > 0
    total.groups = len(groups)
    total.weights_builds = built
    return total
