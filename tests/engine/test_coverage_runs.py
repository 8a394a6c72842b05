"""Runs of full-weight pixels (``polygon_coverage(..., runs=True)``).

The oracle is the per-pixel output of the same kernel (``runs=False``),
itself checked against shapely and GDAL in test_coverage.py: expanding the
runs must give exactly the same ``(unit, row, col, weight)`` entries.
"""

from __future__ import annotations

import numpy as np
import pytest
from affine import Affine
from numpy.testing import assert_array_equal
from shapely.geometry import box

from covextract.engine.coverage import polygon_coverage
from tests.engine.test_coverage import NORTH_UP, _random_polygons, star, to_world

RULES = ("overlap", "center", "touched")


def _assert_same(per_pixel, with_runs):
    full = with_runs.expanded()
    assert_array_equal(full.unit, per_pixel.unit)
    assert_array_equal(full.row, per_pixel.row)
    assert_array_equal(full.col, per_pixel.col)
    assert_array_equal(full.weight, per_pixel.weight)
    # offgrid is computed by the same arithmetic with and without runs
    assert_array_equal(with_runs.offgrid, per_pixel.offgrid)


def _assert_runs_well_formed(cov, width, height):
    u, r, a, b = cov.runs
    assert ((b - a) >= 1).all()
    assert ((a >= 0) & (b <= width) & (r >= 0) & (r < height)).all()
    key = (u * height + r) * (width + 1) + a
    assert (np.diff(key) > 0).all(), "runs must be sorted by (unit, row, start)"


@pytest.mark.parametrize("rule", RULES)
def test_expanded_runs_equal_per_pixel_on_random_polygons(rule):
    width = height = 60
    transform = Affine(10.0, 0.0, 1000.0, 0.0, -10.0, 2000.0)
    geoms = [to_world(g, transform) for g in _random_polygons(50, 99, width, height)]
    ref = polygon_coverage(geoms, transform, width, height, rule)
    got = polygon_coverage(geoms, transform, width, height, rule, runs=True)
    _assert_same(ref, got)
    _assert_runs_well_formed(got, width, height)
    assert got.n_runs > 0
    if rule != "overlap":
        assert got.unit.size == 0, "center and touched keep every pixel in runs"
    else:
        # boundary cells stay entries; interior pixels of these polygons are runs
        assert got.unit.size < ref.unit.size


@pytest.mark.parametrize("rule", RULES)
def test_expanded_runs_equal_per_pixel_north_up_stars(rule):
    rng = np.random.default_rng(20240501)
    width, height = 40, 30
    geoms = [
        to_world(star(rng, rng.uniform(-5, 45), rng.uniform(-5, 35), 25, 0.2, 15), NORTH_UP)
        for _ in range(25)
    ]
    _assert_same(
        polygon_coverage(geoms, NORTH_UP, width, height, rule),
        polygon_coverage(geoms, NORTH_UP, width, height, rule, runs=True),
    )


def test_square_hand_worked_runs():
    # identity transform: box(1.5, 1, 5, 3) covers half of column 1 and all of
    # columns 2..4 in rows 1 and 2. Row 1 holds the bottom edge (on the pixel line
    # y = 1, cut at every column), so its cells 1..4 all received a piece and stay
    # entries; in row 2 only the left edge's cell (1) and the cell after it (2,
    # where its cover lands) are entries, and columns 3..4 are one interior run.
    cov = polygon_coverage([box(1.5, 1, 5, 3)], Affine.identity(), 8, 6, runs=True)
    assert_array_equal(cov.row, [1, 1, 1, 1, 2, 2])
    assert_array_equal(cov.col, [1, 2, 3, 4, 1, 2])
    assert_array_equal(cov.weight, [0.5, 1, 1, 1, 0.5, 1])
    assert_array_equal(np.stack(cov.runs), [[0], [2], [3], [5]])


def test_center_runs_clipped_at_grid_edges():
    # a box from column -3 to 12 on a 10-pixel-wide grid: 15 centres, 10 on the grid
    cov = polygon_coverage([box(-3, 0, 12, 2)], Affine.identity(), 10, 4, "center", runs=True)
    assert_array_equal(cov.runs[2], [0, 0])
    assert_array_equal(cov.runs[3], [10, 10])
    assert_array_equal(cov.runs[1], [0, 1])
    assert_array_equal(cov.offgrid, [10.0])


def test_no_polygons_gives_empty_runs():
    cov = polygon_coverage([None], Affine.identity(), 4, 4, runs=True)
    assert cov.n_runs == 0 and cov.unit.size == 0
