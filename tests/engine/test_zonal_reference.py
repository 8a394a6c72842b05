"""Zonal statistics against the reference library and hand computations."""

import numpy as np
import pytest
import rasterio
import shapely
from affine import Affine
from numpy.testing import assert_allclose
from shapely.geometry import Polygon, box

from covextract.engine.zonal import zonal
from covextract.io.rasters import open_layer
from covextract.stats.names import parse_stat

REF_STATS = ["count", "sum", "mean", "min", "max", "median"]


def _write(path, data, transform, crs="EPSG:32631", nodata=None, block=16):
    h, w = data.shape
    with rasterio.open(
        path,
        "w",
        driver="GTiff",
        width=w,
        height=h,
        count=1,
        dtype=data.dtype,
        crs=crs,
        transform=transform,
        nodata=nodata,
        tiled=True,
        blockxsize=block,
        blockysize=block,
    ) as ds:
        ds.write(data, 1)
    return path


def _random_polygons(rng, n, extent, size):
    polys = []
    for _ in range(n):
        cx, cy = rng.uniform(extent[0], extent[2]), rng.uniform(extent[1], extent[3])
        k = int(rng.integers(5, 12))
        ang = np.sort(rng.uniform(0, 2 * np.pi, k))
        rad = rng.uniform(0.4, 1.0, k) * size
        poly = Polygon(np.c_[cx + rad * np.cos(ang), cy + rad * np.sin(ang)])
        if poly.is_valid:
            polys.append(poly)
    return polys


@pytest.fixture(scope="module")
def scene(tmp_path_factory):
    rng = np.random.default_rng(42)
    data = rng.normal(20, 5, size=(64, 80)).astype(np.float32)
    data[rng.uniform(size=data.shape) < 0.08] = -9999
    t = Affine(30.0, 0, 500_000.0, 0, -30.0, 4_000_000.0)
    path = _write(tmp_path_factory.mktemp("ref") / "r.tif", data, t, nodata=-9999)
    extent = (500_000 + 100, 4_000_000 - 64 * 30 + 100, 500_000 + 80 * 30 - 100, 4_000_000 - 100)
    polys = _random_polygons(rng, 40, extent, 150.0)
    return path, polys


@pytest.mark.parametrize("rule,all_touched", [("center", False), ("touched", True)])
def test_center_and_touched_equal_rasterstats(scene, rule, all_touched):
    # Reference: rasterstats.zonal_stats (all_touched as given), area weighting off
    # since rasterstats does not weight by pixel area.
    from rasterstats import zonal_stats

    path, polys = scene
    src = open_layer(path)
    res = zonal(
        src,
        np.array(polys, dtype=object),
        [parse_stat(s) for s in REF_STATS],
        rule=rule,
        area_weighting="off",
    )
    ref = zonal_stats(polys, str(path), stats=REF_STATS, all_touched=all_touched, nodata=-9999)
    for i, r in enumerate(ref):
        assert res.values["count"][i] == r["count"], i
        for s in ("sum", "mean", "min", "max", "median"):
            if r[s] is None:
                assert np.isnan(res.values[s][i])
            else:
                assert_allclose(res.values[s][i], r[s], rtol=1e-6, err_msg=f"{s} unit {i}")


def test_overlap_on_pixel_aligned_squares_equals_hand_computation(tmp_path):
    # A 2x2-pixel square on pixel lines covers 4 whole pixels; half-shifted it covers
    # 2 whole and 4 half pixels. Worked out by hand.
    data = np.arange(36, dtype=np.float32).reshape(6, 6)
    t = Affine(1.0, 0, 0.0, 0, -1.0, 6.0)
    src = open_layer(_write(tmp_path / "a.tif", data, t))
    squares = np.array([box(1, 3, 3, 5), box(1.5, 3, 3.5, 5)], dtype=object)
    res = zonal(
        src,
        squares,
        [parse_stat(s) for s in ("count", "sum", "mean", "area_km2")],
        rule="overlap",
        area_weighting="off",
    )
    # rows 1-2, cols 1-2 -> values 7, 8, 13, 14
    assert res.values["count"][0] == 4
    assert_allclose(res.values["sum"][0], 7 + 8 + 13 + 14)
    assert_allclose(res.values["mean"][0], (7 + 8 + 13 + 14) / 4)
    # shifted: half of cols 1 and 3, all of col 2
    s = 0.5 * (7 + 13) + (8 + 14) + 0.5 * (9 + 15)
    assert res.values["count"][1] == 6
    assert_allclose(res.values["sum"][1], s)
    assert_allclose(res.values["mean"][1], s / 4)
    pixel_km2 = src.grid.pixel_areas(np.array([0]), np.array([0]))[0] / 1e6
    assert_allclose(res.values["area_km2"], [4 * pixel_km2, 4 * pixel_km2])


def test_unit_outside_the_raster_gets_missing_values_and_qa(tmp_path):
    data = np.ones((10, 10), dtype=np.float32)
    src = open_layer(_write(tmp_path / "b.tif", data, Affine(1.0, 0, 0, 0, -1.0, 10.0)))
    geoms = np.array([box(2, 2, 4, 4), box(50, 50, 52, 52), box(8, 8, 12, 12), None], dtype=object)
    res = zonal(src, geoms, [parse_stat(s) for s in ("count", "valid_share", "mean", "sum")])
    assert res.values["count"].tolist() == [4, 0, 4, 0]
    assert res.values["valid_share"][1] == 0.0
    assert np.isnan(res.values["mean"][1]) and np.isnan(res.values["sum"][1])
    assert res.qa[1] == ["outside_layer"]
    assert "partly_outside" in res.qa[2]
    assert_allclose(res.values["valid_share"][2], 0.25)  # 2x2 of the 4x4 square is on the grid
    assert res.qa[3] == []


def test_all_nodata_unit_is_missing_with_reason(tmp_path):
    data = np.full((6, 6), -1.0, dtype=np.float32)
    data[:, 3:] = 5.0
    src = open_layer(_write(tmp_path / "c.tif", data, Affine(1.0, 0, 0, 0, -1.0, 6.0), nodata=-1.0))
    res = zonal(
        src,
        np.array([box(0, 0, 3, 6), box(2, 0, 6, 6)], dtype=object),
        [parse_stat(s) for s in ("count", "valid_share", "mean")],
    )
    assert res.values["count"][0] == 0 and np.isnan(res.values["mean"][0])
    assert res.qa[0] == ["no_valid_pixel"]
    assert_allclose(res.values["valid_share"][1], 0.75)
    assert_allclose(res.values["mean"][1], 5.0)


def test_small_unit_center_rule_reports_missed_centres(tmp_path):
    data = np.ones((6, 6), dtype=np.float32)
    src = open_layer(_write(tmp_path / "d.tif", data, Affine(1.0, 0, 0, 0, -1.0, 6.0)))
    tiny = np.array([box(2.1, 2.1, 2.3, 2.3)], dtype=object)
    res = zonal(src, tiny, [parse_stat("mean")], rule="center")
    assert np.isnan(res.values["mean"][0]) and res.qa[0] == ["missed_by_centers"]
    res = zonal(src, tiny, [parse_stat("mean"), parse_stat("count")], rule="overlap")
    assert res.values["mean"][0] == 1.0 and res.values["count"][0] == 1


def test_scale_offset_and_nodata_applied_before_statistics(tmp_path):
    # common practice: vegetation index stored as value x 10000 with a negative fill value
    data = np.array([[5000, 7000], [-3000, 9000]], dtype=np.int16)
    path = _write(tmp_path / "e.tif", data, Affine(1.0, 0, 0, 0, -1.0, 2.0), block=16)
    src = open_layer(path, scale=0.0001, nodata=-3000)
    res = zonal(
        src,
        np.array([box(0, 0, 2, 2)], dtype=object),
        [parse_stat(s) for s in ("mean", "min", "max", "valid_share")],
        area_weighting="off",
    )
    assert_allclose(res.values["mean"], [0.7])
    assert_allclose(res.values["min"], [0.5])
    assert_allclose(res.values["max"], [0.9])
    assert_allclose(res.values["valid_share"], [0.75])


def test_area_weighting_on_latlon_grid(tmp_path):
    # Rows at higher latitude have smaller pixels (about cos(lat), common practice), so the
    # area-weighted mean leans towards the equatorward row.
    data = np.array([[10.0], [0.0]], dtype=np.float32)  # north row 10, south row 0
    t = Affine(1.0, 0, 0.0, 0, -1.0, 61.0)
    src = open_layer(_write(tmp_path / "f.tif", data, t, crs="EPSG:4326"))
    unit = np.array([box(0, 59, 1, 61)], dtype=object)
    on = zonal(src, unit, [parse_stat("mean"), parse_stat("area_km2")], area_weighting="auto")
    off = zonal(src, unit, [parse_stat("mean")], area_weighting="off")
    assert_allclose(off.values["mean"], [5.0])
    a = src.grid.pixel_areas(np.array([0, 1]))
    assert_allclose(on.values["mean"], [10 * a[0] / a.sum()])
    assert on.values["mean"][0] < 5.0
    assert_allclose(on.values["area_km2"], [a.sum() / 1e6])


def test_buffer_area_on_grid_close_to_circle(tmp_path):
    # A 5 km geodesic buffer at 0 and 60 degrees latitude covers pi*(5 km)^2 within 0.5 %
    # on a lat/lon grid (area from the ellipsoid, Karney 2013 via pyproj in the units tests).
    from covextract.units.buffers import geodesic_buffers

    for lat in (0.0, 60.0):
        res_deg = 0.002
        # 300 x 100 pixels of 0.002 deg around the point: the whole buffer is on the grid
        t = Affine(res_deg, 0, 10.0 - 0.3, 0, -res_deg, lat + 0.1)
        data = np.ones((100, 300), dtype=np.float32)
        src = open_layer(_write(tmp_path / f"g{int(lat)}.tif", data, t, crs="EPSG:4326", block=64))
        buf = geodesic_buffers(np.array([10.0]), np.array([lat]), 5000.0)
        res = zonal(src, buf, [parse_stat("area_km2"), parse_stat("valid_share")])
        assert res.values["valid_share"][0] == 1.0
        assert_allclose(res.values["area_km2"][0], np.pi * 25.0, rtol=5e-3)


def test_each_block_read_once_per_pass(tmp_path):
    data = np.random.default_rng(0).normal(size=(64, 64)).astype(np.float32)
    src = open_layer(_write(tmp_path / "h.tif", data, Affine(1.0, 0, 0, 0, -1.0, 64.0), block=16))
    reads = []
    real = src.read_block

    class Counting:
        grid = src.grid
        to_values = staticmethod(src.to_values)

        @staticmethod
        def read_block(window):
            reads.append(window)
            return real(window)

    polys = np.array([box(1, 1, 40, 40), box(20, 20, 63, 63), box(5, 30, 60, 35)], dtype=object)
    res = zonal(Counting, polys, [parse_stat("mean"), parse_stat("q90")])
    assert len(reads) == len(set(reads)) == res.blocks_read
    # blocks whose interior meets a unit, worked out from the geometry
    expected = {
        (r0, c0)
        for r0 in range(0, 64, 16)
        for c0 in range(0, 64, 16)
        if any(
            shapely.area(box(c0, 64 - r0 - 16, c0 + 16, 64 - r0).intersection(p)) > 0 for p in polys
        )
    }
    assert {(w[0], w[1]) for w in reads} == expected
