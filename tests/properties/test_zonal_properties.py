"""Invariants of zonal statistics that hold for any input (hypothesis)."""

import numpy as np
import rasterio
from affine import Affine
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose
from shapely.geometry import Point, box

from covextract.engine.zonal import zonal
from covextract.io.rasters import open_layer
from covextract.stats.names import parse_stat

H, W = 24, 30
TRANSFORM = Affine(10.0, 0, 600_000.0, 0, -10.0, 5_000_000.0)


class ArraySource:
    """An in-memory raster source with the engine's reader protocol."""

    def __init__(self, data, nodata=None):
        from pyproj import CRS

        from covextract.core.grid import Grid

        self.data = data
        self.nodata = nodata
        self.grid = Grid(TRANSFORM, W, H, CRS.from_epsg(32633), (8, 8))

    def read_block(self, window):
        r0, c0, h, w = window
        return self.data[r0 : r0 + h, c0 : c0 + w]

    def to_values(self, stored):
        values = stored.astype(np.float64)
        valid = np.isfinite(values)
        if self.nodata is not None:
            valid &= stored != self.nodata
        return values, valid


arrays = st.integers(0, 2**32 - 1).map(
    lambda seed: np.random.default_rng(seed).normal(10, 4, size=(H, W)).astype(np.float32)
)


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    arrays,
    st.lists(st.floats(0.05, 0.95), min_size=1, max_size=4),
    st.lists(st.floats(0.05, 0.95), min_size=1, max_size=4),
)
def test_units_partitioning_the_raster_sum_to_its_total(data, xcuts, ycuts):
    # Tobler (1979) volume preservation: a partition of the grid keeps the total.
    x0, y1 = TRANSFORM.c, TRANSFORM.f
    x1, y0 = x0 + W * 10.0, y1 - H * 10.0
    xs = [x0] + sorted(x0 + c * (x1 - x0) for c in xcuts) + [x1]
    ys = [y0] + sorted(y0 + c * (y1 - y0) for c in ycuts) + [y1]
    cells = [
        box(xs[i], ys[j], xs[i + 1], ys[j + 1])
        for i in range(len(xs) - 1)
        for j in range(len(ys) - 1)
    ]
    cells = [c for c in cells if c.area > 0]
    src = ArraySource(data)
    res = zonal(
        src,
        np.array(cells, dtype=object),
        [parse_stat("sum"), parse_stat("area_km2")],
        rule="overlap",
        area_weighting="off",
        threads=1,
    )
    assert_allclose(np.nansum(res.values["sum"]), data.astype(np.float64).sum(), rtol=1e-6)
    total_area = (
        sum(src.grid.pixel_areas(np.array([r]), np.array([0]))[0] for r in range(H)) * W / 1e6
    )
    assert_allclose(np.nansum(res.values["area_km2"]), total_area, rtol=1e-6)


@settings(max_examples=25, deadline=None)
@given(arrays, st.floats(600_020, 600_280), st.floats(4_999_780, 4_999_980), st.floats(5.0, 60.0))
def test_mean_between_min_and_max_and_counts_grow_with_radius(data, x, y, r):
    data = data.copy()
    data[::5, ::7] = -9999
    src = ArraySource(data, nodata=-9999)
    stats = [
        parse_stat(s) for s in ("count", "mean", "min", "max", "median", "q10", "q90", "area_km2")
    ]
    geoms = np.array(
        [Point(x, y).buffer(r * k, quad_segs=32) for k in (1.0, 1.5, 2.0)], dtype=object
    )
    for rule in ("overlap", "center", "touched"):
        res = zonal(src, geoms, stats, rule=rule, threads=1)
        v = res.values
        has = v["count"] > 0
        assert np.all(v["min"][has] <= v["mean"][has] + 1e-9)
        assert np.all(v["mean"][has] <= v["max"][has] + 1e-9)
        assert np.all(v["q10"][has] <= v["median"][has] + 1e-9)
        assert np.all(v["median"][has] <= v["q90"][has] + 1e-9)
        assert np.all(np.diff(v["count"]) >= 0), rule
        if rule == "overlap":
            assert np.all(np.diff(v["area_km2"][has]) >= -1e-12)


def test_geotiff_and_in_memory_source_agree(tmp_path):
    data = np.random.default_rng(5).normal(size=(H, W)).astype(np.float32)
    path = tmp_path / "p.tif"
    with rasterio.open(
        path,
        "w",
        driver="GTiff",
        width=W,
        height=H,
        count=1,
        dtype="float32",
        crs="EPSG:32633",
        transform=TRANSFORM,
        tiled=True,
        blockxsize=16,
        blockysize=16,
    ) as ds:
        ds.write(data, 1)
    geoms = np.array([Point(600_150, 4_999_880).buffer(70)], dtype=object)
    stats = [parse_stat("mean"), parse_stat("q90")]
    a = zonal(open_layer(path), geoms, stats)
    b = zonal(ArraySource(data), geoms, stats)
    for s in stats:
        assert_allclose(a.values[s.name], b.values[s.name], rtol=1e-12)
