"""Means and spreads keep their digits whatever else the block holds.

A unit whose valid pixels all hold one value has a spread of exactly 0 and a
mean, min and max of exactly that value, for every pixel rule, with and
without area weighting, across blocks, and next to units of very different
values in the same block (each unit's deviations are taken around one of
its own values). Against an extended-precision two-pass reference, units of
values far from their neighbours' (1e6 + small noise next to values near 0)
keep a relative error of the spread below 1e-12.
"""

from __future__ import annotations

import numpy as np
import pytest
from affine import Affine
from numpy.testing import assert_array_equal
from pyproj import CRS
from shapely.geometry import Point, box

import covextract.engine.stream as stream
from covextract.core.grid import Grid
from covextract.engine.coverage import polygon_coverage
from covextract.engine.reduce import Accumulator, reduce_block, reduce_block_runs
from covextract.engine.weights import weights_from_coverage
from covextract.engine.zonal import PIXEL_RULES, zonal
from covextract.stats.names import parse_stat

NODATA = -9999.0
BLOCK = 16

GRIDS = {
    # lat/lon: one area per row (the run reduction's scalar area per run)
    "latlon": Grid(Affine(0.01, 0, 10.0, 0, -0.01, 50.0), 48, 40, CRS.from_epsg(4326), (16, 16)),
    # Web Mercator over 24 degrees of latitude: an area per pixel
    "mercator": Grid(
        Affine(60_000.0, 0, 1.0e6, 0, -60_000.0, 3.0e6), 48, 40, CRS.from_epsg(3857), (16, 16)
    ),
}

STATS = [parse_stat(s) for s in ("count", "mean", "std", "min", "max", "median")]


class ArraySource:
    """An in-memory raster read block by block; with ``factor``, a weighted source.

    A weighted source returns a per-pixel weight factor as well (what
    ``weight_by`` does), which sends every block to the per-pixel path
    (:func:`covextract.engine.reduce.reduce_block`).
    """

    elementwise = True

    def __init__(self, grid, data, factor=None):
        self.grid, self.data, self.factor = grid, data, factor

    def read_block(self, window):
        r0, c0, h, w = window
        block = self.data[r0 : r0 + h, c0 : c0 + w]
        if self.factor is None:
            return block
        return np.stack([block, self.factor[r0 : r0 + h, c0 : c0 + w]])

    def to_values(self, stored):
        stored = np.asarray(stored, dtype=np.float64)
        if self.factor is None:
            return stored, stored != NODATA
        return stored[0], stored[0] != NODATA, stored[1]


def _units(grid):
    """Three discs: two cross block edges (rows and columns), one inside a block."""
    t = grid.transform
    return [
        Point(*(t * (c, r))).buffer(rad * abs(t.a), quad_segs=16)
        for c, r, rad in [(20.0, 18.0, 9.3), (10.0, 11.0, 3.7), (31.0, 21.0, 7.6)]
    ]


def _far_field(grid, far, const, seed):
    """``far`` + noise everywhere, the units' area set to ``const``, some nodata.

    The rectangle of ``const`` holds every unit's pixels (any rule), and most
    of each block's valid pixels around it hold values far from ``const``.
    """
    rng = np.random.default_rng(seed)
    data = far + rng.normal(0, 1.0, (grid.height, grid.width))
    data[7:31, 4:41] = const
    data[rng.uniform(size=data.shape) < 0.08] = NODATA
    return data


def _blocks_of(geoms, grid, rule):
    cov = polygon_coverage(geoms, grid.transform, grid.width, grid.height, rule)
    return [
        {
            (int(r) // BLOCK, int(c) // BLOCK)
            for r, c in zip(cov.row[sel], cov.col[sel], strict=True)
        }
        for sel in (cov.unit == u for u in range(len(geoms)))
    ]


CASES = [
    (3.0e5, 0.3),  # a small value next to a large one
    (0.0, 300.0),  # temperatures in kelvin next to zeros
    (1.0e6, 0.1),
    (-2.5e4, 287.15),
]


@pytest.mark.parametrize("grid_name", sorted(GRIDS))
@pytest.mark.parametrize("weighted_source", [False, True], ids=["runs", "weight_by"])
@pytest.mark.parametrize("area_weighting", ["on", "off"])
@pytest.mark.parametrize("rule", PIXEL_RULES)
def test_unit_of_equal_values_has_zero_spread(rule, area_weighting, weighted_source, grid_name):
    grid = GRIDS[grid_name]
    geoms = _units(grid)
    blocks = _blocks_of(geoms, grid, rule)
    assert len(blocks[0]) == 4 and len(blocks[2]) >= 2 and len(blocks[1]) == 1
    for seed, (far, const) in enumerate(CASES):
        data = _far_field(grid, far, const, seed)
        factor = None
        if weighted_source:
            # a population-like weight factor, varying pixel by pixel
            factor = np.random.default_rng(seed).uniform(0.5, 40.0, data.shape)
        source = ArraySource(grid, data, factor)
        res = zonal(source, geoms, STATS, rule=rule, area_weighting=area_weighting, threads=1)
        v = res.values
        assert (v["count"] > 0).all()
        for name in ("mean", "min", "max", "median"):
            assert_array_equal(
                v[name], np.full(3, const), err_msg=f"{name} for {far} next to {const}"
            )
        assert_array_equal(v["std"], np.zeros(3), err_msg=f"std for {far} next to {const}")


def _hand_block():
    """A 4 × 6 block: unit 0 holds 0.3 everywhere, unit 1 values near 3e5.

    Unit 0 has two partial entries and two runs; unit 1 an entry and a run.
    """
    values = np.full((4, 6), 3.0e5)
    values[:, :3] = 0.3
    values[2, 4] = 3.0e5 + 0.25
    values[2, 5] = NODATA
    valid = values != NODATA
    entries = (
        np.array([0, 0, 1], np.int32),
        np.array([0, 8, 11], np.int32),  # block-local pixel index (row * 6 + col)
        np.array([0.37, 0.81, 0.5]),
    )
    runs = (
        np.array([0, 0, 1], np.int32),
        np.array([13, 18, 15], np.int32),
        np.array([2, 3, 3], np.int32),
    )
    return values.ravel(), valid.ravel(), entries, runs


@pytest.mark.parametrize("weighting", [True, False])
@pytest.mark.parametrize("areas", ["per_run", "per_pixel"])
def test_hand_made_block_and_merge(weighting, areas):
    values, valid, entries, runs = _hand_block()
    entry_areas = np.array([1.0e4 + 1.0 / 3.0, 0.97e4, 1.01e4])
    kw = {"weighting": weighting}
    if areas == "per_run":
        kw["run_areas"] = np.array([0.99e4 + 0.1, 1.0e4 / 3.0, 1.02e4])
    else:
        kw["pixel_areas"] = np.random.default_rng(2).uniform(0.9e4, 1.1e4, values.size)
    part = reduce_block_runs(entries, runs, values, valid, entry_areas, **kw)
    assert part.units.tolist() == [0, 1]
    assert part.m2[0] == 0.0 and part.mean[0] == 0.3
    assert part.vmin[0] == part.vmax[0] == 0.3
    assert part.m2[1] > 0.0
    # the same values in three blocks of different weights: merged, the
    # unit's mean stays 0.3 and its m2 0 (the update's delta is exactly 0)
    acc = Accumulator(2)
    for scale in (1.0, 1.0 / 7.0, 3.3):
        p = reduce_block_runs(
            entries, runs, values, valid, entry_areas * scale, **{**kw, "weighting": True}
        )
        acc.merge(p)
    assert acc.mean[0] == 0.3 and acc.m2[0] == 0.0
    # the per-pixel path on the expanded weights: the same exactness
    unit = np.array([0, 0, 0, 0, 0, 0, 0, 1, 1, 1, 1], np.int32)
    pix = np.array([0, 8, 13, 14, 18, 19, 20, 11, 15, 16, 17], np.int32)
    cov = np.array([0.37, 0.81, 1, 1, 1, 1, 1, 0.5, 1, 1, 1], np.float64)
    factor = np.linspace(0.5, 30.0, pix.size)
    pp = reduce_block(
        unit,
        pix,
        cov,
        values,
        valid,
        np.full(pix.size, 1.0e4 / 3.0),
        weighting=weighting,
        factor=factor,
    )
    assert pp.m2[0] == 0.0 and pp.mean[0] == 0.3
    assert pp.m2[1] > 0.0


def _reference(grid, geoms, rule, data, weighting, factor=None):
    """Weighted mean and population spread (ddof = 0) per unit, two-pass in long double.

    Reference: the definitions of numpy.average and of numpy.cov with
    ``aweights`` and ``ddof=0`` (Σw·(v − mean)² / Σw), evaluated two-pass in
    np.longdouble (80-bit on x86) over the per-pixel weights of
    polygon_coverage (common practice for a reference variance).
    """
    cov = polygon_coverage(geoms, grid.transform, grid.width, grid.height, rule)
    v = data[cov.row, cov.col]
    ok = v != NODATA
    w = cov.weight.astype(np.longdouble)
    if weighting:
        w = w * grid.pixel_areas(cov.row, cov.col).astype(np.longdouble)
    if factor is not None:
        w = w * factor[cov.row, cov.col].astype(np.longdouble)
    v = v.astype(np.longdouble)
    means, stds = [], []
    for u in range(len(geoms)):
        sel = (cov.unit == u) & ok
        total = w[sel].sum()
        mean = (w[sel] * v[sel]).sum() / total
        means.append(mean)
        stds.append(np.sqrt((w[sel] * (v[sel] - mean) ** 2).sum() / total))
    return np.array(means), np.array(stds)


@pytest.mark.parametrize("grid_name", sorted(GRIDS))
@pytest.mark.parametrize("weighted_source", [False, True], ids=["runs", "weight_by"])
@pytest.mark.parametrize("rule", PIXEL_RULES)
def test_far_values_against_long_double_two_pass(rule, weighted_source, grid_name):
    """1e6 + noise of 1e-3 next to values near 0 in the same blocks.

    The spread (about 1e-3) is 1e9 times smaller than the values: summed
    around a shift near the block's other values, Σw·(v−s)² loses every digit
    of it (measured before this test: a relative error of 11 on the spread).
    Measured now over every case: 1.6e-15 for the spread, 5.6e-17 for the
    mean; the bounds leave a margin.
    """
    grid = GRIDS[grid_name]
    geoms = _units(grid)
    rng = np.random.default_rng(11)
    data = rng.uniform(0.0, 0.5, (grid.height, grid.width))
    data[7:31, 4:41] = 1.0e6 + rng.normal(0.0, 1.0e-3, (24, 37))
    data[rng.uniform(size=data.shape) < 0.08] = NODATA
    factor = rng.uniform(0.5, 40.0, data.shape) if weighted_source else None
    for weighting in (True, False):
        res = zonal(
            ArraySource(grid, data, factor),
            geoms,
            STATS,
            rule=rule,
            area_weighting="on" if weighting else "off",
            threads=1,
        )
        mean, std = _reference(grid, geoms, rule, data, weighting, factor)
        got_mean = res.values["mean"].astype(np.longdouble)
        got_std = res.values["std"].astype(np.longdouble)
        assert (std > 5e-4).all()
        assert float(np.max(np.abs(got_mean - mean) / mean)) < 1e-15
        assert float(np.max(np.abs(got_std - std) / std)) < 1e-12


def test_units_across_blocks_equal_one_block():
    """Splitting a unit's pixels over blocks changes its spread only by rounding."""
    grid = GRIDS["latlon"]
    geoms = [box(*(grid.transform * (2.0, 30.0)), *(grid.transform * (45.0, 3.0)))]
    rng = np.random.default_rng(5)
    data = 1.0e6 + rng.normal(0.0, 1.0e-3, (grid.height, grid.width))
    data[:, :20] = 0.3  # the unit holds both: a spread of about 5e5
    ws = weights_from_coverage(
        polygon_coverage(geoms, grid.transform, grid.width, grid.height, runs=True),
        grid,
        "overlap",
    )
    assert len(ws.windows) == 6
    acc, _ = stream.stream_pass(ws, grid, ArraySource(grid, data), weighting=True, threads=1)
    mean, std = _reference(grid, geoms, "overlap", data, True)
    assert abs(acc.mean[0] - float(mean[0])) / float(mean[0]) < 1e-14
    assert abs(np.sqrt(acc.m2[0] / acc.w[0]) - float(std[0])) / float(std[0]) < 1e-12
