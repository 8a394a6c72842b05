"""NetCDF cubes read as series: CF time, packing, north-up grids in -180..180.

Every expected value here is worked out by hand from a 4 x 36 global grid of
10° pixels whose stored values encode their time step, latitude row and
longitude column (``1000·t + 100·lat_index + lon_index``, lat_index counted
from the south, lon_index from 0°E eastwards in 0..360 longitudes).
"""

from __future__ import annotations

import datetime as dt
import pickle
from pathlib import Path

import numpy as np
import pytest
import rasterio
import xarray as xr
from affine import Affine
from numpy.testing import assert_allclose, assert_array_equal
from pyproj import CRS
from shapely.geometry import box

from covextract.core.periods import Period, Step
from covextract.engine.zonal import zonal
from covextract.errors import InputFileError, RasterError
from covextract.io.cube import open_cube
from covextract.io.series_files import discover_series
from covextract.stats.names import parse_stat

D = dt.date


def write_tif(path: Path, data: np.ndarray, transform: Affine, *, nodata=None, scale=None) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    with rasterio.open(
        path,
        "w",
        driver="GTiff",
        width=data.shape[1],
        height=data.shape[0],
        count=1,
        dtype=data.dtype,
        crs="EPSG:4326",
        transform=transform,
        nodata=nodata,
    ) as ds:
        ds.write(data, 1)
        if scale is not None:
            ds.scales = (scale,)


# -------------------------------------------------------------------- cube
MONTHS = ["2019-12", "2020-01", "2020-02", "2020-03", "2020-05"]
# noleap calendar, days since 2019-12-01: Dec 31 days, Jan 31, Feb 28, Mar 31, Apr 30.
BOUNDS = np.array([[0, 31], [31, 62], [62, 90], [90, 121], [151, 182]], dtype=np.float64)
LAT = np.array([-15.0, -5.0, 5.0, 15.0])  # ascending: south first
LON = np.arange(5.0, 360.0, 10.0)  # 0..360
NODATA = -999


def stored_cube() -> np.ndarray:
    t, i, j = np.meshgrid(np.arange(5), np.arange(4), np.arange(36), indexing="ij")
    s = (1000 * t + 100 * i + j).astype("int16")
    s[1, 2, 20] = NODATA  # 2020-01, lat 5, lon 205 (= -155)
    return s


def north_up(block_0360: np.ndarray) -> np.ndarray:
    """A (lat ascending, lon 0..360) slice on the north-up -180..180 grid."""
    return np.roll(block_0360[::-1, :], -18, axis=1)


def write_cube(path: Path, *, calendar="noleap", bounds=True, grid_mapping=True, time=True) -> Path:
    s = stored_cube()
    physical = np.where(s == NODATA, np.nan, s * 0.1)
    attrs = {"units": "mm"}
    if grid_mapping:
        attrs["grid_mapping"] = "crs"
    coords = {
        "lat": ("lat", LAT, {"units": "degrees_north", "standard_name": "latitude"}),
        "lon": ("lon", LON, {"units": "degrees_east", "standard_name": "longitude"}),
    }
    data_vars = {}
    if time:
        tattrs = {"units": "days since 2019-12-01 00:00:00", "calendar": calendar}
        if bounds:
            tattrs["bounds"] = "time_bnds"
            data_vars["time_bnds"] = (("time", "nv"), BOUNDS)
        coords["time"] = ("time", BOUNDS.mean(axis=1), tattrs)
        data_vars["precip"] = (("time", "lat", "lon"), physical, attrs)
    else:
        data_vars["precip"] = (("lat", "lon"), physical[0], attrs)
    if grid_mapping:
        data_vars["crs"] = ((), 0, CRS("EPSG:4326").to_cf())
    ds = xr.Dataset(data_vars, coords=coords)
    # Packed as int16 × 0.1 with a fill value, as climate archives store rainfall.
    ds.to_netcdf(
        path,
        engine="netcdf4",
        encoding={
            "precip": {"dtype": "int16", "scale_factor": 0.1, "_FillValue": NODATA},
            **({"time": {"_FillValue": None}} if time else {}),
        },
    )
    return path


@pytest.fixture
def rain_pair(tmp_path):
    """The same invented rainfall as five GeoTIFFs (north-up, -180..180) and as a cube."""
    s = stored_cube()
    for t, label in enumerate(MONTHS):
        write_tif(
            tmp_path / "tif" / f"rain_{label.replace('-', '')}.tif",
            north_up(s[t]),
            Affine(10.0, 0, -180.0, 0, -10.0, 20.0),
            nodata=NODATA,
            scale=0.1,
        )
    tifs = discover_series("tif/rain_{year}{month:02d}.tif", "month", base_dir=tmp_path)
    cube = open_cube(write_cube(tmp_path / "rain.nc"), variable="precip")
    return tifs, cube


def test_cube_periods_from_noleap_bounds(rain_pair):
    tifs, cube = rain_pair
    assert [p.label for p in cube.periods] == MONTHS
    assert cube.periods == tifs.periods
    # A noleap February is still the calendar month: it ends on 29 Feb 2020.
    assert cube.periods[2] == Period(D(2020, 2, 1), D(2020, 2, 29), "2020-02")
    assert [p.label for p in cube.gaps] == ["2020-04"] == [p.label for p in tifs.gaps]
    assert cube.step == Step("month")


def test_cube_grid_is_north_up_in_minus_180_180(rain_pair):
    tifs, cube = rain_pair
    cg, tg = cube.source("2020-01").grid, tifs.source("2020-01").grid
    assert (cg.width, cg.height) == (tg.width, tg.height) == (36, 4)
    assert_allclose(tuple(cg.transform)[:6], (10.0, 0, -180.0, 0, -10.0, 20.0), rtol=0, atol=1e-12)
    assert_allclose(tuple(cg.transform)[:6], tuple(tg.transform)[:6], rtol=0, atol=1e-12)
    assert cg.crs.is_geographic and cg.crs.equals(tg.crs, ignore_axis_order=True)
    assert len(cube.grids()) == 1 and list(cube.grids().values())[0] == cube.periods


@pytest.mark.parametrize(
    "window", [(0, 0, 4, 36), (1, 15, 2, 6), (0, 17, 4, 2), (3, 35, 1, 1), (2, 0, 2, 18)]
)
def test_geotiff_series_and_cube_give_equal_blocks(rain_pair, window):
    tifs, cube = rain_pair
    for period in tifs.periods:
        a, b = tifs.source(period), cube.source(period)
        sa, sb = a.read_block(window), b.read_block(window)
        assert_array_equal(sb, sa)
        (va, ma), (vb, mb) = a.to_values(sa), b.to_values(sb)
        assert_array_equal(mb, ma)
        assert_allclose(vb[mb], va[ma], rtol=0, atol=1e-12)


def test_cube_values_at_negative_longitudes_by_hand(rain_pair):
    _, cube = rain_pair
    src = cube.source("2020-01")  # t = 1
    values, valid = src.to_values(src.read_block((0, 0, 4, 36)))
    # Row 1 is lat 5 (lat_index 2); column 0 is lon -175 = 185 °E (lon_index 18).
    assert_allclose(values[1, 0], (1000 * 1 + 100 * 2 + 18) * 0.1, rtol=0, atol=1e-12)
    # Column 2 is lon -155 = 205 °E, the fill value of that month.
    assert not valid[1, 2] and valid.sum() == 4 * 36 - 1
    # Row 3 is lat -15 (lat_index 0); column 18 is lon 5 °E (lon_index 0).
    assert_allclose(values[3, 18], (1000 + 0 + 0) * 0.1, rtol=0, atol=1e-12)


def test_zonal_mean_west_of_greenwich_equal_for_cube_and_geotiffs(rain_pair):
    tifs, cube = rain_pair
    # Two pixels of the lat 0..10 row at lon -180..-160 (185 and 195 °E):
    # December 2019 (t = 0) holds 218 and 219 stored, 21.8 and 21.9 mm.
    unit = np.array([box(-180.0, 0.0, -160.0, 10.0)], dtype=object)
    stats = [parse_stat("mean"), parse_stat("count")]
    by_cube = zonal(cube.source("2019-12"), unit, stats, threads=1)
    by_tif = zonal(tifs.source("2019-12"), unit, stats, threads=1)
    assert_allclose(by_cube.values["mean"], [21.85], rtol=0, atol=1e-9)
    assert_allclose(by_cube.values["mean"], by_tif.values["mean"], rtol=0, atol=1e-12)
    assert by_cube.values["count"][0] == by_tif.values["count"][0] == 2


def test_cube_source_pickles(rain_pair):
    _, cube = rain_pair
    src = cube.source("2020-03")
    before = src.read_block((0, 10, 4, 20))
    again = pickle.loads(pickle.dumps(src))
    assert again.cube._ds is None
    assert_array_equal(again.read_block((0, 10, 4, 20)), before)
    assert again.period == src.period and again.grid.same_lattice(src.grid)


def test_cube_360_day_calendar_without_bounds(tmp_path):
    # Mid-month stamps of a 360-day calendar (30-day months): 15, 45, 75 days
    # after 1 Jan 2001 are 16 Jan, 16 Feb, 16 Mar; with no bounds they are months.
    ds = xr.Dataset(
        {
            "t2m": (
                ("time", "y", "x"),
                np.ones((3, 2, 2), dtype="float32"),
                {"grid_mapping": "crs"},
            ),
            "crs": ((), 0, CRS("EPSG:4326").to_cf()),
        },
        coords={
            "time": (
                "time",
                [15.0, 45.0, 75.0],
                {"units": "days since 2001-01-01", "calendar": "360_day"},
            ),
            "y": ("y", [1.5, 0.5]),
            "x": ("x", [10.5, 11.5]),
        },
    )
    path = tmp_path / "t.nc"
    ds.to_netcdf(path, engine="netcdf4", encoding={"time": {"_FillValue": None}})
    cube = open_cube(path, variable="t2m")
    assert [p.label for p in cube.periods] == ["2001-01", "2001-02", "2001-03"]
    assert cube.periods[1].end == D(2001, 2, 28)
    assert_allclose(
        tuple(cube.source("2001-02").grid.transform)[:6], (1, 0, 10, 0, -1, 2), rtol=0, atol=1e-12
    )
    with pytest.raises(RasterError, match="360_day calendar cannot be matched"):
        open_cube(path, variable="t2m", every="16 days")


def test_cube_without_time_axis(tmp_path):
    path = write_cube(tmp_path / "flat.nc", time=False)
    with pytest.raises(
        RasterError, match=r"no time axis: its dimensions are lat \(4\), lon \(36\)"
    ):
        open_cube(path, variable="precip")


def test_cube_without_crs(tmp_path):
    path = write_cube(tmp_path / "nocrs.nc", grid_mapping=False)
    with pytest.raises(RasterError, match="has no CRS.*EPSG:4326"):
        open_cube(path, variable="precip")
    # The crs= argument supplies it.
    cube = open_cube(path, variable="precip", crs="EPSG:4326")
    assert cube.source("2020-05").grid.crs.to_epsg() == 4326


def test_cube_unknown_variable_and_missing_file(tmp_path):
    path = write_cube(tmp_path / "c.nc")
    with pytest.raises(
        RasterError, match=r"no variable 'rain'; its data variables are: .*'precip'"
    ):
        open_cube(path, variable="rain")
    with pytest.raises(InputFileError, match="not found"):
        open_cube(tmp_path / "absent.nc", variable="precip")


def test_cube_bounds_decoded_in_the_wrong_calendar_are_refused(tmp_path):
    # The same numbers read in the standard calendar: 90 days after 1 Dec 2019
    # is 29 Feb 2020, so "February" would end on the 28th: not whole months.
    path = write_cube(tmp_path / "std.nc", calendar="standard")
    with pytest.raises(RasterError, match="not whole months"):
        open_cube(path, variable="precip")


def test_regional_cube_east_of_180_with_datetime_stamps(tmp_path):
    # Longitudes 215, 205, 195 °E (descending) and latitudes 10, 0 (north first):
    # wholly east of 180 °E, so the grid is shifted to -170..-140 and columns
    # are read in reverse. Stamps on the first of each month, written by xarray
    # from datetime64 (standard calendar, no bounds): months.
    data = np.arange(2 * 2 * 3, dtype="float32").reshape(2, 2, 3)
    ds = xr.Dataset(
        {
            "v": (("time", "lat", "lon"), data, {"grid_mapping": "crs"}),
            "crs": ((), 0, CRS("EPSG:4326").to_cf()),
        },
        coords={
            "time": np.array(["2020-03-01", "2020-04-01"], dtype="datetime64[ns]"),
            "lat": [10.0, 0.0],
            "lon": [215.0, 205.0, 195.0],
        },
    )
    path = tmp_path / "east.nc"
    ds.to_netcdf(path, engine="netcdf4", encoding={"v": {"chunksizes": (1, 1, 3)}})
    cube = open_cube(path, variable="v")
    assert [p.label for p in cube.periods] == ["2020-03", "2020-04"]
    src = cube.source("2020-04")
    assert_allclose(tuple(src.grid.transform)[:6], (10, 0, -170, 0, -10, 15), rtol=0, atol=1e-12)
    # Column 0 is now 195 °E = -165: the file's last column.
    assert_array_equal(src.read_block((0, 0, 2, 3)), [[8, 7, 6], [11, 10, 9]])
    assert_array_equal(src.read_block((1, 1, 1, 2)), [[10, 9]])
