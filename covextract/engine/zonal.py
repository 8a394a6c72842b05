"""Zonal statistics of one raster band for one unit set: weights, pass, statistics.

This stage knows nothing about recipes or files: it takes a raster source
(an object with ``grid``, ``read_block(window)`` and ``to_values(stored)``,
see :class:`covextract.io.rasters.RasterSource`), unit geometries already in
the raster's CRS, and parsed statistic names.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from covextract.engine.coverage import point_coverage, polygon_coverage
from covextract.engine.weights import WeightSet, weights_from_coverage
from covextract.stats.continuous import finalize
from covextract.stats.names import StatName

__all__ = [
    "PIXEL_RULES",
    "POINT_METHODS",
    "LOW_VALID_SHARE",
    "QA_CODES",
    "ZonalResult",
    "build_weights",
    "zonal",
]

PIXEL_RULES = ("overlap", "center", "touched")
POINT_METHODS = ("nearest", "bilinear")

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
        cov = polygon_coverage(geoms, grid.transform, grid.width, grid.height, rule=rule)
    else:
        raise ValueError(f"unknown pixel rule {rule!r}; use one of {PIXEL_RULES + POINT_METHODS}")
    return weights_from_coverage(cov, grid, rule)


def zonal(
    source,
    geoms,
    stats: list[StatName],
    *,
    rule: str = "overlap",
    area_weighting="auto",
    threshold: float | None = None,
    weights: WeightSet | None = None,
    progress=None,
    threads: int | None = None,
    client=None,
) -> ZonalResult:
    """Compute statistics of ``source`` over each unit.

    Parameters
    ----------
    source : RasterSource-like
        ``grid``, ``read_block(window)``, ``to_values(stored)``.
    geoms : sequence of shapely geometries or None
        Units in the raster's CRS (polygons, or points for point rules).
    stats : list of StatName
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
    """
    grid = source.grid
    built = weights is None
    if weights is None:
        weights = build_weights(geoms, grid, rule)
    if area_weighting in ("auto", True):
        weighting = bool(grid.area_varies)
    elif area_weighting in ("off", False, None):
        weighting = False
    else:
        raise ValueError(f"area_weighting must be 'auto' or 'off', got {area_weighting!r}")
    thresholds = (threshold,) if threshold is not None else ()
    keep = any(s.needs_distribution for s in stats)

    from covextract.engine.stream import stream_pass

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
    cov_on = weights.coverage_totals()
    if weighting:
        with np.errstate(invalid="ignore", divide="ignore"):
            mean_area = np.where(cov_on > 0, acc.area_all * 1e6 / cov_on, 0.0)
        offgrid_w = weights.offgrid * mean_area
    else:
        offgrid_w = weights.offgrid.copy()
    values = finalize(acc, stats, offgrid_w=offgrid_w, threshold=threshold)
    denom = acc.w_all + offgrid_w
    with np.errstate(invalid="ignore", divide="ignore"):
        vshare = np.where((acc.count > 0) & (denom > 0), acc.w / denom, 0.0)

    qa = []
    on_grid = weights.units_on_grid()
    has_geom, touches_grid = _geometry_flags(geoms, grid, weights.n_units)
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
    return ZonalResult(
        values, qa, vshare, pstats.blocks, built,
        pstats.read_seconds, pstats.reduce_seconds, pstats.workers,
    )


def _geometry_flags(geoms, grid, n: int):
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
            (bounds[:, 0] <= gx1) & (bounds[:, 2] >= gx0) & (bounds[:, 1] <= gy1) & (bounds[:, 3] >= gy0)
        )
    return has, meets & has
