"""Layer series: template discovery, steps, selections, NetCDF cubes.

Every expected value here is worked out by hand from the tiny fixtures: file
names whose dates are known, and a 4 x 36 global grid of 10° pixels whose
stored values encode their time step, latitude row and longitude column
(``1000·t + 100·lat_index + lon_index``, lat_index counted from the south,
lon_index from 0°E eastwards in 0..360 longitudes).
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

from covextract.engine.zonal import zonal
from covextract.errors import InputFileError, RasterError, RecipeError
from covextract.io.series import (
    Period,
    Step,
    discover_series,
    open_cube,
    parse_every,
    parse_selection,
    template_fields,
)
from covextract.stats.names import parse_stat

D = dt.date


def touch(folder: Path, *names: str) -> None:
    """Empty files: discovery reads names only, never pixels."""
    for name in names:
        path = folder / name
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(b"")


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


# ------------------------------------------------------------------- steps
@pytest.mark.parametrize(
    ("text", "step"),
    [
        ("month", Step("month")),
        ("year", Step("year")),
        ("day", Step("day")),
        ("1 day", Step("day")),
        ("16 days", Step("day", 16)),
        ("  8   Days ", Step("day", 8)),
        ("16 days restarting each year", Step("day", 16, True)),
    ],
)
def test_parse_every_accepts(text, step):
    assert parse_every(text) == step


@pytest.mark.parametrize(
    "text", ["fortnight", "2 months", "0 days", 16, "day restarting each year", ""]
)
def test_parse_every_rejects(text):
    with pytest.raises(RecipeError, match="every: .* month, year, day|every: .*"):
        parse_every(text)


def test_step_periods_by_hand():
    # 2020 is a leap year: February has 29 days.
    assert Step("month").period(D(2020, 2, 1)) == Period(D(2020, 2, 1), D(2020, 2, 29), "2020-02")
    assert Step("month").period(D(2019, 12, 1)) == Period(
        D(2019, 12, 1), D(2019, 12, 31), "2019-12"
    )
    assert Step("year").period(D(2021, 1, 1)) == Period(D(2021, 1, 1), D(2021, 12, 31), "2021")
    assert Step("day", 16).period(D(2020, 12, 18)) == Period(
        D(2020, 12, 18), D(2021, 1, 2), "2020-12-18"
    )
    # The last composite of a year that restarts on 1 January ends on 31 December.
    restart = Step("day", 16, True)
    assert restart.period(D(2021, 12, 19)) == Period(D(2021, 12, 19), D(2021, 12, 31), "2021-12-19")
    assert restart.next_start(D(2021, 12, 19)) == D(2022, 1, 1)


# --------------------------------------------------------------- templates
@pytest.mark.parametrize(
    ("template", "fields"),
    [
        ("rain_{year}{month:02d}.tif", {"year", "month"}),
        ("{year}_{doy:03d}", {"year", "doy"}),
        ("{year}-{month:02d}-{day:02d}", {"year", "month", "day"}),
        ("{year}/ndvi_{year}_{doy:03d}.tif", {"year", "doy"}),
        ("t_{year:04}{{v2}}.tif", {"year"}),
    ],
)
def test_template_fields(template, fields):
    assert template_fields(template) == fields


@pytest.mark.parametrize(
    ("template", "words"),
    [
        ("rain_{week}.tif", "unknown field {week}"),
        ("rain_{}.tif", "no field name"),
        ("rain_{0}.tif", "no field name"),
        ("rain_{year!r}.tif", "conversion"),
        ("rain_{month:2d}.tif", "zero-padded width"),
        ("rain_{year:%Y}.tif", "not supported"),
        ("rain_{month:02x}.tif", "not supported"),
        ("rain_{year.real}.tif", "unknown field"),
        ("rain_{year.tif", "not a valid template"),
    ],
)
def test_template_fields_rejects(template, words):
    with pytest.raises(RecipeError, match=words.replace("{", r"\{").replace("}", r"\}")):
        template_fields(template)


# --------------------------------------------------------------- discovery
def test_monthly_series_gaps_and_strays(tmp_path):
    touch(tmp_path, "rain_201911.tif", "rain_201912.tif", "rain_202002.tif", "rain_202003.tif")
    # Not the template's names: a yearly file, an unpadded month, a sidecar.
    touch(tmp_path, "rain_2020.tif", "rain_20204.tif", "rain_201911.tif.aux.xml", "notes.txt")
    s = discover_series("rain_{year}{month:02d}.tif", "month", base_dir=tmp_path)
    assert [p.label for p in s.periods] == ["2019-11", "2019-12", "2020-02", "2020-03"]
    assert s.periods[2] == Period(D(2020, 2, 1), D(2020, 2, 29), "2020-02")
    assert s.gaps == [Period(D(2020, 1, 1), D(2020, 1, 31), "2020-01")]
    assert s.path("2020-03") == tmp_path / "rain_202003.tif"
    assert s.step == Step("month")


def test_doy_template_in_year_folders_with_16_day_composites(tmp_path):
    # 2020 is a leap year: doy 337 = 2 Dec 2020; 16 days later 18 Dec (doy 353,
    # missing: a gap), then 3 Jan 2021 (doy 3) and 19 Jan 2021 (doy 19).
    touch(tmp_path, "2020/ndvi_2020_337.tif", "2021/ndvi_2021_003.tif", "2021/ndvi_2021_019.tif")
    touch(tmp_path, "2021/ndvi_2020_019.tif")  # year folder and name disagree: not a match
    s = discover_series("{year}/ndvi_{year}_{doy:03d}.tif", "16 days", base_dir=tmp_path)
    assert s.periods == [
        Period(D(2020, 12, 2), D(2020, 12, 17), "2020-12-02"),
        Period(D(2021, 1, 3), D(2021, 1, 18), "2021-01-03"),
        Period(D(2021, 1, 19), D(2021, 2, 3), "2021-01-19"),
    ]
    assert s.gaps == [Period(D(2020, 12, 18), D(2021, 1, 2), "2020-12-18")]
    # A composite is selected by its start: the one of 18 Dec would be in 2020.
    assert [p.label for p in s.select("2021")] == ["2021-01-03", "2021-01-19"]


def test_composites_restarting_each_year(tmp_path):
    # doy 353 of 2021 is 19 Dec; the next composite starts on 1 Jan 2022, 13 days later.
    touch(tmp_path, "m_2021_337.tif", "m_2021_353.tif", "m_2022_001.tif", "m_2022_017.tif")
    with pytest.raises(
        RasterError,
        match=r"m_2022_001\.tif \(2022-01-01\): expected 2021-12-19 or "
        r"2022-01-04.*restarting each year",
    ):
        discover_series("m_{year}_{doy:03d}.tif", "16 days", base_dir=tmp_path)
    s = discover_series("m_{year}_{doy:03d}.tif", "16 days restarting each year", base_dir=tmp_path)
    assert [(p.label, p.end) for p in s.periods] == [
        ("2021-12-03", D(2021, 12, 18)),
        ("2021-12-19", D(2021, 12, 31)),
        ("2022-01-01", D(2022, 1, 16)),
        ("2022-01-17", D(2022, 2, 1)),
    ]
    assert s.gaps == []


def test_daily_series_from_year_month_day(tmp_path):
    touch(tmp_path, "2021-02-27.tif", "2021-02-28.tif", "2021-03-02.tif")
    s = discover_series("{year}-{month:02d}-{day:02d}.tif", "day", base_dir=tmp_path)
    assert [p.label for p in s.periods] == ["2021-02-27", "2021-02-28", "2021-03-02"]
    assert all(p.start == p.end for p in s.periods)
    assert s.gaps == [Period(D(2021, 3, 1), D(2021, 3, 1), "2021-03-01")]


def test_wrong_step_spacing_names_file_and_expected_dates(tmp_path):
    # 1 Jan, 17 Jan, then 12 Feb: 26 days after 17 Jan, not a multiple of 16.
    touch(tmp_path, "c_2022_001.tif", "c_2022_017.tif", "c_2022_043.tif")
    with pytest.raises(RasterError) as err:
        discover_series("c_{year}_{doy:03d}.tif", "16 days", base_dir=tmp_path)
    msg = str(err.value)
    assert "c_2022_043.tif (2022-02-12)" in msg
    assert "expected 2022-02-02 or 2022-02-18" in msg
    assert "c_2022_001.tif (2022-01-01)" in msg  # the date counted from


@pytest.mark.parametrize(
    ("template", "every", "words"),
    [
        (
            "rain_{year}{month:02d}{day:02d}.tif",
            "month",
            r"uses \{day\}, which every: month cannot fill",
        ),
        ("rain_{year}_{doy:03d}.tif", "month", r"\{doy\}, which every: month cannot fill"),
        ("rain_{year}{month:02d}.tif", "year", r"\{month\}, which every: year cannot fill"),
        ("rain_{year}.tif", "month", r"no \{month\} field"),
        ("rain_{year}{month:02d}.tif", "day", "cannot tell days apart"),
        ("rain_{month:02d}.tif", "month", r"no \{year\} field"),
        ("rain.tif", "month", "no date field"),
    ],
)
def test_fields_the_step_cannot_fill(tmp_path, template, every, words):
    # Checked before any folder is listed: this folder does not exist.
    with pytest.raises(RecipeError, match=words):
        discover_series(template, every, base_dir=tmp_path / "nowhere")


def test_no_match_names_folder_pattern_and_files(tmp_path):
    touch(tmp_path / "rasters", "precip_2019-01.tif", "precip_2019-02.tif", "readme.txt")
    with pytest.raises(InputFileError) as err:
        discover_series("rasters/rain_{year}{month:02d}.tif", "month", base_dir=tmp_path)
    msg = str(err.value)
    assert str(tmp_path / "rasters") in msg
    assert "rain_{year}{month:02d}.tif" in msg
    assert "rain_202103.tif" in msg  # an example of what was looked for
    assert "precip_2019-01.tif, precip_2019-02.tif, readme.txt" in msg


def test_no_match_in_missing_folder(tmp_path):
    with pytest.raises(InputFileError, match="does not exist"):
        discover_series("rain_{year}{month:02d}.tif", "month", base_dir=tmp_path / "absent")
    touch(tmp_path, "2020/a.tif")
    with pytest.raises(
        InputFileError, match=r"folder .*2020.*looked for names like 'rain_2021_076.tif'"
    ):
        discover_series("{year}/rain_{year}_{doy:03d}.tif", "day", base_dir=tmp_path)


def test_name_without_a_calendar_date(tmp_path):
    touch(tmp_path, "rain_202012.tif", "rain_202013.tif")
    with pytest.raises(RasterError, match=r"rain_202013\.tif .*month=13"):
        discover_series("rain_{year}{month:02d}.tif", "month", base_dir=tmp_path)
    touch(tmp_path / "d", "2021_366.tif")  # 2021 has 365 days
    with pytest.raises(RasterError, match="366 is not in 1..365"):
        discover_series("{year}_{doy:03d}.tif", "day", base_dir=tmp_path / "d")


# --------------------------------------------------------------- selection
@pytest.fixture
def monthly(tmp_path):
    touch(tmp_path, *(f"r_{y}{m:02d}.tif" for y in range(2018, 2022) for m in range(1, 13)))
    return discover_series("r_{year}{month:02d}.tif", "month", base_dir=tmp_path)


@pytest.mark.parametrize(
    ("spec", "first", "last", "n"),
    [
        ("2019-01..2020-12", "2019-01", "2020-12", 24),
        ("2021-06..", "2021-06", "2021-12", 7),
        ("..2018-03", "2018-01", "2018-03", 3),
        ("..2018", "2018-01", "2018-12", 12),
        ("2019", "2019-01", "2019-12", 12),
        (2019, "2019-01", "2019-12", 12),
        ("2019-05", "2019-05", "2019-05", 1),
        ("2019-05-20..2019-08-01", "2019-06", "2019-08", 3),
        (" 2020 .. 2020 ", "2020-01", "2020-12", 12),
    ],
)
def test_select(monthly, spec, first, last, n):
    got = monthly.select(spec)
    assert (got[0].label, got[-1].label, len(got)) == (first, last, n)


@pytest.mark.parametrize(
    ("spec", "words"),
    [
        ("2019-13", "no calendar date"),
        ("2020..2019", "ends before it starts"),
        ("spring", "is not a date"),
        ("2019..2020..2021", "more than one"),
        ("2030..", "selects none"),
        (2019.5, "not a period selection"),
    ],
)
def test_select_rejects(monthly, spec, words):
    with pytest.raises(RecipeError, match=words):
        monthly.select(spec)


def test_parse_selection_intervals():
    assert parse_selection("2019-02") == (D(2019, 2, 1), D(2019, 2, 28))
    assert parse_selection("..2020") == (None, D(2020, 12, 31))
    assert parse_selection(D(2021, 5, 17)) == (D(2021, 5, 17), D(2021, 5, 17))


# ------------------------------------------------------------------- grids
def test_grids_group_periods_by_grid(tmp_path):
    data = np.arange(12, dtype="int16").reshape(3, 4)
    t1 = Affine(0.5, 0, 30.0, 0, -0.5, 2.0)
    t2 = Affine(0.25, 0, 30.0, 0, -0.25, 2.0)  # finer pixels from 2021-03 on
    write_tif(tmp_path / "v_202101.tif", data, t1)
    write_tif(tmp_path / "v_202102.tif", data, t1)
    write_tif(tmp_path / "v_202103.tif", data, t2)
    write_tif(tmp_path / "v_202104.tif", data, t2)
    s = discover_series("v_{year}{month:02d}.tif", "month", base_dir=tmp_path)
    groups = s.grids()
    assert [[p.label for p in ps] for ps in groups.values()] == [
        ["2021-01", "2021-02"],
        ["2021-03", "2021-04"],
    ]
    assert list(groups) == [
        s.source("2021-01").grid.fingerprint,
        s.source("2021-04").grid.fingerprint,
    ]
    assert_array_equal(s.source("2021-02").read_block((1, 1, 2, 2)), [[5, 6], [9, 10]])


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


def test_open_options_reach_each_period(tmp_path):
    data = np.array([[1, 2], [3, 250]], dtype="uint8")
    for m in (1, 2):
        write_tif(tmp_path / f"n_2022{m:02d}.tif", data, Affine(1, 0, 0, 0, -1, 2))
    s = discover_series(
        "n_{year}{month:02d}.tif",
        "month",
        base_dir=tmp_path,
        open_options={"nodata": 250, "scale": 0.5},
    )
    values, valid = s.source("2022-02").to_values(s.source("2022-02").read_block((0, 0, 2, 2)))
    assert_array_equal(valid, [[True, True], [True, False]])
    assert_allclose(values[valid], [0.5, 1.0, 1.5], rtol=0, atol=1e-12)
