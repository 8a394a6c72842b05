"""Tests of the coverage kernels (covextract.engine.coverage).

References named beside each check:

- overlap weights: shapely 2, ``intersection(pixel_box, polygon).area /
  pixel_box.area`` computed in pixel coordinates (pixel area 1);
- center / touched pixel sets: ``rasterio.features.rasterize`` with
  ``all_touched=False`` / ``True`` (GDAL's rasterizer, alg/llrasterize.cpp);
- point values: rasterstats ``point_query`` (rasterstats/point.py).

Hand-worked fixtures use the identity transform, where pixel ``(r, c)`` is the
square ``[c, c+1] x [r, r+1]``.
"""

from __future__ import annotations

import time

import numpy as np
import pytest
import rasterio
import shapely
from affine import Affine
from numpy.testing import assert_allclose, assert_array_equal
from rasterio.features import rasterize
from rasterstats import point_query
from shapely.geometry import MultiPolygon, Point, Polygon, box

from covextract.engine import coverage as cov_mod
from covextract.engine.coverage import Coverage, point_coverage, polygon_coverage
from covextract.errors import GeometryError, RasterError, RecipeError, TableError

IDENTITY = Affine.identity()
#: north-up, non-square pixels (30 m x 20 m), origin off the integer lattice
NORTH_UP = Affine(30.0, 0.0, 500123.7, 0.0, -20.0, 8000456.3)


# ------------------------------------------------------------------ helpers
def to_pixels(geom, transform):
    """The geometry in pixel coordinates, same arithmetic as ``~transform * (x, y)``."""
    inv = ~transform
    return shapely.transform(
        geom,
        lambda xy: np.column_stack(
            (
                xy[:, 0] * inv.a + xy[:, 1] * inv.b + inv.c,
                xy[:, 0] * inv.d + xy[:, 1] * inv.e + inv.f,
            )
        ),
    )


def apply(transform, col, row):
    """``transform * (col, row)`` for arrays, written out (Affine ``*`` is deprecated there)."""
    t = transform
    return col * t.a + row * t.b + t.c, col * t.d + row * t.e + t.f


def to_world(geom_px, transform):
    return shapely.transform(
        geom_px, lambda xy: np.column_stack(apply(transform, xy[:, 0], xy[:, 1]))
    )


def dense(cov: Coverage, unit: int, height: int, width: int) -> np.ndarray:
    out = np.zeros((height, width))
    sel = cov.unit == unit
    out[cov.row[sel], cov.col[sel]] = cov.weight[sel]
    return out


def shapely_fractions(geom_px, height: int, width: int) -> np.ndarray:
    """Reference: shapely 2 intersection area of every pixel box (area 1)."""
    rr, cc = np.mgrid[0:height, 0:width]
    boxes = shapely.box(cc, rr, cc + 1, rr + 1)
    return shapely.area(shapely.intersection(boxes, geom_px))


def assert_well_formed(cov: Coverage, width: int, height: int) -> None:
    assert cov.unit.dtype == np.int64 and cov.row.dtype == np.int64
    assert cov.col.dtype == np.int64 and cov.weight.dtype == np.float64
    assert cov.offgrid.shape == (cov.n_units,)
    assert ((cov.row >= 0) & (cov.row < height)).all()
    assert ((cov.col >= 0) & (cov.col < width)).all()
    assert ((cov.weight > 0) & (cov.weight <= 1)).all()
    assert ((cov.unit >= 0) & (cov.unit < cov.n_units)).all()
    key = (cov.unit * height + cov.row) * width + cov.col
    assert (np.diff(key) > 0).all(), "entries must be sorted by (unit, row, col), no duplicates"


def star(rng, cx, cy, n, rmin, rmax):
    """A random star-shaped (hence simple) polygon around (cx, cy)."""
    ang = np.sort(rng.uniform(0.0, 2 * np.pi, n))
    rad = rng.uniform(rmin, rmax, n)
    return Polygon(np.column_stack([cx + rad * np.cos(ang), cy + rad * np.sin(ang)]))


def check_against_shapely(geom_world, transform, width, height, rule_tol=1e-9):
    cov = polygon_coverage([geom_world], transform, width, height)
    assert_well_formed(cov, width, height)
    gp = to_pixels(geom_world, transform)
    # reference: shapely 2 intersection(pixel_box, polygon).area, pixel coordinates
    assert_allclose(
        dense(cov, 0, height, width), shapely_fractions(gp, height, width), rtol=0, atol=rule_tol
    )
    # sum of weights + off-grid part = polygon area / pixel area (shapely area)
    assert_allclose(cov.weight.sum() + cov.offgrid[0], gp.area, rtol=1e-9)
    return cov


# ------------------------------------------------------------ overlap rule
def test_square_on_pixel_lines_has_weights_exactly_one():
    # hand-worked: the square [2,5]x[2,5] covers the 3x3 pixels of rows/cols 2..4 fully
    cov = polygon_coverage([box(2, 2, 5, 5)], IDENTITY, 10, 10)
    assert_array_equal(cov.weight, np.ones(9))
    assert_array_equal(cov.row, np.repeat([2, 3, 4], 3))
    assert_array_equal(cov.col, np.tile([2, 3, 4], 3))
    assert_array_equal(cov.offgrid, [0.0])
    check_against_shapely(box(2, 2, 5, 5), IDENTITY, 10, 10)


def test_half_pixel_strip_hand_worked():
    # hand-worked: [0.5, 2] x [0, 1] is half of pixel (0,0) and all of pixel (0,1)
    cov = polygon_coverage([box(0.5, 0, 2, 1)], IDENTITY, 4, 4)
    assert_array_equal(cov.col, [0, 1])
    assert_allclose(cov.weight, [0.5, 1.0], rtol=0, atol=1e-15)


def test_triangle():
    tri = Polygon([(1.3, 1.2), (8.7, 3.1), (4.4, 9.9)])
    cov = check_against_shapely(tri, IDENTITY, 12, 12)
    # shoelace by hand: |(8.7-1.3)(9.9-1.2) - (4.4-1.3)(3.1-1.2)| / 2 = 29.245
    assert_allclose(cov.weight.sum(), 29.245, rtol=1e-12)


def test_ring_orientation_does_not_matter():
    tri = [(1.3, 1.2), (8.7, 3.1), (4.4, 9.9)]
    a = polygon_coverage([Polygon(tri)], IDENTITY, 12, 12)
    b = polygon_coverage([Polygon(tri[::-1])], IDENTITY, 12, 12)
    assert_array_equal(a.row, b.row)
    assert_array_equal(a.col, b.col)
    assert_allclose(a.weight, b.weight, rtol=0, atol=1e-14)


def test_polygon_with_hole():
    # holes given in both orientations: shapely does not normalise them
    outer = box(1, 1, 9, 9).exterior.coords
    for hole_ccw in (True, False):
        hole = box(3.3, 3.3, 6.1, 6.7, ccw=hole_ccw).exterior.coords
        cov = check_against_shapely(Polygon(outer, [hole]), IDENTITY, 10, 10)
        # hand-worked: 8*8 - 2.8*3.4 = 54.48
        assert_allclose(cov.weight.sum(), 54.48, rtol=1e-12)
        # pixel (4,4) lies wholly inside the hole
        assert not ((cov.row == 4) & (cov.col == 4)).any()


def test_multipolygon():
    mp = MultiPolygon([box(1, 1, 3.5, 3.5), box(5.2, 5.2, 9.9, 7.1, ccw=False)])
    cov = check_against_shapely(mp, IDENTITY, 10, 10)
    # hand-worked: 2.5*2.5 + 4.7*1.9 = 15.18
    assert_allclose(cov.weight.sum(), 15.18, rtol=1e-12)


def test_polygon_smaller_than_a_pixel():
    cov = check_against_shapely(box(2.1, 2.2, 2.4, 2.9), IDENTITY, 5, 5)
    # hand-worked: one pixel, 0.3 * 0.7 of it
    assert_array_equal(cov.row, [2])
    assert_array_equal(cov.col, [2])
    assert_allclose(cov.weight, [0.21], rtol=1e-12)


@pytest.mark.parametrize(
    ("geom", "outside"),
    [
        # hand-worked: 7.9 x 7.3 = 57.67 in all, 4.4 x 5.1 = 22.44 on the grid
        (box(-3.5, -2.2, 4.4, 5.1), 57.67 - 22.44),
        # beyond the right and bottom edges of a 10 x 10 grid: 5.5 x 6.5 = 35.75,
        # on the grid 2.5 x 3.5 = 8.75
        (box(7.5, 6.5, 13.0, 13.0), 35.75 - 8.75),
        # wholly off the grid
        (box(20, 20, 23, 22), 6.0),
    ],
)
def test_polygon_straddling_the_grid_edge(geom, outside):
    cov = check_against_shapely(geom, IDENTITY, 10, 10)
    assert_allclose(cov.offgrid, [outside], rtol=1e-12)


def test_offgrid_equals_shapely_area_outside_for_a_star():
    rng = np.random.default_rng(11)
    g = star(rng, 1.0, 18.0, 25, 3.0, 9.0)
    cov = check_against_shapely(g, IDENTITY, 20, 20)
    # reference: shapely area of the polygon minus its part on the grid
    inside = shapely.intersection(g, box(0, 0, 20, 20)).area
    assert_allclose(cov.offgrid[0], g.area - inside, rtol=1e-9)


def test_random_star_polygons_north_up_non_square_pixels():
    """Random stars (fixed seed) on a north-up grid with 30 m x 20 m pixels."""
    rng = np.random.default_rng(20240501)
    width, height = 40, 30
    geoms_px = []
    for _ in range(25):
        g = star(
            rng,
            rng.uniform(-5, 45),
            rng.uniform(-5, 35),
            int(rng.integers(3, 40)),
            0.2,
            rng.uniform(0.5, 15),
        )
        if rng.random() < 0.3 and g.area > 4:
            inner = shapely.affinity.scale(g, 0.4, 0.4, origin=g.centroid)
            if g.contains(inner):
                g = Polygon(g.exterior.coords, [inner.exterior.coords])
        geoms_px.append(g)
    geoms = [to_world(g, NORTH_UP) for g in geoms_px]
    cov = polygon_coverage(geoms, NORTH_UP, width, height)
    assert_well_formed(cov, width, height)
    for i, g in enumerate(geoms):
        gp = to_pixels(g, NORTH_UP)
        # reference: shapely 2 intersection areas in pixel coordinates
        assert_allclose(
            dense(cov, i, height, width), shapely_fractions(gp, height, width), rtol=0, atol=1e-9
        )
        # reference: shapely area in CRS units / pixel area (30 * 20 m²)
        assert_allclose(cov.weight[cov.unit == i].sum() + cov.offgrid[i], g.area / 600.0, rtol=1e-9)


def test_rotated_grid():
    # any invertible affine works in pixel coordinates
    t = Affine(8.0, 3.0, 100.0, 2.0, -9.0, 400.0)
    g = to_world(star(np.random.default_rng(5), 9.0, 7.0, 17, 2.0, 6.0), t)
    check_against_shapely(g, t, 20, 16)


def test_many_passes_give_the_same_weights(monkeypatch):
    rng = np.random.default_rng(3)
    geoms = [star(rng, rng.uniform(0, 50), rng.uniform(0, 50), 30, 2, 12) for _ in range(30)]
    one = polygon_coverage(geoms, IDENTITY, 50, 50)
    monkeypatch.setattr(cov_mod, "_MAX_PIECES_PER_PASS", 200)
    many = polygon_coverage(geoms, IDENTITY, 50, 50)
    for name in ("unit", "row", "col"):
        assert_array_equal(getattr(one, name), getattr(many, name))
    assert_allclose(one.weight, many.weight, rtol=0, atol=1e-15)
    assert_allclose(one.offgrid, many.offgrid, rtol=0, atol=1e-12)
    # the center kernel in groups too: the same runs
    monkeypatch.undo()
    one = polygon_coverage(geoms, IDENTITY, 50, 50, "center", runs=True)
    monkeypatch.setattr(cov_mod, "_MAX_PIECES_PER_PASS", 200)
    many = polygon_coverage(geoms, IDENTITY, 50, 50, "center", runs=True)
    for a, b in zip(one.runs, many.runs, strict=True):
        assert_array_equal(a, b)
    assert one.runs[0].size > 100
    assert_array_equal(one.offgrid, many.offgrid)


def test_missing_and_empty_units_keep_their_place():
    geoms = [None, box(1, 1, 2, 2), Polygon(), box(3, 3, 4, 5)]
    cov = polygon_coverage(geoms, IDENTITY, 6, 6)
    assert cov.n_units == 4
    assert_array_equal(cov.unit, [1, 3, 3])
    assert_array_equal(cov.row, [1, 3, 4])
    assert_array_equal(cov.offgrid, np.zeros(4))
    nothing = polygon_coverage([None, Polygon()], IDENTITY, 6, 6, "center")
    assert nothing.weight.size == 0
    assert_array_equal(nothing.offgrid, [0.0, 0.0])


def test_floor_drops_float_noise_only():
    # a sliver of area 1e-12 pixel: below the default floor, kept with floor=0
    sliver = Polygon([(2.2, 2.2), (2.2 + 2e-6, 2.2), (2.2, 2.2 + 1e-6)])
    assert polygon_coverage([sliver], IDENTITY, 5, 5).weight.size == 0
    kept = polygon_coverage([sliver], IDENTITY, 5, 5, floor=0.0)
    assert_allclose(kept.weight, [1e-12], rtol=1e-6)
    # but the sliver's boundary runs through the pixel, so it counts as touched
    touched = polygon_coverage([sliver], IDENTITY, 5, 5, "touched")
    assert_array_equal(touched.row, [2])


def test_geodataframe_input():
    gpd = pytest.importorskip("geopandas")
    gdf = gpd.GeoDataFrame({"id": ["a", "b"]}, geometry=[box(0, 0, 1, 1), box(1, 1, 3, 2)])
    cov = polygon_coverage(gdf, IDENTITY, 4, 4)
    assert_array_equal(cov.unit, [0, 1, 1])


def test_perf_sanity_200_village_polygons():
    # ~30 x 30 pixel polygons of 40 vertices; measured ~0.25 ms each, bound is 10 ms
    rng = np.random.default_rng(8)
    geoms = [star(rng, rng.uniform(20, 980), rng.uniform(20, 980), 40, 13, 15) for _ in range(200)]
    t0 = time.perf_counter()
    polygon_coverage(geoms, IDENTITY, 1000, 1000)
    assert time.perf_counter() - t0 < 2.0


# --------------------------------------------------------- center / touched
def _axis_clear(g_px, eps=0.01) -> bool:
    """False if an edge is within ``eps`` pixel of axis-parallel (GDAL approximates those)."""
    for ring in [g_px.exterior, *g_px.interiors]:
        d = np.abs(np.diff(np.asarray(ring.coords), axis=0))
        if (d < eps).any():
            return False
    return True


def _random_polygons(n, seed, width, height):
    """Random polygons in pixel coordinates: stars, stars with holes, two-part ones."""
    rng = np.random.default_rng(seed)
    out = []
    while len(out) < n:
        kind = rng.random()
        g = star(
            rng,
            rng.uniform(-5, width + 5),
            rng.uniform(-5, height + 5),
            int(rng.integers(3, 30)),
            0.5,
            rng.uniform(1, 20),
        )
        if kind < 0.25:
            inner = shapely.affinity.scale(g, 0.35, 0.35, origin=g.centroid)
            if g.contains(inner):
                g = Polygon(g.exterior.coords, [inner.exterior.coords[::-1]])
        elif kind < 0.45:
            h = star(rng, rng.uniform(0, width), rng.uniform(0, height), 8, 0.5, 6)
            if not g.intersects(h):
                g = MultiPolygon([g, h])
        parts = getattr(g, "geoms", [g])
        if g.is_valid and all(_axis_clear(p) for p in parts):
            out.append(g)
    return out


@pytest.mark.parametrize(("rule", "all_touched"), [("center", False), ("touched", True)])
def test_center_and_touched_equal_gdal_on_random_polygons(rule, all_touched):
    """Reference: rasterio.features.rasterize (GDAL), 50 random polygons, 60 x 60 grid."""
    width = height = 60
    transform = Affine(10.0, 0.0, 1000.0, 0.0, -10.0, 2000.0)
    geoms = [to_world(g, transform) for g in _random_polygons(50, 99, width, height)]
    cov = polygon_coverage(geoms, transform, width, height, rule)
    assert_well_formed(cov, width, height)
    assert_array_equal(cov.weight, np.ones(cov.weight.size))
    for i, g in enumerate(geoms):
        ref = rasterize(
            [(g, 1)],
            out_shape=(height, width),
            transform=transform,
            all_touched=all_touched,
            fill=0,
            dtype="uint8",
        )
        assert_array_equal(dense(cov, i, height, width), ref, err_msg=f"polygon {i}")


@pytest.mark.parametrize(
    "transform", [IDENTITY, Affine(1.0, 0, 0, 0, -1.0, 10.0), Affine(-1.0, 0, 10.0, 0, -1.0, 10.0)]
)
@pytest.mark.parametrize(
    "geom",
    [
        box(2, 2, 5, 5),  # edges on pixel lines
        box(2.5, 2.5, 5.5, 5.5),  # edges on pixel-centre lines, both orientations
        box(2.5, 2.5, 5.5, 5.5, ccw=False),
        Polygon([(1.5, 1.5), (7.5, 1.5), (4.5, 6.5)]),  # vertices on pixel centres
        Polygon(box(0.2, 0.2, 9.3, 9.3).exterior.coords, [box(3.5, 3.5, 6.5, 6.5).exterior.coords]),
        Polygon(
            box(0.2, 0.2, 9.3, 9.3).exterior.coords,
            [box(3.5, 3.5, 6.5, 6.5, ccw=False).exterior.coords],
        ),
        MultiPolygon([box(0.5, 0.5, 3.5, 3.5), box(5.5, 5.5, 8.5, 8.5, ccw=False)]),
    ],
)
def test_center_tie_rules_equal_gdal(geom, transform):
    """Centres exactly on edges: reference rasterio.features.rasterize(all_touched=False)."""
    cov = polygon_coverage([geom], transform, 10, 10, "center")
    ref = rasterize([(geom, 1)], out_shape=(10, 10), transform=transform, fill=0, dtype="uint8")
    assert_array_equal(dense(cov, 0, 10, 10), ref)


def test_touched_on_pixel_lines_equals_gdal():
    # reference: rasterize(all_touched=True); hand-worked: exactly the 3x3 block,
    # the pixels beyond the square's edges are not touched
    for g in (box(2, 2, 5, 5), box(2, 2, 5, 5, ccw=False)):
        cov = polygon_coverage([g], IDENTITY, 10, 10, "touched")
        ref = rasterize(
            [(g, 1)],
            out_shape=(10, 10),
            transform=IDENTITY,
            all_touched=True,
            fill=0,
            dtype="uint8",
        )
        assert_array_equal(dense(cov, 0, 10, 10), ref)
        assert cov.weight.size == 9


def test_touched_documented_gdal_difference_near_vertical_edge():
    """GDAL burns an edge within 0.01 px of vertical into one column only.

    GDALdllImageLineAllTouched (alg/llrasterize.cpp) treats |dx| < 0.01 as
    vertical and burns column floor(x_end). Here the edge x 4.995 -> 5.0049
    crosses x = 5 at y = 1.1, so it runs through pixels (0, 4) and (1, 4)
    before entering column 5. GDAL gets (0, 4) from the neighbouring, nearly
    horizontal edge, but misses (1, 4): a pixel that holds a piece of the
    boundary of positive length (shapely) and overlaps the polygon, counted
    by covextract.
    """
    g = Polygon([(4.995, 0.2), (5.0049, 1.99), (8.3, 1.4), (7.9, 0.3)])
    cov = polygon_coverage([g], IDENTITY, 10, 4, "touched")
    ours = dense(cov, 0, 4, 10)
    gdal = rasterize(
        [(g, 1)], out_shape=(4, 10), transform=IDENTITY, all_touched=True, fill=0, dtype="uint8"
    )
    diff = np.argwhere(ours != gdal)
    assert diff.tolist() == [[1, 4]]
    assert (ours[ours != gdal] == 1).all()
    for r, c in diff:
        # reference: shapely length of the boundary inside the open pixel
        assert shapely.intersection(g.boundary, box(c, r, c + 1, r + 1)).length > 0
        assert shapely.intersection(g, box(c, r, c + 1, r + 1)).area > 0


def test_touched_documented_gdal_difference_corner_touch():
    """GDAL also burns pixels the boundary meets at a single corner (on one side only).

    The diamond's lower-right edge x + y = 14 passes through pixel corners;
    GDAL's line walker burns the pixels beyond those corners, which share only
    a point with the polygon (shapely: intersection area 0). covextract
    counts a pixel only when the polygon's interior or a boundary piece of
    positive length enters it.
    """
    g = Polygon([(5, 1), (9, 5), (5, 9), (1, 5)])
    ours = dense(polygon_coverage([g], IDENTITY, 10, 10, "touched"), 0, 10, 10)
    gdal = rasterize(
        [(g, 1)], out_shape=(10, 10), transform=IDENTITY, all_touched=True, fill=0, dtype="uint8"
    )
    diff = np.argwhere(ours != gdal)
    assert diff.tolist() == [[6, 8], [7, 7], [8, 6], [9, 5]]
    for r, c in diff:
        assert gdal[r, c] == 1 and ours[r, c] == 0
        piece = shapely.intersection(g, box(c, r, c + 1, r + 1))
        assert piece.area == 0 and piece.length == 0


def test_center_and_touched_offgrid_counts():
    # hand-worked, box [-3, 4.2] x [-2, 5]:
    # centre rule (x_a < c + 0.5 <= x_b, y_a <= r + 0.5 < y_b): c = -3..3, r = -2..4
    # -> 7 x 7 = 49 centres, 4 x 5 = 20 on a 10 x 10 grid, 29 off it
    g = box(-3, -2, 4.2, 5)
    center = polygon_coverage([g], IDENTITY, 10, 10, "center")
    assert center.weight.size == 20
    assert_array_equal(center.offgrid, [29.0])
    # touched: c = -3..4, r = -2..4 -> 8 x 7 = 56, 5 x 5 = 25 on the grid, 31 off it
    touched = polygon_coverage([g], IDENTITY, 10, 10, "touched")
    assert touched.weight.size == 25
    assert_array_equal(touched.offgrid, [31.0])
    # the on-grid parts agree with GDAL (rasterio.features.rasterize)
    for cov, at in ((center, False), (touched, True)):
        ref = rasterize(
            [(g, 1)], out_shape=(10, 10), transform=IDENTITY, all_touched=at, fill=0, dtype="uint8"
        )
        assert_array_equal(dense(cov, 0, 10, 10), ref)


# ------------------------------------------------------------------- errors
def test_bad_polygon_inputs_raise_geometry_error():
    with pytest.raises(GeometryError, match="not polygons"):
        polygon_coverage([Point(1, 1)], IDENTITY, 4, 4)
    bowtie = Polygon([(0, 0), (2, 2), (2, 0), (0, 2)])
    with pytest.raises(GeometryError, match="invalid"):
        polygon_coverage([box(0, 0, 1, 1), bowtie], IDENTITY, 4, 4)
    with pytest.raises(GeometryError, match="sequence"):
        polygon_coverage(box(0, 0, 1, 1), IDENTITY, 4, 4)
    with pytest.raises(GeometryError, match="not shapely geometries"):
        polygon_coverage(["POLYGON ((0 0, 1 0, 1 1, 0 0))"], IDENTITY, 4, 4)


def test_bad_grid_and_rule():
    with pytest.raises(RasterError, match="degenerate"):
        polygon_coverage([box(0, 0, 1, 1)], Affine(0.0, 0, 0, 0, -1.0, 0), 4, 4)
    with pytest.raises(RasterError, match="width"):
        polygon_coverage([box(0, 0, 1, 1)], IDENTITY, 0, 4)
    with pytest.raises(RasterError, match="affine"):
        polygon_coverage([box(0, 0, 1, 1)], (1, 0, 0, 0, 1, 0), 4, 4)
    with pytest.raises(RecipeError, match="overlap, center, touched") as info:
        polygon_coverage([box(0, 0, 1, 1)], IDENTITY, 4, 4, rule="centre")
    assert info.value.problems[0].key == "pixels"
    with pytest.raises(RecipeError, match="nearest, bilinear"):
        point_coverage([0.5], [0.5], IDENTITY, 4, 4, method="cubic")
    with pytest.raises(TableError, match="differ in length"):
        point_coverage([0.5, 1.5], [0.5], IDENTITY, 4, 4)


# ------------------------------------------------------------------- points
def test_bilinear_weights_hand_worked():
    # pixel coords (col 1.75, row 2.25): centres around it are cols 1,2 and rows 1,2;
    # fx = 1.75 - 1.5 = 0.25, fy = 2.25 - 1.5 = 0.75
    cov = point_coverage([1.75], [2.25], IDENTITY, 4, 4, "bilinear")
    assert_array_equal(cov.row, [1, 1, 2, 2])
    assert_array_equal(cov.col, [1, 2, 1, 2])
    assert_allclose(cov.weight, [0.75 * 0.25, 0.25 * 0.25, 0.75 * 0.75, 0.25 * 0.75], rtol=1e-14)
    # on a pixel centre: one pixel, weight 1 (zero weights are dropped)
    centre = point_coverage([2.5], [1.5], IDENTITY, 4, 4, "bilinear")
    assert_array_equal(centre.row, [1])
    assert_array_equal(centre.col, [2])
    assert_array_equal(centre.weight, [1.0])


def test_points_off_grid_and_nan():
    x = [0.25, 9.0, np.nan, 3.5]
    y = [2.5, 1.0, 1.0, np.inf]
    near = point_coverage(x, y, IDENTITY, 4, 4, "nearest")
    assert_array_equal(near.unit, [0])
    assert_array_equal(near.offgrid, [0.0, 1.0, 0.0, 0.0])
    bil = point_coverage(x, y, IDENTITY, 4, 4, "bilinear")
    # hand-worked: col 0.25 sits between centres -0.5 (off grid, weight 0.25)
    # and 0.5 (weight 0.75); row 2.5 is a centre line
    assert_array_equal(bil.unit, [0])
    assert_array_equal(bil.col, [0])
    assert_allclose(bil.weight, [0.75], rtol=1e-14)
    assert_allclose(bil.offgrid, [0.25, 1.0, 0.0, 0.0], rtol=1e-14)


@pytest.fixture
def point_raster(tmp_path):
    """A small north-up GeoTIFF (invented values) with two nodata pixels."""
    transform = Affine(20.0, 0.0, 700010.5, 0.0, -25.0, 9100033.3)
    height, width = 6, 8
    values = np.random.default_rng(3).integers(1, 500, (height, width)).astype("float32")
    values[2, 3] = values[4, 6] = -9999.0
    path = tmp_path / "points.tif"
    with rasterio.open(
        path,
        "w",
        driver="GTiff",
        width=width,
        height=height,
        count=1,
        dtype="float32",
        crs="EPSG:32736",
        transform=transform,
        nodata=-9999.0,
    ) as dst:
        dst.write(values, 1)
    return path, transform, values, values != -9999.0


def _points(transform, width, height, n=300, seed=4):
    rng = np.random.default_rng(seed)
    c = rng.uniform(-1.5, width + 1.5, n)
    r = rng.uniform(-1.5, height + 1.5, n)
    # a few on pixel edges and centres, where rounding rules decide
    c[:6] = [0.0, 3.0, 2.5, 4.5, 7.999, 8.0]
    r[:6] = [1.0, 2.5, 3.0, 0.5, 5.5, 2.0]
    return apply(transform, c, r)


def _nearest_value(near: Coverage, i, values, valid):
    sel = near.unit == i
    if not sel.any() or not valid[near.row[sel], near.col[sel]][0]:
        return None
    return float(values[near.row[sel], near.col[sel]][0])


@pytest.mark.filterwarnings("ignore:Use `@` matmul:PendingDeprecationWarning")  # inside rasterstats
def test_nearest_equals_rasterstats(point_raster):
    path, transform, values, valid = point_raster
    height, width = values.shape
    x, y = _points(transform, width, height)
    cov = point_coverage(x, y, transform, width, height, "nearest")
    assert_well_formed(cov, width, height)
    # reference: rasterstats point_query(interpolate="nearest")
    ref = point_query(
        [Point(a, b) for a, b in zip(x, y, strict=True)], str(path), interpolate="nearest"
    )
    ours = [_nearest_value(cov, i, values, valid) for i in range(x.size)]
    assert ours == ref
    off = np.array([cov.offgrid[i] for i in range(x.size)])
    assert set(off.tolist()) <= {0.0, 1.0}
    assert (cov.weight == 1.0).all()


@pytest.mark.filterwarnings("ignore:Use `@` matmul:PendingDeprecationWarning")  # inside rasterstats
def test_bilinear_equals_rasterstats(point_raster):
    """Reference: rasterstats point_query(interpolate="bilinear").

    Where all four neighbours are on the grid and valid, sum(w * v) is
    rasterstats' bilinear value. Otherwise rasterstats falls back to the
    window pixel ``arr[round(1 - y), round(x)]`` (rasterstats/point.py,
    ``bilinear``): the pixel containing the point, i.e. the ``nearest``
    coverage, or None when that pixel is nodata or off the grid. On an exact
    pixel edge, Python's round-half-even picks the window's upper/left pixel
    instead, so the three edge points of ``_points`` are worked out by hand:

    - 0 (col 0.0, row 1.0): window cols -1..0, rows 0..1, index [0, 0] ->
      pixel (0, -1), off the grid -> None (nearest: pixel (1, 0));
    - 1 (col 3.0, row 2.5): falls back because neighbour (2, 3) is nodata;
      window rows 1..2, cols 2..3, y = 0, x = 0.5 -> index [1, 0] -> pixel
      (2, 2) (nearest: (2, 3), nodata);
    - 5 (col 8.0, row 2.0): window rows 1..2, cols 7..8, index [0, 0] ->
      pixel (1, 7) (nearest: col 8, off the grid).
    """
    path, transform, values, valid = point_raster
    height, width = values.shape
    x, y = _points(transform, width, height)
    cov = point_coverage(x, y, transform, width, height, "bilinear")
    near = point_coverage(x, y, transform, width, height, "nearest")
    assert_well_formed(cov, width, height)
    ref = point_query(
        [Point(a, b) for a, b in zip(x, y, strict=True)], str(path), interpolate="bilinear"
    )
    edge_ties = {0: None, 1: float(values[2, 2]), 5: float(values[1, 7])}
    n_interpolated = 0
    for i in range(x.size):
        sel = cov.unit == i
        rr, cc, ww = cov.row[sel], cov.col[sel], cov.weight[sel]
        assert_allclose(ww.sum() + cov.offgrid[i], 1.0, rtol=1e-12)
        if cov.offgrid[i] == 0 and valid[rr, cc].all():
            n_interpolated += 1
            assert_allclose(float((ww * values[rr, cc]).sum()), ref[i], rtol=1e-12)
        elif i in edge_ties:
            assert ref[i] == edge_ties[i]
            assert _nearest_value(near, i, values, valid) != ref[i]
        else:
            assert _nearest_value(near, i, values, valid) == ref[i]
    # the interpolating branch is exercised, not only the fallback
    assert n_interpolated > 50


@pytest.mark.parametrize("rule", ["overlap", "touched", "center"])
def test_coverage_kernels_on_several_threads_give_the_same_arrays(monkeypatch, rule):
    # Invented discs and holes on a 200 x 200 grid; groups of units on 1, 2 and 3
    # threads must give identical cells, weights, runs and off-grid parts, and the
    # areas must still match shapely's (the oracle of the foundation tests).
    rng = np.random.default_rng(11)
    polys = []
    for _ in range(60):
        x, y = rng.uniform(-10, 210, 2)
        disc = Point(x, y).buffer(rng.uniform(2, 25), quad_segs=16)
        if rng.random() < 0.3:
            disc = disc.difference(Point(x + 1, y).buffer(1.5))
        polys.append(disc)
    transform = Affine.identity()
    monkeypatch.setattr(cov_mod, "_PARALLEL_MIN_PIECES", 0)
    results = []
    for threads in (1, 2, 3):
        monkeypatch.setattr(cov_mod, "_build_threads", lambda t=threads: t)
        results.append(polygon_coverage(polys, transform, 200, 200, rule=rule, runs=True))
    first = results[0]
    for other in results[1:]:
        for name in ("unit", "row", "col", "weight", "offgrid"):
            assert_array_equal(getattr(other, name), getattr(first, name))
        for a, b in zip(other.runs, first.runs, strict=True):
            assert_array_equal(a, b)
    if rule == "overlap":
        full = first.expanded()
        on_grid = np.bincount(full.unit, weights=full.weight, minlength=len(polys))
        # Reference: shapely's intersection area with the grid (pixel units).
        grid_box = box(0, 0, 200, 200)
        expected = np.array([p.intersection(grid_box).area for p in polys])
        assert_allclose(on_grid, expected, rtol=0, atol=1e-8)
