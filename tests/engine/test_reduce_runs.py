"""The run reduction equals the per-pixel reduction of the same weights.

Oracle: :func:`covextract.engine.reduce.reduce_block` on the expanded
weights (the per-pixel path, checked against numpy and rasterstats in
test_reduce.py and test_zonal_reference.py).
"""

from __future__ import annotations

import numpy as np
import pytest
from affine import Affine
from numpy.testing import assert_allclose, assert_array_equal
from pyproj import CRS
from shapely.geometry import Point

import covextract.engine.stream as stream
from covextract.core.grid import Grid
from covextract.engine.coverage import polygon_coverage
from covextract.engine.reduce import Accumulator
from covextract.engine.weights import weights_from_coverage


class ArraySource:
    """An in-memory raster: values with a nodata value, read block by block."""

    elementwise = True

    def __init__(self, grid, data, nodata):
        self.grid, self.data, self.nodata = grid, data, nodata

    def read_block(self, window):
        r0, c0, h, w = window
        return self.data[r0 : r0 + h, c0 : c0 + w]

    def to_values(self, stored):
        stored = np.asarray(stored, dtype=np.float64)
        return stored, stored != self.nodata


def _scene(grid, seed, n_units=25):
    rng = np.random.default_rng(seed)
    # an invented temperature field: 300 K +- 0.01 K with a gentle gradient, 10 % nodata
    rows, cols = np.mgrid[0 : grid.height, 0 : grid.width]
    data = 300.0 + 0.01 * np.sin(rows / 7.0) * np.cos(cols / 5.0)
    data += rng.normal(0, 0.002, data.shape)
    data[rng.uniform(size=data.shape) < 0.1] = -9999.0
    data[5:15, 30:45] = -9999.0  # a cloud
    t = grid.transform
    geoms = []
    for _ in range(n_units):
        c, r = rng.uniform(-5, grid.width + 5), rng.uniform(-5, grid.height + 5)
        x, y = t * (c, r)
        radius = rng.uniform(1.0, 18.0) * abs(t.a)
        geoms.append(Point(x, y).buffer(radius, quad_segs=12))
    return data, geoms


GRIDS = {
    # lat/lon: one area per row
    "latlon": Grid(Affine(0.01, 0, 10.0, 0, -0.01, 50.0), 70, 60, CRS.from_epsg(4326), (16, 16)),
    # Web Mercator over 40 degrees of latitude: area varies pixel by pixel (rows)
    "mercator": Grid(
        Affine(60_000.0, 0, 1.0e6, 0, -60_000.0, 5.0e6), 70, 60, CRS.from_epsg(3857), (16, 16)
    ),
    # a projected grid of constant area (UTM, small extent): unweighted
    "utm": Grid(Affine(30.0, 0, 5.0e5, 0, -30.0, 4.0e6), 70, 60, CRS.from_epsg(32631), (16, 16)),
}

FIELDS = ("w_all", "w_base", "area_all", "w", "csum", "dens")


def _per_pixel_reducer(weighting, thresholds, keep=False):
    base = stream._continuous_reducer(weighting, thresholds, keep)

    def per_pixel(*args, **kwargs):
        return base(*args, **kwargs)

    per_pixel.gathers = True
    return per_pixel


def _passes(grid, rule, weighting, thresholds, monkeypatch, seed=4):
    data, geoms = _scene(grid, seed)
    src = ArraySource(grid, data, -9999.0)
    args = (geoms, grid.transform, grid.width, grid.height, rule)
    per_pixel = weights_from_coverage(polygon_coverage(*args), grid, rule)
    with_runs = weights_from_coverage(polygon_coverage(*args, runs=True), grid, rule)
    assert with_runs.n_runs > 0
    calls = []
    original = stream.reduce_block_runs

    def counting(*a, **k):
        calls.append(1)
        return original(*a, **k)

    monkeypatch.setattr(stream, "reduce_block_runs", counting)
    # the oracle: the per-pixel path (reduce_block), what a reducer without a
    # run reduction gets
    ref, _ = stream.stream_pass(
        per_pixel,
        grid,
        src,
        weighting=weighting,
        thresholds=thresholds,
        threads=1,
        reducer=_per_pixel_reducer(weighting, thresholds),
        accumulator=Accumulator(len(geoms), thresholds),
    )
    assert not calls
    # every block without percentiles takes the compiled run path, runs or not
    got, _ = stream.stream_pass(
        with_runs, grid, src, weighting=weighting, thresholds=thresholds, threads=1
    )
    assert len(calls) == len(with_runs.windows), "the run path was not taken for every block"
    entries_only, _ = stream.stream_pass(
        per_pixel, grid, src, weighting=weighting, thresholds=thresholds, threads=1
    )
    assert len(calls) == len(with_runs.windows) + len(per_pixel.windows)
    return ref, got, entries_only


def _assert_equal_stats(ref, got):
    assert_array_equal(got.count, ref.count)
    for name in FIELDS:
        assert_allclose(getattr(got, name), getattr(ref, name), rtol=1e-12, atol=0, err_msg=name)
    has = ref.count > 0
    assert has.sum() > 5
    assert_allclose(got.mean[has], ref.mean[has], rtol=1e-12, atol=0)
    std_ref = np.sqrt(ref.m2[has] / ref.w[has])
    std_got = np.sqrt(got.m2[has] / got.w[has])
    # both paths are off by up to ~3e-12 on this 300 K +- 0.01 field (see
    # test_run_path_spread_is_at_least_as_accurate), hence the looser bound
    assert_allclose(std_got, std_ref, rtol=5e-11, atol=0)
    assert_array_equal(got.vmin, ref.vmin)
    assert_array_equal(got.vmax, ref.vmax)
    for t in ref.thresholds:
        assert_allclose(got.above_area[t], ref.above_area[t], rtol=1e-12, atol=1e-300)
        assert_allclose(got.above_w[t], ref.above_w[t], rtol=1e-12, atol=1e-300)


@pytest.mark.parametrize("rule", ["overlap", "center", "touched"])
@pytest.mark.parametrize(
    ("grid_name", "weighting"),
    [("latlon", True), ("mercator", True), ("mercator", False), ("utm", False)],
)
def test_run_path_equals_per_pixel_path(grid_name, weighting, rule, monkeypatch):
    grid = GRIDS[grid_name]
    if grid_name == "mercator":
        assert grid.area_varies and not grid.is_geographic
    ref, got, entries_only = _passes(grid, rule, weighting, (300.0, 300.005), monkeypatch)
    _assert_equal_stats(ref, got)
    _assert_equal_stats(ref, entries_only)


def test_constant_field_has_spread_exactly_zero():
    grid = GRIDS["latlon"]
    data, geoms = _scene(grid, 9)
    data = np.where(data == -9999.0, -9999.0, 287.15)
    src = ArraySource(grid, data, -9999.0)
    ws = weights_from_coverage(
        polygon_coverage(geoms, grid.transform, grid.width, grid.height, runs=True), grid, "overlap"
    )
    acc, _ = stream.stream_pass(ws, grid, src, weighting=True, threads=1)
    has = acc.count > 0
    assert_array_equal(acc.m2[has], 0.0)
    assert_array_equal(acc.mean[has], 287.15)


def test_run_path_threads_are_bit_identical():
    grid = GRIDS["mercator"]
    data, geoms = _scene(grid, 5, n_units=40)
    src = ArraySource(grid, data, -9999.0)
    ws = weights_from_coverage(
        polygon_coverage(geoms, grid.transform, grid.width, grid.height, runs=True), grid, "overlap"
    )
    one, _ = stream.stream_pass(ws, grid, src, weighting=True, thresholds=(300.0,), threads=1)
    two, _ = stream.stream_pass(ws, grid, src, weighting=True, thresholds=(300.0,), threads=2)
    for name in (*FIELDS, "count", "mean", "m2", "vmin", "vmax"):
        assert_array_equal(getattr(two, name), getattr(one, name), err_msg=name)


@pytest.mark.parametrize("grid_name", ["latlon", "mercator"])
def test_run_path_spread_is_at_least_as_accurate(grid_name, monkeypatch):
    """Both paths against a two-pass standard deviation in extended precision.

    Oracle: numpy longdouble (80-bit on x86) two-pass Σw·(v − mean)² per unit
    over the per-pixel weights (common practice for a reference variance).
    """
    grid = GRIDS[grid_name]
    ref, got, _ = _passes(grid, "center", True, (), monkeypatch)
    data, geoms = _scene(grid, 4)
    cov = polygon_coverage(geoms, grid.transform, grid.width, grid.height, "center")
    v = data[cov.row, cov.col].astype(np.longdouble)
    ok = data[cov.row, cov.col] != -9999.0
    areas = grid.pixel_areas(cov.row, cov.col).astype(np.longdouble)
    w = areas * cov.weight
    err_ref, err_got = [], []
    for u in np.flatnonzero(ref.count > 0):
        sel = (cov.unit == u) & ok
        total = w[sel].sum()
        mean = (w[sel] * v[sel]).sum() / total
        exact = np.sqrt((w[sel] * (v[sel] - mean) ** 2).sum() / total)
        err_ref.append(float(abs(np.sqrt(ref.m2[u] / ref.w[u]) - exact) / exact))
        err_got.append(float(abs(np.sqrt(got.m2[u] / got.w[u]) - exact) / exact))
    assert max(err_got) < 1e-11
    assert max(err_ref) < 1e-11
    # both paths now take deviations around a value of the unit itself and sit
    # on the same floor (measured 2.7e-12 and 2.3e-12, set by the float64
    # weights); before, the per-pixel path's Σw·v/Σw mean was off by up to 1.6e-11
    assert max(err_got) <= 1.001 * max(err_ref)


@pytest.mark.parametrize("grid_name", ["latlon", "mercator"])
def test_percentiles_do_not_change_the_moments(grid_name):
    """Asking for percentiles keeps every other statistic bit-identical.

    The triples kept for percentiles equal the per-pixel path's.
    """
    grid = GRIDS[grid_name]
    data, geoms = _scene(grid, 6)
    src = ArraySource(grid, data, -9999.0)
    args = (geoms, grid.transform, grid.width, grid.height, "overlap")
    ws = weights_from_coverage(polygon_coverage(*args, runs=True), grid, "overlap")
    plain, _ = stream.stream_pass(ws, grid, src, weighting=True, thresholds=(300.0,), threads=1)
    keep, _ = stream.stream_pass(
        ws, grid, src, weighting=True, thresholds=(300.0,), keep_distribution=True, threads=1
    )
    for name in (*FIELDS, "count", "mean", "m2", "vmin", "vmax"):
        assert_array_equal(getattr(keep, name), getattr(plain, name), err_msg=name)
    assert_array_equal(keep.above_w[300.0], plain.above_w[300.0])
    ref, _ = stream.stream_pass(
        ws,
        grid,
        src,
        weighting=True,
        threads=1,
        reducer=_per_pixel_reducer(True, (), keep=True),
        accumulator=Accumulator(len(geoms), (), True),
    )
    got_u, got_v, got_w = keep.distribution()
    ref_u, ref_v, ref_w = ref.distribution()
    assert got_u.size > 1000
    assert_array_equal(got_u, ref_u)
    assert_array_equal(got_v, ref_v)
    assert_array_equal(got_w, ref_w)


def test_sums_of_a_non_negative_field_stay_non_negative():
    """Sums are Σv, not shift·n + Σ(v − shift): zeros and tiny values give sums >= 0.

    (An invented rainfall-like field: 70 % zeros, the rest below 1e-3.)
    """
    grid = GRIDS["latlon"]
    data, geoms = _scene(grid, 8, n_units=40)
    rng = np.random.default_rng(1)
    field = np.where(rng.uniform(size=data.shape) < 0.7, 0.0, rng.uniform(0, 1e-3, data.shape))
    field[data == -9999.0] = -9999.0
    src = ArraySource(grid, field, -9999.0)
    args = (geoms, grid.transform, grid.width, grid.height, "overlap")
    ws = weights_from_coverage(polygon_coverage(*args, runs=True), grid, "overlap")
    acc, _ = stream.stream_pass(ws, grid, src, weighting=True, threads=1)
    has = acc.count > 0
    assert has.sum() > 10
    assert (acc.csum[has] >= 0).all()
    assert (acc.dens[has] >= 0).all()
    # the block mean is kept within the unit's extremes, and the merge of
    # non-negative means stays non-negative
    assert (acc.mean[has] >= 0).all()
