"""Invariants of the coverage kernels, on generated polygons and points.

Reference for areas: shapely 2 ``Polygon.area``; the partition and
translation properties follow from the definition of an area fraction.
"""

from __future__ import annotations

import numpy as np
import shapely
from affine import Affine
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose
from shapely.geometry import LineString, Polygon, box
from shapely.ops import split

from covextract.engine.coverage import point_coverage, polygon_coverage

W, H = 20, 16
SETTINGS = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])

# rounded to 1e-6 pixel: keeps polygons valid after integer shifts (1 + 1e-73 == 1)
coord = st.floats(-6.0, 26.0, allow_nan=False, allow_infinity=False).map(lambda v: round(v, 6))
pixel_size = st.floats(0.5, 100.0, allow_nan=False)
origin = st.floats(-1e5, 1e5, allow_nan=False)


@st.composite
def simple_polygons(draw):
    """Valid triangles and quadrilaterals in pixel coordinates."""
    n = draw(st.integers(3, 4))
    pts = [(draw(coord), draw(coord)) for _ in range(n)]
    g = Polygon(pts)
    assume(g.is_valid and g.area > 1e-3)
    return g


@st.composite
def grids(draw):
    """North-up or south-up grids with non-square pixels and arbitrary origin."""
    a = draw(pixel_size)
    e = draw(pixel_size) * draw(st.sampled_from([-1.0, 1.0]))
    return Affine(a, 0.0, draw(origin), 0.0, e, draw(origin))


def to_world(g, t):
    return shapely.transform(
        g,
        lambda xy: np.column_stack(
            (xy[:, 0] * t.a + xy[:, 1] * t.b + t.c, xy[:, 0] * t.d + xy[:, 1] * t.e + t.f)
        ),
    )


def dense(cov, unit=0):
    out = np.zeros((H, W))
    sel = cov.unit == unit
    out[cov.row[sel], cov.col[sel]] = cov.weight[sel]
    return out


@SETTINGS
@given(simple_polygons(), grids())
def test_weights_plus_offgrid_equal_area(g_px, t):
    g = to_world(g_px, t)
    cov = polygon_coverage([g], t, W, H)
    assert ((cov.weight > 0) & (cov.weight <= 1)).all()
    # reference: shapely area in CRS units over the pixel area |a * e|
    assert_allclose(cov.weight.sum() + cov.offgrid[0], g.area / abs(t.a * t.e), rtol=1e-8)


@SETTINGS
@given(simple_polygons(), st.integers(-3, 3), st.integers(-3, 3))
def test_integer_shift_moves_weights_unchanged(g_px, dx, dy):
    shifted = shapely.affinity.translate(g_px, dx, dy)
    assume(shifted.is_valid)
    base = polygon_coverage([g_px], Affine.identity(), W, H)
    moved = polygon_coverage([shifted], Affine.identity(), W + 10, H + 10)
    # compare on the pixels both grids hold, in the shifted frame
    a = np.zeros((H + 10, W + 10))
    a[base.row + dy, base.col + dx] = base.weight
    b = np.zeros((H + 10, W + 10))
    b[moved.row, moved.col] = moved.weight
    rows = slice(max(dy, 0), H + dy)
    cols = slice(max(dx, 0), W + dx)
    assert_allclose(a[rows, cols], b[rows, cols], rtol=0, atol=1e-12)


@SETTINGS
@given(coord, coord, coord, coord, st.floats(0.5, 12), st.floats(0.5, 12))
def test_parts_of_a_partition_sum_to_the_whole(x0, y0, x1, y1, w, h):
    whole = box(3.0, 2.0, 3.0 + w, 2.0 + h)
    assume(abs(x1 - x0) + abs(y1 - y0) > 1e-3)
    # a long cutting line through two random points
    d = np.array([x1 - x0, y1 - y0]) / np.hypot(x1 - x0, y1 - y0)
    cut = LineString([(x0 - 100 * d[0], y0 - 100 * d[1]), (x0 + 100 * d[0], y0 + 100 * d[1])])
    pieces = [p for p in split(whole, cut).geoms if p.area > 0]
    assume(all(p.is_valid for p in pieces))
    cov_parts = polygon_coverage(pieces, Affine.identity(), W, H, floor=0.0)
    cov_whole = polygon_coverage([whole], Affine.identity(), W, H, floor=0.0)
    total = sum(dense(cov_parts, i) for i in range(len(pieces)))
    assert_allclose(total, dense(cov_whole), rtol=0, atol=1e-9)


@SETTINGS
@given(simple_polygons())
def test_center_and_overlap_lie_within_touched(g_px):
    t = Affine.identity()
    touched = dense(polygon_coverage([g_px], t, W, H, "touched")) > 0
    center = dense(polygon_coverage([g_px], t, W, H, "center")) > 0
    overlap = dense(polygon_coverage([g_px], t, W, H, "overlap")) > 0
    assert not (center & ~touched).any()
    assert not (overlap & ~touched).any()


@SETTINGS
@given(
    st.lists(st.tuples(st.floats(0.5, W - 0.5), st.floats(0.5, H - 0.5)), min_size=1, max_size=20)
)
def test_bilinear_reproduces_linear_functions(pts):
    # bilinear interpolation is exact for functions linear in (col, row)
    # (common practice); pixel centres sit at (c + 0.5, r + 0.5)
    cols, rows = np.array(pts).T
    cov = point_coverage(cols, rows, Affine.identity(), W, H, "bilinear")
    assert_allclose(cov.offgrid, 0.0, atol=0)
    sums = np.bincount(cov.unit, weights=cov.weight, minlength=len(pts))
    assert_allclose(sums, 1.0, rtol=1e-12)
    got_c = np.bincount(cov.unit, weights=cov.weight * (cov.col + 0.5), minlength=len(pts))
    got_r = np.bincount(cov.unit, weights=cov.weight * (cov.row + 0.5), minlength=len(pts))
    assert_allclose(got_c, cols, rtol=0, atol=1e-9)
    assert_allclose(got_r, rows, rtol=0, atol=1e-9)
