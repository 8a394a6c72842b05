"""Population proxies from night-time lights: dasymetric reallocation of zone totals.

Two ways to turn a night-light raster into a rough population count per unit:

:func:`reallocate`
    dasymetric reallocation: larger zones with known totals (district census
    counts) are spread over their pixels in proportion to light, or to lit
    area, and the allocated people are summed within each study unit. The
    allocated people of a zone sum to its total (volume preservation, the
    pycnophylactic property of Tobler 1979, JASA 74:519-530; the allocation
    itself is proportional, not Tobler's smoothing).
:func:`calibrate`
    a log-log regression ``log(pop) = a + b·log(light)`` fitted on units with
    a known count, predicting the others with a prediction interval and
    Duan's (1983, JASA 78:605-610) smearing back-transformation.

Both are proxies: lights miss poor unlit settlements and saturate in city
centres. Check them against a census before using them as denominators.

Nothing here opens a file: sources are raster-source objects (``grid``,
``read_block``, ``to_values``) and geometries are already in the raster's CRS.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np
import shapely

from covextract.core.grid import Grid
from covextract.engine.stream import stream_pass
from covextract.engine.weights import WeightSet
from covextract.engine.zonal import LOW_VALID_SHARE, PIXEL_RULES, build_weights
from covextract.errors import (
    CovextractWarning,
    GeometryError,
    RasterError,
    RecipeError,
    TableError,
)

__all__ = [
    "ALLOCATE_BY",
    "REALLOCATION_QA_CODES",
    "ReallocationWarning",
    "ReallocationResult",
    "reallocate",
]

#: What a zone's total is spread in proportion to.
ALLOCATE_BY = ("light", "lit_area")

#: Share of the zones' area covered by more than one zone above which
#: :func:`reallocate` warns (slivers along digitised borders stay below it).
ZONE_OVERLAP_WARN_SHARE = 1e-3

#: Share of a unit's area that may lie outside every zone before the unit
#: gets ``partly_outside_zones`` (below it: slivers and float noise).
OUTSIDE_ZONES_TOL = 1e-6

#: QA reason codes of :func:`reallocate`, with their meaning (for the codebook).
REALLOCATION_QA_CODES = {
    "outside_layer": (
        "the unit (or all of its part inside the zones) lies outside the light layer's grid; "
        "the value is missing"
    ),
    "partly_outside": (
        "part of the unit inside the zones lies outside the light layer's grid; that part "
        "receives nothing"
    ),
    "outside_zones": (
        "the unit overlaps no zone with a known total; the value is missing "
        "(0 would claim that nobody lives there)"
    ),
    "partly_outside_zones": (
        "part of the unit lies outside every zone with a known total; that part receives nothing"
    ),
    "no_valid_pixel": (
        "every pixel of the unit inside the zones is nodata in the light layer; "
        "the value is missing"
    ),
    "low_valid": (
        f"less than {LOW_VALID_SHARE:.0%} of the unit's area inside the zones has valid "
        "light pixels"
    ),
    "zone_low_valid": (
        f"part of the unit lies in a zone of which less than {LOW_VALID_SHARE:.0%} has valid "
        "light pixels (nodata or off the grid); that zone's whole total went to its valid "
        "part, so the value may be too high"
    ),
    "dark_zone": (
        "part of the unit lies in a zone without any light, whose total was spread "
        "evenly over the zone's area"
    ),
}


class ReallocationWarning(CovextractWarning):
    """Some zone totals could not be placed, or zones overlap."""


# ======================================================================
# Dasymetric reallocation
# ======================================================================


@dataclass
class ReallocationResult:
    """Population reallocated from zones to units.

    Attributes
    ----------
    values : ndarray of float64
        Per unit, the people allocated to it, in the units of the zone
        totals; NaN where the value is missing (see ``qa``).
    qa : list of list of str
        Per unit, codes of :data:`REALLOCATION_QA_CODES`.
    valid_share : ndarray of float64
        Per unit, the valid share of its part inside the zones: Σ valid
        coverage × area / Σ coverage × area, the part off the grid counting
        as invalid (0 where the unit has no part inside the zones).
    zone_allocated : ndarray of float64
        Per zone, the people allocated to its pixels, ``(T_z / S_z) · S_z``
        from the pass sums (or the even spread of a dark zone): the zone's
        total up to rounding (volume preservation), and 0 for
        ``unallocated_zones``. Units that partition a zone sum to the same
        total, which is the pixel-level check.
    zone_signal : ndarray of float64
        Per zone, Σ coverage × weight over its valid pixels: area-integrated
        radiance (radiance unit × km²) for ``by="light"``, lit area in km²
        for ``by="lit_area"``.
    zone_area_km2 : ndarray of float64
        Per zone, Σ coverage × true pixel area on the grid, km².
    zone_valid_share : ndarray of float64
        Per zone, valid area / area, the part off the grid counting as invalid.
    dark_zones : ndarray of int64
        Zones with valid pixels but no light (``zone_signal == 0``): their
        totals were spread evenly over their valid area.
    unallocated_zones : ndarray of int64
        Zones without any valid pixel on the grid; their totals are not placed.
    zone_overlap_share : float
        Area where zones overlap, as a share of the zones' total area
        (planar, in the raster's CRS).
    n_pieces : int
        Unit ∩ zone pieces the units were cut into.
    by, threshold, rule
        The settings used (``threshold`` as applied: 0 when none was given).
    blocks_read : int
        Raster blocks read (each block once).
    """

    values: np.ndarray
    qa: list
    valid_share: np.ndarray
    zone_allocated: np.ndarray
    zone_signal: np.ndarray
    zone_area_km2: np.ndarray
    zone_valid_share: np.ndarray
    dark_zones: np.ndarray
    unallocated_zones: np.ndarray
    zone_overlap_share: float = 0.0
    n_pieces: int = 0
    by: str = "light"
    threshold: float = 0.0
    rule: str = "overlap"
    blocks_read: int = 0


def reallocate(
    source,
    zone_geoms,
    zone_totals,
    unit_geoms,
    *,
    by: str = "light",
    threshold: float | None = None,
    rule: str = "overlap",
    zone_ids=None,
    zone_weights: WeightSet | None = None,
    threads: int | None = None,
    client=None,
    progress=None,
) -> ReallocationResult:
    """Spread zone totals over lit pixels and sum them within each unit.

    Each zone's total ``T_z`` is spread over the zone's valid pixels in
    proportion to ``c_z(p) · w(p)``, where ``c_z`` is the fraction of pixel
    ``p`` inside the zone and

    - ``by="light"``: ``w = L(p) · A(p)`` where ``L(p) > threshold``, else 0:
      the pixel's area-integrated radiance, so that pixel area (which shrinks
      with latitude on a lat/lon grid) does not bias the share;
    - ``by="lit_area"``: ``w = A(p)`` where ``L(p) > threshold``, else 0;

    with ``L`` the light (radiance) and ``A`` the true ground area of the
    pixel. The part of pixel ``p`` inside zone ``z`` thus receives
    ``T_z · c_z(p) w(p) / S_z`` with ``S_z = Σ_q c_z(q) w(q)``. A zone whose
    valid pixels hold no light (``S_z = 0``, a *dark* zone) spreads its total
    evenly over its valid area (``w = A``). People are uniform within the
    part of a pixel inside one zone, so a unit receives, from each zone it
    overlaps, ``(T_z / S_z) · Σ_p c_{u∩z}(p) w(p)`` where ``c_{u∩z}`` is the
    coverage of the piece ``unit ∩ zone``. Units that partition a zone
    therefore sum exactly to the zone's total, even where the zone boundary
    cuts pixels (with the ``overlap`` rule).

    Parameters
    ----------
    source : RasterSource-like
        The light layer (``grid``, ``read_block(window)``, ``to_values``);
        radiance, e.g. nW·cm⁻²·sr⁻¹. Nodata pixels receive nothing.
    zone_geoms : sequence of shapely polygons
        Zones with known totals, in the raster's CRS. They should not
        overlap (overlaps are measured, see ``zone_overlap_share``).
    zone_totals : array-like of float
        Known total per zone (people), one per zone, finite and >= 0.
    unit_geoms : sequence of shapely polygons or None
        Study units in the raster's CRS; any shapes, overlapping allowed,
        need not partition the zones. ``None`` or empty gives a missing value
        without a code (the unit builder records why).
    by : {"light", "lit_area"}
        What the totals are spread in proportion to.
    threshold : float, optional
        Light at or below it counts as unlit (background light is usually
        thresholded away, common practice); must be >= 0. Default 0: zero
        and negative radiance (noise of background-subtracted composites)
        carry no weight.
    rule : {"overlap", "center", "touched"}
        Pixel rule of the unit pieces. Zones always use ``overlap``, which
        splits a border pixel between neighbouring zones by area. Volume is
        preserved exactly under partitions only with ``overlap``.
    zone_ids : sequence, optional
        Zone identifiers, used in messages only.
    zone_weights : WeightSet, optional
        Prebuilt ``overlap`` weights of the zones on ``source.grid`` (from the
        weight cache); built when omitted.
    threads : int, optional
        Local threads for the block tasks (default: the machine's cores).
    client : distributed.Client, optional
        Run the block tasks on a dask.distributed cluster.
    progress : callable, optional
        Called with the number of blocks finished.

    Returns
    -------
    ReallocationResult

    Raises
    ------
    TableError
        A total is missing, infinite or negative, or there is not one total per zone.
    GeometryError
        A zone has no geometry, or zones or units are not valid polygons.
    RecipeError
        ``by``, ``rule`` or ``threshold`` is unusable.
    RasterError
        Prebuilt zone weights belong to another grid or rule.

    Warns
    -----
    ReallocationWarning
        Zones with a positive total have no valid pixel on the grid (their
        totals are not placed) or valid light over less than half their
        area (their totals crowd into the valid part), or zones overlap over
        more than 0.1 % of their area.

    Notes
    -----
    The allocation is linear in the pixels, so one block-streamed pass is
    enough: the units are cut into pieces ``unit ∩ zone`` (shapely, with an
    STRtree; a unit inside one zone is its own piece), and one weight set
    holds the pieces and the zones. The engine's pass sums, per row,
    Σ c·L'·A (``density_total`` of the thresholded light L'), Σ c·A over lit
    pixels (``area_above`` 0 of L'), the valid area and the whole area; the
    zone factors ``T_z / S_z`` are applied afterwards. Each block under a
    zone or a unit is read once. Blocks are merged in a fixed order: the
    values do not depend on ``threads``.
    """
    if by not in ALLOCATE_BY:
        raise RecipeError(
            f"unknown reallocation weight by={by!r}; choose one of {', '.join(ALLOCATE_BY)}"
        )
    if rule not in PIXEL_RULES:
        raise RecipeError(
            f"unknown pixel rule {rule!r} for reallocation; choose one of {', '.join(PIXEL_RULES)}"
        )
    thr = 0.0 if threshold is None else float(threshold)
    if not (math.isfinite(thr) and thr >= 0):
        raise RecipeError(
            f"the light threshold must be a number >= 0, got {threshold!r}: light at or below it "
            "counts as unlit, and negative radiance never carries people"
        )
    grid = source.grid
    zones = _geometry_array(zone_geoms)
    units = _geometry_array(unit_geoms)
    n_z = zones.size
    totals = _check_totals(zone_totals, n_z, zone_ids)
    _check_zone_geometries(zones, zone_ids)

    if zone_weights is None:
        try:
            zone_weights = build_weights(zones, grid, "overlap")
        except GeometryError as exc:
            raise GeometryError(f"zone polygons: {exc}") from exc
    elif (
        zone_weights.grid_fingerprint != grid.fingerprint
        or zone_weights.rule != "overlap"
        or zone_weights.n_units != n_z
    ):
        raise RasterError(
            f"the prebuilt zone weights ({zone_weights.n_units} zones, rule "
            f"{zone_weights.rule!r}) do not fit: reallocation needs 'overlap' weights of the "
            f"{n_z} zones on the light layer's grid ({grid.width}x{grid.height}); rebuild them"
        )
    _check_units(units)
    piece_unit, piece_zone, pieces, outside_part = _cut_units(units, zones)
    n_p = pieces.size
    piece_weights = build_weights(pieces, grid, rule)
    combined = _combine(piece_weights, zone_weights, grid)

    acc, pstats = stream_pass(
        combined,
        grid,
        _ThresholdedLight(source, thr),
        weighting=True,
        thresholds=(0.0,),
        threads=threads,
        client=client,
        progress=progress,
    )
    signal_all = acc.dens if by == "light" else acc.above_area[0.0]
    valid_all = acc.w / 1e6  # weighting on: w = c·A in m², over valid pixels
    offgrid_all = _offgrid_km2(combined, acc.area_all)

    z = slice(n_p, n_p + n_z)
    signal, valid_area, area_all = signal_all[z], valid_all[z], acc.area_all[z]
    allocatable = valid_area > 0
    dark = allocatable & ~(signal > 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        f_signal = np.where(signal > 0, totals / signal, 0.0)
        f_even = np.where(dark, totals / valid_area, 0.0)
    zone_allocated = f_signal * signal + f_even * valid_area
    zone_denom = area_all + offgrid_all[z]
    with np.errstate(invalid="ignore", divide="ignore"):
        zone_valid_share = np.where(zone_denom > 0, valid_area / zone_denom, 0.0)

    p = slice(0, n_p)
    piece_people = f_signal[piece_zone] * signal_all[p] + f_even[piece_zone] * valid_all[p]
    low_zone = allocatable & (zone_valid_share < LOW_VALID_SHARE)
    piece_flags = {
        "zone_low_valid": low_zone[piece_zone] & (valid_all[p] > 0),
        "dark_zone": dark[piece_zone] & (valid_all[p] > 0),
    }
    values, qa, vshare = _unit_results(
        units,
        grid,
        piece_unit,
        piece_people,
        piece_flags,
        valid_all[p],
        acc.area_all[p],
        piece_weights,
        offgrid_all[p],
        outside_part,
    )

    unplaced = np.flatnonzero(~allocatable & (totals > 0))
    if unplaced.size:
        warnings.warn(
            f"{unplaced.size} zone(s) with a positive total have no valid light pixel on the "
            f"grid, so their totals are not placed: {_zone_labels(unplaced, zone_ids)}. Check "
            "that the zones lie on the light layer and that its nodata value is right",
            ReallocationWarning,
            stacklevel=2,
        )
    thin = np.flatnonzero(low_zone & (totals > 0))
    if thin.size:
        warnings.warn(
            f"{thin.size} zone(s) have valid light over less than {LOW_VALID_SHARE:.0%} of "
            f"their area (nodata or off the grid): {_zone_labels(thin, zone_ids)}. Their "
            "totals are spread over the valid part only; units there carry the QA code "
            "'zone_low_valid'. Use a light layer that covers the zones",
            ReallocationWarning,
            stacklevel=2,
        )
    overlap_share = _zone_overlap_share(zones)
    if overlap_share > ZONE_OVERLAP_WARN_SHARE:
        warnings.warn(
            f"zones overlap over {overlap_share:.2%} of their area; people there are counted "
            "once for each zone covering them, so units there are overcounted. Fix the zone "
            "boundaries (each place should belong to one zone)",
            ReallocationWarning,
            stacklevel=2,
        )
    return ReallocationResult(
        values=values,
        qa=qa,
        valid_share=vshare,
        zone_allocated=zone_allocated,
        zone_signal=signal.copy(),
        zone_area_km2=area_all.copy(),
        zone_valid_share=zone_valid_share,
        dark_zones=np.flatnonzero(dark).astype(np.int64),
        unallocated_zones=np.flatnonzero(~allocatable).astype(np.int64),
        zone_overlap_share=overlap_share,
        n_pieces=int(n_p),
        by=by,
        threshold=thr,
        rule=rule,
        blocks_read=pstats.blocks,
    )


# ------------------------------------------------------------ validation
def _geometry_array(geoms) -> np.ndarray:
    if isinstance(geoms, shapely.Geometry):
        raise GeometryError(
            "pass a sequence of geometries (one per zone or unit), not a single geometry"
        )
    if hasattr(geoms, "geometry") and hasattr(geoms, "crs"):  # GeoDataFrame
        geoms = geoms.geometry
    items = list(geoms)
    bad = [i for i, g in enumerate(items) if g is not None and not isinstance(g, shapely.Geometry)]
    if bad:
        raise GeometryError(
            f"items at positions {bad[:10]} are not shapely geometries (first one: "
            f"{type(items[bad[0]]).__name__}); convert them with shapely.geometry.shape"
        )
    out = np.empty(len(items), dtype=object)
    out[:] = items
    return out


def _zone_label(i: int, zone_ids) -> str:
    if zone_ids is None:
        return f"zone {i}"
    return f"zone {zone_ids[i]!r} (position {i})"


def _zone_labels(idx, zone_ids, limit: int = 5) -> str:
    idx = list(idx)
    text = ", ".join(_zone_label(int(i), zone_ids) for i in idx[:limit])
    return text + (f" and {len(idx) - limit} more" if len(idx) > limit else "")


def _check_totals(zone_totals, n_z: int, zone_ids) -> np.ndarray:
    try:
        totals = np.asarray(zone_totals, dtype=np.float64).ravel()
    except (TypeError, ValueError) as exc:
        raise TableError(
            f"zone totals must be numbers (people per zone): {exc}. Convert the totals "
            "column to numbers first"
        ) from exc
    if totals.size != n_z:
        raise TableError(
            f"{totals.size} zone totals were given for {n_z} zone polygons; give exactly one "
            "total per zone, in the order of the polygons"
        )
    if zone_ids is not None and len(zone_ids) != n_z:
        raise TableError(f"{len(zone_ids)} zone ids were given for {n_z} zone polygons")
    missing = np.flatnonzero(~np.isfinite(totals))
    if missing.size:
        raise TableError(
            f"{missing.size} zone(s) have no usable total (missing or infinite): "
            f"{_zone_labels(missing, zone_ids)}. Every zone needs a known total; add it to the "
            "totals table or drop the zone"
        )
    negative = np.flatnonzero(totals < 0)
    if negative.size:
        first = int(negative[0])
        raise TableError(
            f"{negative.size} zone(s) have a negative total: {_zone_labels(negative, zone_ids)} "
            f"(the first has {totals[first]:g}); totals are counts and must be >= 0"
        )
    return totals


def _check_zone_geometries(zones: np.ndarray, zone_ids) -> None:
    absent = [i for i, g in enumerate(zones) if g is None or g.is_empty]
    if absent:
        raise GeometryError(
            f"{len(absent)} zone(s) have no geometry: {_zone_labels(absent, zone_ids)}; "
            "their totals cannot be placed. Give every zone with a total a polygon, or "
            "drop it from the totals"
        )


# ------------------------------------------------------------- geometry
def _polygonal(g):
    """Return the polygonal part of an intersection result (``None`` without area)."""
    if g is None or g.is_empty:
        return None
    if g.geom_type in ("Polygon", "MultiPolygon"):
        out = g
    else:  # lines and points where the unit only touches the zone
        polys = [q for q in shapely.get_parts(g) if q.geom_type in ("Polygon", "MultiPolygon")]
        if not polys:
            return None
        out = shapely.union_all(polys)
    if not out.is_valid:
        return _polygonal(shapely.make_valid(out))
    return out if out.area > 0 else None


def _cut_units(units: np.ndarray, zones: np.ndarray):
    """Cut units into pieces ``unit ∩ zone``.

    Returns the unit and zone of each piece (sorted by unit, then zone), the
    pieces, and per unit whether a part of it (more than
    :data:`OUTSIDE_ZONES_TOL` of its area) lies outside every zone.
    """
    n_u = units.size
    present = np.flatnonzero([g is not None and not g.is_empty for g in units])
    outside_part = np.zeros(n_u, dtype=bool)
    if present.size == 0:
        return (
            np.zeros(0, np.int64),
            np.zeros(0, np.int64),
            np.empty(0, dtype=object),
            outside_part,
        )
    tree = shapely.STRtree(zones)
    hit = tree.query(units[present], predicate="intersects")
    pu = present[hit[0]].astype(np.int64)
    pz = hit[1].astype(np.int64)
    order = np.lexsort((pz, pu))
    pu, pz = pu[order], pz[order]
    inside = shapely.covers(zones[pz], units[pu])
    pieces = np.empty(pu.size, dtype=object)
    pieces[inside] = units[pu[inside]]
    cut = np.flatnonzero(~inside)
    if cut.size:
        raw = shapely.intersection(units[pu[cut]], zones[pz[cut]])
        pieces[cut] = [_polygonal(g) for g in raw]
    keep = np.array([g is not None for g in pieces], dtype=bool)
    pu, pz, pieces, inside = pu[keep], pz[keep], pieces[keep], inside[keep]

    # A unit inside one zone has no outside part; the others compare the
    # union of their pieces with their own area.
    covered = np.zeros(n_u, dtype=bool)
    covered[pu[inside]] = True
    first = np.searchsorted(pu, np.arange(n_u + 1))
    for i in present[~covered[present]]:
        mine = pieces[first[i] : first[i + 1]]
        area = units[i].area
        inner = shapely.union_all(mine).area if mine.size else 0.0
        outside_part[i] = area - inner > OUTSIDE_ZONES_TOL * area
    return pu, pz, pieces, outside_part


def _check_units(units: np.ndarray) -> None:
    """Units must be valid polygons before they are cut by the zones."""
    present = np.flatnonzero([g is not None and not g.is_empty for g in units])
    if present.size == 0:
        return
    kinds = shapely.get_type_id(units[present])
    wrong = present[(kinds != 3) & (kinds != 6)]  # shapely ids of Polygon, MultiPolygon
    if wrong.size:
        raise GeometryError(
            f"units at positions {wrong[:10].tolist()} are not polygons (first one: "
            f"{units[wrong[0]].geom_type}); reallocation needs Polygon or MultiPolygon units: "
            "buffer points first"
        )
    bad = present[~shapely.is_valid(units[present])]
    if bad.size:
        raise GeometryError(
            f"units at positions {bad[:10].tolist()} are invalid polygons (first one: "
            f"{shapely.is_valid_reason(units[bad[0]])}); repair them (shapely.make_valid) first"
        )


def _zone_overlap_share(zones: np.ndarray) -> float:
    """Planar area where zones overlap, as a share of their summed area."""
    total = float(shapely.area(zones).sum())
    if total <= 0 or zones.size < 2:
        return 0.0
    tree = shapely.STRtree(zones)
    a, b = tree.query(zones, predicate="intersects")
    pair = a < b
    if not pair.any():
        return 0.0
    inter = shapely.intersection(zones[a[pair]], zones[b[pair]])
    return float(shapely.area(inter).sum()) / total


# ------------------------------------------------------------------ pass
class _ThresholdedLight:
    """The light layer with unlit pixels (light <= threshold) set to 0, validity unchanged.

    Picklable when the wrapped source is; used so that the engine's
    ``density_total`` and ``area_above`` (at 0) give the allocation weights.
    """

    def __init__(self, source, threshold: float) -> None:
        self.source = source
        self.threshold = threshold
        self.grid = source.grid

    def read_block(self, window):
        """Read stored values of the light layer."""
        return self.source.read_block(window)

    def to_values(self, stored):
        """Light where it exceeds the threshold, 0 elsewhere; the layer's valid mask."""
        values, valid = self.source.to_values(stored)
        with np.errstate(invalid="ignore"):
            lit = valid & (values > self.threshold)
        return np.where(lit, values, 0.0), valid


def _combine(first: WeightSet, second: WeightSet, grid: Grid) -> WeightSet:
    """One weight set: rows of ``first`` (0..n-1), then rows of ``second`` (n + j).

    Both sets are grouped by the grid's block lattice, so each block holding
    entries of either is read once; blocks keep the grid's row-major order.
    """
    lattice = grid.block_windows()
    ordinal = {tuple(int(x) for x in w): i for i, w in enumerate(lattice)}

    def block_ids(ws: WeightSet) -> np.ndarray:
        try:
            return np.array([ordinal[tuple(int(x) for x in w)] for w in ws.windows], dtype=np.int64)
        except KeyError as exc:
            raise RasterError(
                f"weights hold block {exc.args[0]}, which is not a block of the light layer's "
                f"grid (blocks of {grid.block_shape}); rebuild the weights for this layer"
            ) from None

    ids_a, ids_b = block_ids(first), block_ids(second)
    ids = np.union1d(ids_a, ids_b)

    def group(starts_a, starts_b, arrays_a, arrays_b):
        """Items of both sets grouped by block (first's before second's), with offsets."""
        key = np.concatenate(
            [np.repeat(ids_a, np.diff(starts_a)), np.repeat(ids_b, np.diff(starts_b))]
        )
        order = np.argsort(key, kind="stable")
        offsets = np.searchsorted(key[order], ids, side="left")
        offsets = np.append(offsets, key.size).astype(np.int64)
        merged = [np.concatenate([x, y])[order] for x, y in zip(arrays_a, arrays_b, strict=True)]
        return offsets, merged

    shift = first.n_units
    starts, (unit, pix, cov) = group(
        first.starts,
        second.starts,
        (first.unit.astype(np.int64), first.pix, first.cov.astype(np.float64)),
        (second.unit.astype(np.int64) + shift, second.pix, second.cov.astype(np.float64)),
    )
    run_starts, (run_unit, run_pix, run_len) = group(
        first.run_starts,
        second.run_starts,
        (first.run_unit.astype(np.int64), first.run_pix, first.run_len),
        (second.run_unit.astype(np.int64) + shift, second.run_pix, second.run_len),
    )
    return WeightSet(
        n_units=first.n_units + second.n_units,
        grid_fingerprint=grid.fingerprint,
        rule=f"{first.rule}+{second.rule}",
        windows=[lattice[i] for i in ids],
        starts=starts,
        unit=unit.astype(np.int32),
        pix=pix.astype(np.int32),
        cov=cov,
        offgrid=np.concatenate([first.offgrid, second.offgrid]).astype(np.float64),
        run_starts=run_starts,
        run_unit=run_unit.astype(np.int32),
        run_pix=run_pix.astype(np.int32),
        run_len=run_len.astype(np.int32),
    )


def _offgrid_km2(weights: WeightSet, area_all_km2: np.ndarray) -> np.ndarray:
    """Each row's off-grid coverage in km², at the mean area of its on-grid pixels."""
    cov_on = weights.coverage_totals()
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_area = np.where(cov_on > 0, area_all_km2 / cov_on, 0.0)
    return weights.offgrid * mean_area


def _unit_results(
    units,
    grid,
    piece_unit,
    piece_people,
    piece_flags,
    piece_valid,
    piece_area,
    piece_weights,
    piece_offgrid,
    outside_part,
):
    """Per unit: value, QA codes and valid share from its pieces."""
    n = units.size

    def total(weights):  # float even without pieces (bincount of nothing gives ints)
        return np.bincount(piece_unit, weights=weights, minlength=n).astype(np.float64)

    values = total(piece_people)
    valid = total(piece_valid)
    area = total(piece_area)
    offgrid = total(piece_offgrid)
    flags = {code: total(f.astype(np.float64)) > 0 for code, f in piece_flags.items()}
    n_pieces = np.bincount(piece_unit, minlength=n)
    cov_on = total(piece_weights.coverage_totals())
    off_cov = total(piece_weights.offgrid)
    denom = area + offgrid
    with np.errstate(invalid="ignore", divide="ignore"):
        vshare = np.where(denom > 0, valid / denom, 0.0)
    meets = _meets_grid(units, grid)
    qa = []
    for i in range(n):
        g = units[i]
        if g is None or g.is_empty:
            values[i] = np.nan
            qa.append([])
            continue
        if n_pieces[i] == 0:
            values[i] = np.nan
            qa.append(["outside_zones"] if meets[i] else ["outside_layer"])
            continue
        if cov_on[i] <= 0:
            values[i] = np.nan
            qa.append(["outside_layer"])
            continue
        codes = []
        if off_cov[i] > 1e-9 * max(cov_on[i], 1.0):
            codes.append("partly_outside")
        if outside_part[i]:
            codes.append("partly_outside_zones")
        if valid[i] <= 0:
            values[i] = np.nan
            codes.append("no_valid_pixel")
        else:
            if vshare[i] < LOW_VALID_SHARE:
                codes.append("low_valid")
            codes.extend(code for code, f in flags.items() if f[i])
        qa.append(codes)
    return values, qa, vshare


def _meets_grid(units: np.ndarray, grid: Grid) -> np.ndarray:
    """Per unit: its bounding box meets the grid's extent."""
    out = np.zeros(units.size, dtype=bool)
    have = np.flatnonzero([g is not None and not g.is_empty for g in units])
    if have.size:
        b = shapely.bounds(units[have])
        gx0, gy0, gx1, gy1 = grid.bounds
        out[have] = (b[:, 0] < gx1) & (b[:, 2] > gx0) & (b[:, 1] < gy1) & (b[:, 3] > gy0)
    return out


# ======================================================================
# Calibration: log(pop) = a + b·log(light)
# ======================================================================
