"""Coverage kernels: which pixels of a grid each unit covers, and by how much.

A unit's coverage is a sparse set of ``(row, col, weight)`` entries over one
raster grid. Three rules serve polygons:

``overlap`` (the default)
    the exact fraction of each pixel's area inside the polygon, computed
    analytically by integrating the polygon's edges across the pixel lattice
    (signed-area accumulation, the method of anti-aliased polygon
    rasterisers; common practice in computer graphics);
``center``
    weight 1 for each pixel whose centre lies inside the polygon, with GDAL's
    scanline tie rules, so the pixel set equals
    ``rasterio.features.rasterize(..., all_touched=False)``;
``touched``
    weight 1 for each pixel the polygon touches: every pixel holding a piece
    of the boundary of positive length in its interior, and every pixel with
    coverage above ``floor``; this equals GDAL's ``all_touched`` pixel set for
    polygons in general position (see :func:`polygon_coverage` for the
    degenerate cases where GDAL differs).

Two methods serve points: ``nearest`` (the pixel containing the point) and
``bilinear`` (the up to four pixel centres around it).

Everything is computed in pixel coordinates, ``(col, row) = ~transform * (x, y)``
(rasterio convention): pixel ``(r, c)`` covers ``[c, c+1) x [r, r+1)``. The
kernels take geometries and coordinates already in the grid's CRS; they never
open files.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import shapely
from affine import Affine

from covextract.core.options import PIXEL_RULE_NAMES, POINT_METHOD_NAMES
from covextract.engine.kernels import area_weights, center_runs
from covextract.errors import GeometryError, RasterError, RecipeError, RecipeProblem, TableError

__all__ = ["Coverage", "KERNEL_VERSION", "point_coverage", "polygon_coverage"]

#: Version of the kernels' arithmetic; part of the weight-cache fingerprint, so
#: bump it whenever a kernel can return different weights for the same input.
KERNEL_VERSION = 3

_POLYGON_RULES = PIXEL_RULE_NAMES
_POINT_METHODS = POINT_METHOD_NAMES

#: Interior weights within this distance of 1 are float noise of the
#: accumulation (0.9999999999999998) and are stored as exactly 1.
_SNAP_TO_ONE = 1e-12

#: Upper bound on the edge pieces (or scanline crossings) handled in one call
#: of a compiled kernel, whose scratch space is one unit's: groups of units
#: below it only bound the shifted copies of the edge coordinates (40 bytes
#: per edge) and the runs of one call.
_MAX_PIECES_PER_PASS = 1 << 23

# shapely type ids (shapely.GeometryType)
_POLYGON = 3
_MULTIPOLYGON = 6


@dataclass
class Coverage:
    """Sparse coverage weights of units over one grid.

    Attributes
    ----------
    n_units : int
        Number of units (geometries or points) the weights were built for.
    unit : numpy.ndarray of int64
        Unit index ``0 .. n_units-1`` of each entry.
    row, col : numpy.ndarray of int64
        Grid row ``0 <= row < height`` and column ``0 <= col < width``.
    weight : numpy.ndarray of float64
        Weight in ``(0, 1]``: area fraction of the pixel (``overlap``), 1
        (``center``, ``touched``, ``nearest``) or the bilinear weight.
    offgrid : numpy.ndarray of float64, shape ``(n_units,)``
        Sum of the weights the unit would have on pixels outside the grid
        (in pixel areas for ``overlap``, pixel counts for ``center`` and
        ``touched``). ``0`` for a unit wholly on the grid or with no geometry.

    runs : tuple of numpy.ndarray or None
        ``(unit, row, col_start, col_end)`` (int64) of half-open column runs
        ``[col_start, col_end)`` of pixels of weight exactly 1, clipped to the
        grid, sorted by ``(unit, row, col_start)``; ``None`` when every pixel
        is an entry (``polygon_coverage(..., runs=False)``, points).

    Notes
    -----
    Entries are sorted by ``(unit, row, col)`` and no ``(unit, row, col)``
    appears twice, in the entries and the runs together. Units without
    entries (missing or empty geometry, wholly off the grid) simply have no
    rows.
    """

    n_units: int
    unit: np.ndarray
    row: np.ndarray
    col: np.ndarray
    weight: np.ndarray
    offgrid: np.ndarray
    runs: tuple | None = None

    @property
    def n_runs(self) -> int:
        """Number of runs (0 without runs)."""
        return 0 if self.runs is None else int(self.runs[0].size)

    def expanded(self) -> Coverage:
        """The same coverage with every run expanded into per-pixel entries of weight 1."""
        if self.runs is None:
            return self
        ru, rr, ra, rb = self.runs
        n = rb - ra
        src = np.repeat(np.arange(ru.size), n)
        col = ra[src] + (np.arange(src.size) - np.repeat(np.cumsum(n) - n, n))
        unit = np.concatenate([self.unit, ru[src]])
        row = np.concatenate([self.row, rr[src]])
        col = np.concatenate([self.col, col])
        weight = np.concatenate([self.weight, np.ones(src.size)])
        order = _sort_cells(unit, row, col)
        return Coverage(
            self.n_units, unit[order], row[order], col[order], weight[order], self.offgrid
        )


# ---------------------------------------------------------------- validation
def _check_grid(transform, width, height) -> Affine:
    """Return the inverse transform after checking the grid description."""
    if not isinstance(transform, Affine):
        raise RasterError(
            f"the grid transform must be an affine.Affine, got {type(transform).__name__}; "
            "pass the raster's transform as rasterio returns it (dataset.transform)"
        )
    for name, value in (("width", width), ("height", height)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value <= 0:
            raise RasterError(
                f"the grid {name} must be a positive whole number of pixels, got {value!r}"
            )
    coeffs = (transform.a, transform.b, transform.c, transform.d, transform.e, transform.f)
    det = transform.a * transform.e - transform.b * transform.d
    if not all(math.isfinite(v) for v in coeffs) or det == 0:
        raise RasterError(
            f"the grid transform {tuple(coeffs)} is degenerate (zero or non-finite pixel size); "
            "check the raster's georeferencing"
        )
    return ~transform


def _check_floor(floor) -> float:
    floor = float(floor)
    if not (0.0 <= floor < 1e-3):
        # floor only trims float noise; a larger value would silently drop
        # genuine slivers of the polygon.
        raise ValueError(f"floor must be in [0, 1e-3), got {floor!r}")
    return floor


def _as_geometry_array(geoms) -> np.ndarray:
    """Return the unit geometries as a 1-D object array (``None`` stays ``None``)."""
    if isinstance(geoms, shapely.Geometry):
        raise GeometryError(
            "polygon_coverage takes a sequence of geometries, one per unit, "
            "not a single geometry; wrap it in a list"
        )
    if hasattr(geoms, "geometry") and hasattr(geoms, "crs"):  # GeoDataFrame
        geoms = geoms.geometry
    arr = np.asarray(
        list(geoms) if not isinstance(geoms, np.ndarray) else geoms, dtype=object
    ).ravel()
    bad = [i for i, g in enumerate(arr) if g is not None and not isinstance(g, shapely.Geometry)]
    if bad:
        raise GeometryError(
            f"units at positions {bad[:10]} are not shapely geometries "
            f"(first one: {type(arr[bad[0]]).__name__}); convert them with shapely.geometry.shape"
        )
    return arr


def _present_polygons(arr: np.ndarray) -> np.ndarray:
    """Validate every unit; return the indices of non-missing, non-empty polygons."""
    type_id = shapely.get_type_id(arr)
    missing = type_id < 0
    empty = np.zeros(arr.size, dtype=bool)
    empty[~missing] = shapely.is_empty(arr[~missing])
    present = ~missing & ~empty
    wrong = present & (type_id != _POLYGON) & (type_id != _MULTIPOLYGON)
    if wrong.any():
        idx = np.flatnonzero(wrong)
        kind = arr[idx[0]].geom_type
        raise GeometryError(
            f"units at positions {idx[:10].tolist()} are not polygons (first one: {kind}); "
            "coverage rules need Polygon or MultiPolygon units: buffer points and lines first"
        )
    idx = np.flatnonzero(present)
    if idx.size:
        coords = shapely.get_coordinates(arr[idx])
        if not np.isfinite(coords).all():
            bad = [int(i) for i in idx if not np.isfinite(shapely.get_coordinates(arr[i])).all()]
            raise GeometryError(
                f"units at positions {bad[:10]} have NaN or infinite coordinates; "
                "fix or drop them before computing coverage"
            )
        valid = shapely.is_valid(arr[idx])
        if not valid.all():
            bad = idx[~valid]
            reason = shapely.is_valid_reason(arr[bad[0]])
            raise GeometryError(
                f"units at positions {bad[:10].tolist()} are invalid polygons "
                f"(first one: {reason}); repair them (shapely.make_valid) before computing "
                "coverage, as the unit builder does"
            )
    return idx


# ----------------------------------------------------------- edge extraction
@dataclass
class _Edges:
    """Polygon edges in pixel coordinates, grouped by unit (ascending)."""

    unit: np.ndarray  # int64 unit index of each edge
    x0: np.ndarray
    y0: np.ndarray
    x1: np.ndarray
    y1: np.ndarray
    sign: np.ndarray  # +-1: orients every ring so that coverage comes out positive
    world_ccw: np.ndarray  # bool: the edge's ring runs counter-clockwise in the CRS


def _pixel_edges(arr: np.ndarray, idx: np.ndarray, inv: Affine) -> _Edges:
    """All ring edges of the polygons ``arr[idx]``, in pixel coordinates."""
    parts, part_unit = shapely.get_parts(arr[idx], return_index=True)
    part_unit = idx[part_unit]
    rings, ring_part = shapely.get_rings(parts, return_index=True)
    xy, vert_ring = shapely.get_coordinates(rings, return_index=True)
    # same operation order as Affine.__mul__, so pixel coordinates are bit-equal
    # to those of ~transform * (x, y) used by rasterio-based references
    px = xy[:, 0] * inv.a + xy[:, 1] * inv.b + inv.c
    py = xy[:, 0] * inv.d + xy[:, 1] * inv.e + inv.f
    same = vert_ring[1:] == vert_ring[:-1]
    x0, y0, x1, y1 = px[:-1][same], py[:-1][same], px[1:][same], py[1:][same]
    edge_ring = vert_ring[:-1][same]

    # Shapely does not fix ring orientation, so every ring is oriented here
    # from its own shoelace area: exteriors add, holes subtract.
    n_rings = len(rings)
    area2 = np.bincount(edge_ring, weights=x0 * y1 - x1 * y0, minlength=n_rings)
    is_exterior = np.ones(n_rings, dtype=bool)
    is_exterior[1:] = ring_part[1:] != ring_part[:-1]
    # with x right and y down, a ring of positive shoelace area accumulates
    # coverage -1 inside (see kernels.area_weights); exteriors must give +1
    ring_sign = np.where(is_exterior, -np.sign(area2), np.sign(area2))
    # the affine map preserves orientation iff its determinant is positive
    world_ccw = np.sign(area2) * np.sign(inv.determinant) > 0
    unit = part_unit[ring_part][edge_ring].astype(np.int64)
    return _Edges(unit, x0, y0, x1, y1, ring_sign[edge_ring], world_ccw[edge_ring])


def _unit_groups(unit: np.ndarray, load: np.ndarray, limit: int):
    """Split the (sorted) edge array into slices of whole units of bounded load."""
    if unit.size == 0:
        return []
    starts = np.flatnonzero(np.r_[True, unit[1:] != unit[:-1]])
    per_unit = np.add.reduceat(load, starts)
    groups, lo, acc = [], 0, 0.0
    for k in range(starts.size):
        if acc > 0 and acc + per_unit[k] > limit:
            groups.append((starts[lo], starts[k]))
            lo, acc = k, 0.0
        acc += per_unit[k]
    groups.append((starts[lo], unit.size))
    return groups


# ------------------------------------------------------------ overlap kernel
def _sort_cells(unit, row, col) -> np.ndarray:
    """Permutation sorting cells by ``(unit, row, col)``."""
    if unit.size == 0:
        return np.zeros(0, dtype=np.int64)
    r0, c0 = row.min(), col.min()
    nr = int(row.max() - r0) + 1
    nc = int(col.max() - c0) + 1
    nu = int(unit.max() - unit.min()) + 1
    if nu * nr * nc < 2**62:
        key = ((unit - unit.min()) * nr + (row - r0)) * nc + (col - c0)
        return np.argsort(key, kind="stable")
    return np.lexsort((col, row, unit))


def _unit_origins(e: _Edges, n_units: int):
    """Integer origin of each unit's pixel bounding box (0 for units without edges)."""
    ox = np.zeros(n_units)
    oy = np.zeros(n_units)
    if e.unit.size:
        # edges are grouped by unit in ascending order
        starts = np.flatnonzero(np.r_[True, e.unit[1:] != e.unit[:-1]])
        units = e.unit[starts]
        ox[units] = np.floor(np.minimum.reduceat(np.minimum(e.x0, e.x1), starts))
        oy[units] = np.floor(np.minimum.reduceat(np.minimum(e.y0, e.y1), starts))
    return ox, oy


def _area_rule(e: _Edges, n_units, width, height, rule, floor, runs=False):
    """``overlap`` and ``touched`` weights by signed-area accumulation.

    For a piece of edge inside cell ``(r, c)`` with (oriented) height ``dy``
    and mid-point ``x_mid``, the region between the piece and the right edge
    of the cell has signed area ``dy * ((c + 1) - x_mid)``, and every cell
    further right in row ``r`` gains ``dy`` in full. Summing over a closed,
    oriented boundary gives, for each cell, the area of the polygon inside it
    (Green's theorem, one row strip at a time). The "further right" part is a
    running sum along the row, kept sparse: it changes only at cells that hold
    a piece, and between two such cells it is constant (the interior runs).
    The loops over edges, pieces, rows and cells are compiled
    (:func:`covextract.engine.kernels.area_weights`); coordinates are shifted
    by the integer origin of each unit first (exact in floating point) so that
    ``(c + 1) - x`` keeps its digits far from the grid origin.
    """
    ox, oy = _unit_origins(e, n_units)
    # shifting by the origin is exact and keeps the accumulation's digits;
    # the integer offsets are restored when the cells are emitted
    oxi, oyi = ox.astype(np.int64), oy.astype(np.int64)
    load = np.abs(np.floor(e.x1) - np.floor(e.x0)) + np.abs(np.floor(e.y1) - np.floor(e.y0)) + 1.0
    offgrid = np.zeros(n_units)
    touched = rule == "touched"
    mode = (2 if touched else 1) if runs else 0
    sign = np.asarray(e.sign, dtype=np.float64)

    def one(bounds):
        lo, hi = bounds
        unit = e.unit[lo:hi]
        entries, run_items = area_weights(
            unit,
            e.x0[lo:hi] - ox[unit],
            e.y0[lo:hi] - oy[unit],
            e.x1[lo:hi] - ox[unit],
            e.y1[lo:hi] - oy[unit],
            sign[lo:hi],
            oxi,
            oyi,
            width,
            height,
            floor,
            _SNAP_TO_ONE,
            touched,
            mode,
            offgrid,  # each call writes only its own units' cells
        )
        return (entries, run_items) if runs else entries

    return _map_unit_groups(one, e.unit, load), offgrid


#: Below this many edge pieces (or crossings) the kernels run in the calling thread.
_PARALLEL_MIN_PIECES = 1 << 18


def _build_threads() -> int:
    from covextract.engine.stream import default_threads

    return default_threads()


# ------------------------------------------------------------- center kernel
def _center_pass(e: _Edges, lo: int, hi: int):
    """Scanline crossings at pixel-centre heights for edges ``lo:hi``.

    Follows GDAL's filled-polygon scanline (alg/llrasterize.cpp,
    GDALdllImageFilledPolygon): an edge crosses row ``r`` when
    ``min(y) <= r + 0.5 < max(y)``; the crossing ``x`` is computed with the
    same expression and mapped to column ``floor(x + 0.5)``; crossings are
    paired after sorting (even-odd rule) and a pair ``(a, b)`` fills columns
    ``a .. b-1``, i.e. pixels whose centre ``x`` lies in ``(x_a, x_b]``.
    Returns runs ``(unit, row, start, stop)``.
    """
    unit = e.unit[lo:hi]
    x0, y0, x1, y1 = e.x0[lo:hi], e.y0[lo:hi], e.x1[lo:hi], e.y1[lo:hi]
    # crossings, sorted per (unit, row) and paired, in one compiled loop
    # (kernels.center_runs); runs with stop > start only
    runs_u, runs_r, start, stop = center_runs(unit, x0, y0, x1, y1)

    # GDAL also fills a horizontal edge lying exactly on a pixel-centre line
    # when it runs towards -x. Measured with rasterio 1.4 / GDAL 3.10, GDAL
    # sees every ring (exterior or hole) clockwise in CRS coordinates
    # whatever the input order, so the test uses that orientation.
    ccw = e.world_ccw[lo:hi]
    towards_minus_x = np.where(ccw, x0 < x1, x0 > x1)
    flat = (y0 == y1) & towards_minus_x & (np.floor(y0) + 0.5 == y0)
    if flat.any():
        fs = np.floor(np.minimum(x0, x1)[flat] + 0.5).astype(np.int64)
        fe = np.floor(np.maximum(x0, x1)[flat] + 0.5).astype(np.int64)
        fr = np.floor(y0[flat]).astype(np.int64)
        fu = unit[flat]
        fk = fe > fs
        runs_u = np.concatenate([runs_u, fu[fk]])
        runs_r = np.concatenate([runs_r, fr[fk]])
        start = np.concatenate([start, fs[fk]])
        stop = np.concatenate([stop, fe[fk]])
        return _merge_runs(runs_u, runs_r, start, stop)
    return runs_u, runs_r, start, stop


def _merge_runs(u, r, a, b):
    """Union of half-open column runs ``[a, b)`` per ``(unit, row)``, sorted."""
    order = _sort_cells(u, r, a)
    u, r, a, b = u[order], r[order], a[order], b[order]
    out_u, out_r, out_a, out_b = [], [], [], []
    # runs from horizontal edges are rare; a plain sweep keeps this readable
    for i in range(u.size):
        if out_u and out_u[-1] == u[i] and out_r[-1] == r[i] and a[i] <= out_b[-1]:
            out_b[-1] = max(out_b[-1], int(b[i]))
        else:
            out_u.append(int(u[i]))
            out_r.append(int(r[i]))
            out_a.append(int(a[i]))
            out_b.append(int(b[i]))
    arr = [np.asarray(v, dtype=np.int64) for v in (out_u, out_r, out_a, out_b)]
    return tuple(arr)


def _center_rule(e: _Edges, n_units, width, height, runs=False):
    load = np.abs(e.y1 - e.y0) + 3.0

    def one(bounds):
        u, r, a, b = _center_pass(e, *bounds)
        row_on = (r >= 0) & (r < height)
        ca = np.maximum(a, 0)
        cb = np.minimum(b, width)
        on = np.where(row_on, np.maximum(cb - ca, 0), 0)
        off = np.bincount(u, weights=(b - a) - on, minlength=n_units)
        if runs:
            z = np.zeros(0, dtype=np.int64)
            k = on > 0
            return ((z, z, z, np.zeros(0)), (u[k], r[k], ca[k], cb[k])), off
        src = np.repeat(np.arange(u.size), on)
        col = ca[src] + (np.arange(src.size) - np.repeat(np.cumsum(on) - on, on))
        return (u[src], r[src], col, np.ones(src.size)), off

    done = _map_unit_groups(one, e.unit, load)
    offgrid = np.zeros(n_units)
    for _, off in done:
        # groups hold disjoint units: each unit receives one non-zero term, so
        # the sum is exact and does not depend on how units were grouped
        offgrid += off
    return [part for part, _ in done], offgrid


def _map_unit_groups(fn, unit, load):
    """``fn(bounds)`` over groups of whole units, on the engine's threads, in unit order.

    The compiled kernels release the GIL and a unit's cells do not depend on
    the other units of its group, so the outputs (joined in unit order) are
    the same arrays whatever the number of threads.
    """
    threads = _build_threads()
    limit = _MAX_PIECES_PER_PASS
    total = float(load.sum())
    if threads > 1 and total > _PARALLEL_MIN_PIECES:
        limit = min(limit, int(total // (2 * threads)) + 1)
    groups = _unit_groups(unit, load, limit)
    if threads > 1 and len(groups) > 1:
        from concurrent.futures import ThreadPoolExecutor

        with ThreadPoolExecutor(min(threads, len(groups))) as pool:
            return list(pool.map(fn, groups))
    return [fn(g) for g in groups]


# --------------------------------------------------------------- public API
def _cat(arrays):
    """Concatenation of ``arrays`` (the array itself when there is one: no copy)."""
    return arrays[0] if len(arrays) == 1 else np.concatenate(arrays)


def _assemble(n_units, parts, offgrid, runs=False) -> Coverage:
    if runs:
        entries = [p[0] for p in parts]
        cov = _assemble(n_units, entries, offgrid)
        if parts:
            ru, rr, ra, rb = (
                np.asarray(_cat(v), dtype=np.int64)
                for v in zip(*[p[1] for p in parts], strict=True)
            )
        else:
            ru = rr = ra = rb = np.zeros(0, dtype=np.int64)
        cov.runs = (ru, rr, ra, rb)
        return cov
    if parts:
        unit, row, col, weight = (_cat(v) for v in zip(*parts, strict=True))
    else:
        unit = row = col = np.zeros(0, dtype=np.int64)
        weight = np.zeros(0)
    return Coverage(
        n_units=int(n_units),
        unit=np.asarray(unit, dtype=np.int64),
        row=np.asarray(row, dtype=np.int64),
        col=np.asarray(col, dtype=np.int64),
        weight=np.asarray(weight, dtype=np.float64),
        offgrid=np.asarray(offgrid, dtype=np.float64),
    )


def polygon_coverage(
    geoms: Sequence | np.ndarray,
    transform: Affine,
    width: int,
    height: int,
    rule: str = "overlap",
    *,
    floor: float = 1e-10,
    runs: bool = False,
) -> Coverage:
    """Coverage weights of polygon units over a raster grid.

    Parameters
    ----------
    geoms : sequence of shapely Polygon or MultiPolygon
        One geometry per unit, already in the grid's CRS. ``None`` or an
        empty geometry gives a unit without entries and ``offgrid`` 0.
        Geometries must be valid (repair them first, e.g. with
        ``shapely.make_valid``); ring orientation does not matter.
    transform : affine.Affine
        The grid's pixel-to-CRS transform (rasterio convention); any
        invertible affine works, including north-up grids (negative ``e``),
        non-square pixels and rotated grids.
    width, height : int
        Grid size in pixels.
    rule : {"overlap", "center", "touched"}
        ``overlap``: weight = fraction of the pixel's area inside the polygon
        (holes and parts handled, exact up to float rounding, about 1e-12).
        ``center``: weight 1 where the pixel centre is inside, with GDAL's
        tie rules, in pixel coordinates: a centre exactly on an edge at the
        lower-column end of a run is out, at the upper-column end in; on an
        edge at the lower-row end in, at the upper-row end out; and a
        horizontal edge lying exactly on a centre line is filled when it runs
        towards -x with the ring taken clockwise in CRS coordinates (what
        GDAL 3.10 does, checked in the tests).
        ``touched``: weight 1 on every pixel holding a piece of the boundary
        of positive length in its interior or coverage above ``floor``.
    floor : float, keyword-only
        ``overlap`` weights below it are float noise and are dropped
        (default 1e-10 of a pixel); the same threshold decides whether a
        pixel without boundary counts as covered for ``touched``.
    runs : bool, keyword-only
        Return pixels of weight exactly 1 as column runs in
        :attr:`Coverage.runs` instead of one entry each: every pixel for
        ``center`` and ``touched``; for ``overlap`` the interior runs the
        accumulation finds between boundary cells (boundary cells stay
        entries even when their weight is 1). ``Coverage.expanded()`` gives
        exactly the entries of ``runs=False``.

    Returns
    -------
    Coverage
        Entries on the grid, sorted by ``(unit, row, col)``. ``offgrid``
        holds, per unit, the weight that falls outside the grid: area in
        pixels for ``overlap`` (so ``sum(weight) + offgrid`` is the polygon's
        area divided by the pixel area), pixel counts for ``center`` and
        ``touched``.

    Raises
    ------
    GeometryError
        A unit is not a polygon, is invalid, or has non-finite coordinates.
    RasterError
        The grid description is unusable (zero pixel size, bad width).
    RecipeError
        ``rule`` is not one of the three rules.

    Notes
    -----
    ``overlap`` integrates each edge across the lattice: edges are cut at
    every integer column and row (vectorised, no loop over pixels), each
    piece adds its signed area to its own pixel and its height to every pixel
    to its right in the row, and a running sum along the row finishes the
    job. Interior pixels are never enumerated during accumulation; they are
    emitted as runs. Memory is proportional to the number of edge pieces
    (about the perimeter in pixels) plus the entries returned; off-grid
    parts only add to ``offgrid`` and are never expanded.

    ``touched`` agrees with GDAL's ``all_touched`` (checked in the tests on
    random polygons) except in degenerate positions, where GDAL's line walker
    (alg/llrasterize.cpp, GDALdllImageLineAllTouched) approximates: an edge
    within 0.01 pixel of vertical (horizontal) is burnt into one column (row)
    only, even when it crosses into the next, so GDAL can miss a pixel that
    holds part of the polygon; and where the boundary passes exactly through
    a pixel corner GDAL may also burn the pixel beyond that corner, which
    shares a single point with the polygon (one side of the polygon only).
    Boundaries lying exactly on pixel lines agree: neither GDAL nor this
    kernel marks the pixel outside.

    Examples
    --------
    >>> from affine import Affine
    >>> from shapely.geometry import box
    >>> cov = polygon_coverage([box(0.5, 0, 2, 1)], Affine.identity(), 4, 4)
    >>> cov.col.tolist(), cov.weight.tolist()
    ([0, 1], [0.5, 1.0])
    """
    if rule not in _POLYGON_RULES:
        raise RecipeError(
            [
                RecipeProblem(
                    f"unknown pixel rule {rule!r}; choose one of {', '.join(_POLYGON_RULES)}",
                    key="pixels",
                )
            ]
        )
    inv = _check_grid(transform, width, height)
    floor = _check_floor(floor)
    arr = _as_geometry_array(geoms)
    n_units = arr.size
    idx = _present_polygons(arr)
    runs = bool(runs)
    if idx.size == 0:
        return _assemble(n_units, [], np.zeros(n_units), runs)
    edges = _pixel_edges(arr, idx, inv)
    if rule == "center":
        parts, offgrid = _center_rule(edges, n_units, width, height, runs)
    else:
        parts, offgrid = _area_rule(edges, n_units, width, height, rule, floor, runs)
    return _assemble(n_units, parts, offgrid, runs)


def point_coverage(
    x, y, transform: Affine, width: int, height: int, method: str = "nearest"
) -> Coverage:
    """Coverage weights of point units over a raster grid.

    Parameters
    ----------
    x, y : array_like of float
        Point coordinates in the grid's CRS, one point per unit.
    transform : affine.Affine
        The grid's pixel-to-CRS transform (rasterio convention).
    width, height : int
        Grid size in pixels.
    method : {"nearest", "bilinear"}
        ``nearest``: weight 1 on the pixel containing the point,
        ``(floor(col), floor(row))`` of ``~transform * (x, y)``, as
        rasterstats ``point_query(interpolate="nearest")`` reads it.
        ``bilinear``: the standard bilinear weights of the four pixel centres
        around the point, computed as rasterstats ``point_query`` does
        (rasterstats/point.py, ``point_window_unitxy`` and ``bilinear``), so
        that ``sum(w * v)`` is its value when all four pixels are on the grid
        and valid. Zero weights (a point on a line of pixel centres) are
        dropped.

    Returns
    -------
    Coverage
        ``offgrid`` is 1 for a ``nearest`` point off the grid and, for
        ``bilinear``, the summed weight of the neighbours off the grid. Points
        with a NaN or infinite coordinate have no entries and ``offgrid`` 0.

    Raises
    ------
    TableError
        ``x`` and ``y`` differ in length or are not numeric.
    RasterError
        The grid description is unusable.
    RecipeError
        ``method`` is not ``nearest`` or ``bilinear``.

    Notes
    -----
    Where a neighbour is nodata or off the grid, ``sum(w * v) / sum(w)`` over
    the valid neighbours is the renormalised bilinear value. rasterstats does
    something else there: it falls back to the value of the window pixel
    nearest the point (its ``bilinear`` returns ``arr[round(1 - y),
    round(x)]``), i.e. the ``nearest`` coverage, or nothing when that pixel
    is nodata or off the grid. A reducer that must reproduce rasterstats
    needs both coverages; the tests show the correspondence.
    """
    if method not in _POINT_METHODS:
        raise RecipeError(
            [
                RecipeProblem(
                    f"unknown point method {method!r}; choose one of {', '.join(_POINT_METHODS)}",
                    key="units.at_point",
                )
            ]
        )
    inv = _check_grid(transform, width, height)
    try:
        px = np.asarray(x, dtype=np.float64).ravel()
        py = np.asarray(y, dtype=np.float64).ravel()
    except (TypeError, ValueError) as exc:
        raise TableError(f"point coordinates must be numbers: {exc}") from None
    if px.shape != py.shape:
        raise TableError(
            f"point coordinates differ in length: {px.size} x values and {py.size} y values"
        )
    n_units = px.size
    with np.errstate(invalid="ignore"):
        fcol = px * inv.a + py * inv.b + inv.c
        frow = px * inv.d + py * inv.e + inv.f
    ok = np.isfinite(fcol) & np.isfinite(frow)
    units = np.flatnonzero(ok)
    fcol, frow = fcol[ok], frow[ok]
    if method == "nearest":
        r = np.floor(frow).astype(np.int64)
        c = np.floor(fcol).astype(np.int64)
        u = units
        w = np.ones(units.size)
    else:
        # rasterstats' window: the 2x2 block whose centres enclose the point,
        # found by rounding half to even (Python's round, numpy's rint)
        rr = np.rint(frow).astype(np.int64)
        cr = np.rint(fcol).astype(np.int64)
        ux = 0.5 - (cr - fcol)
        uy = 0.5 + (rr - frow)
        # window order (r-1, c-1), (r-1, c), (r, c-1), (r, c): already sorted
        u = np.repeat(units, 4)
        r = np.stack([rr - 1, rr - 1, rr, rr], axis=1).ravel()
        c = np.stack([cr - 1, cr, cr - 1, cr], axis=1).ravel()
        w = np.stack([(1 - ux) * uy, ux * uy, (1 - ux) * (1 - uy), ux * (1 - uy)], axis=1).ravel()
        nz = w > 0
        u, r, c, w = u[nz], r[nz], c[nz], w[nz]
    on = (r >= 0) & (r < height) & (c >= 0) & (c < width)
    offgrid = np.bincount(u[~on], weights=w[~on], minlength=n_units).astype(np.float64)
    return _assemble(n_units, [(u[on], r[on], c[on], w[on])], offgrid)
