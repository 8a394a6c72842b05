"""Weight sets holding runs: grouping by block, expansion, persistence.

The oracle is the weight set built from the per-pixel coverage
(``runs=False``), whose grouping is checked elsewhere (test_cache, the
zonal reference tests).
"""

from __future__ import annotations

import io

import numpy as np
import pytest
from affine import Affine
from numpy.testing import assert_array_equal
from pyproj import CRS
from shapely.geometry import box

from covextract.core.grid import Grid
from covextract.engine.coverage import polygon_coverage
from covextract.engine.weights import WeightSet, weights_from_coverage
from tests.engine.test_coverage import _random_polygons, to_world


@pytest.fixture
def grid():
    # 60 x 50 pixels of 10 m, blocks of 16 x 16 (the last ones cut)
    return Grid(Affine(10.0, 0, 1000.0, 0, -10.0, 2000.0), 60, 50, CRS.from_epsg(32631), (16, 16))


def _both(grid, rule, n=40, seed=99):
    geoms = [to_world(g, grid.transform) for g in _random_polygons(n, seed, 60, 50)]
    args = (geoms, grid.transform, grid.width, grid.height, rule)
    ref = weights_from_coverage(polygon_coverage(*args), grid, rule)
    got = weights_from_coverage(polygon_coverage(*args, runs=True), grid, rule)
    return ref, got


@pytest.mark.parametrize("rule", ["overlap", "center", "touched"])
def test_expanded_blocks_equal_per_pixel_weights(grid, rule):
    ref, got = _both(grid, rule)
    assert got.n_runs > 0
    assert got.windows == ref.windows
    assert got.n_entries == ref.n_entries
    assert got.n_stored < ref.n_stored
    for b in range(len(ref.windows)):
        w0, u0, p0, c0 = ref.block(b)
        w1, u1, p1, c1 = got.block(b)
        assert w0 == w1
        assert_array_equal(u1, u0)
        assert_array_equal(p1, p0)
        assert_array_equal(c1, c0)
    assert_array_equal(got.units_on_grid(), ref.units_on_grid())
    np.testing.assert_allclose(got.coverage_totals(), ref.coverage_totals(), rtol=1e-13, atol=0)


def test_runs_are_cut_at_block_columns(grid):
    # one box over columns 3..40 of rows 0..1: blocks of 16 columns cut it into
    # [3, 16), [16, 32), [32, 40) in block columns 0, 1, 2
    g = box(1030.0, 1980.0, 1400.0, 2000.0)
    cov = polygon_coverage([g], grid.transform, grid.width, grid.height, "center", runs=True)
    ws = weights_from_coverage(cov, grid, "center")
    assert [w[:2] for w in ws.windows] == [(0, 0), (0, 16), (0, 32)]
    lens = [ws.block_parts(b)[2][2].tolist() for b in range(3)]
    assert lens == [[13, 13], [16, 16], [8, 8]]
    # block-local starts: row 0 and row 1 of each block
    starts = [ws.block_parts(b)[2][1].tolist() for b in range(3)]
    assert starts == [[3, 19], [0, 16], [0, 16]]


def test_persistence_round_trip_with_runs(grid):
    _, ws = _both(grid, "overlap")
    buf = io.BytesIO()
    np.savez(buf, **ws.to_arrays())
    buf.seek(0)
    with np.load(buf, allow_pickle=False) as data:
        back = WeightSet.from_arrays({k: data[k] for k in data.files})
    assert back.windows == ws.windows
    for name in ("starts", "unit", "pix", "cov", "offgrid", "run_starts", "run_unit", "run_pix"):
        assert_array_equal(getattr(back, name), getattr(ws, name), err_msg=name)
    assert_array_equal(back.run_len, ws.run_len)
    assert back.run_unit.dtype == np.int32 and back.run_len.dtype == np.int32


def test_group_estimate_with_runs_bounds_stored_items_of_discs():
    from shapely.geometry import Point

    from covextract.engine.zonal import build_weights, estimate_entries, unit_groups

    grid = Grid(Affine(1.0, 0, 0, 0, -1.0, 400.0), 400, 400, CRS.from_epsg(32631), (64, 64))
    rng = np.random.default_rng(2)
    geoms = [
        Point(x, y).buffer(r, quad_segs=32)
        for x, y, r in rng.uniform([40, 40, 10], [360, 360, 40], (30, 3))
    ]
    ws = build_weights(geoms, grid, "overlap")
    per_unit = np.bincount(ws.unit, minlength=30) + np.bincount(ws.run_unit, minlength=30)
    pixels = np.bincount(ws.unit, minlength=30) + np.bincount(
        ws.run_unit, weights=ws.run_len, minlength=30
    )
    est_runs = estimate_entries(geoms, grid, runs=True)
    est_pix = estimate_entries(geoms, grid)
    assert (per_unit <= est_runs).all()
    assert (pixels <= est_pix).all()
    # a disc of radius r holds about pi r^2 pixels but only about 12 r boundary cells + 2 r runs
    assert est_runs.sum() < 0.3 * est_pix.sum()
    assert len(unit_groups(geoms, grid, 20_000, runs=True)) < len(unit_groups(geoms, grid, 20_000))


@pytest.mark.parametrize("rule", ["overlap", "center"])
def test_grouping_by_block_keeps_every_weight_at_its_pixel(grid, rule):
    """Block-local indices turned back into grid cells give the coverage's entries.

    Oracle: the coverage itself (``Coverage.expanded()``), independent of the
    grouping; each block's items must also stay in (unit, pixel) order.
    """
    geoms = [to_world(g, grid.transform) for g in _random_polygons(40, 7, 60, 50)]
    cov = polygon_coverage(geoms, grid.transform, grid.width, grid.height, rule, runs=True)
    ws = weights_from_coverage(cov, grid, rule)
    units, rows, cols, weights = [], [], [], []
    for b, (r0, c0, h, w) in enumerate(ws.windows):
        _, (u, p, c), (ru, rp, rl) = ws.block_parts(b)
        assert (p >= 0).all() and (p < h * w).all()
        assert (rp % w + rl <= w).all()  # runs stay within their block's row
        key = u.astype(np.int64) * h * w + p
        assert (np.diff(key) > 0).all()
        units.append(u)
        rows.append(r0 + p // w)
        cols.append(c0 + p % w)
        weights.append(c)
        for uu, pp, ll in zip(ru, rp, rl, strict=True):
            units.append(np.full(ll, uu))
            rows.append(np.full(ll, r0 + pp // w))
            cols.append(c0 + pp % w + np.arange(ll))
            weights.append(np.ones(ll))
    u, r, c, wt = (np.concatenate(v) for v in (units, rows, cols, weights))
    order = np.lexsort((c, r, u))
    ref = cov.expanded()
    assert u.size == ref.unit.size > 500
    assert_array_equal(u[order], ref.unit)
    assert_array_equal(r[order], ref.row)
    assert_array_equal(c[order], ref.col)
    assert_array_equal(wt[order], ref.weight)
