"""Series of raster files found by a path template: fields, discovery, selections, grids.

Every expected value is worked out by hand from the tiny fixtures: file names
whose dates are known.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import numpy as np
import pytest
import rasterio
from affine import Affine
from numpy.testing import assert_allclose, assert_array_equal

from covextract.core.periods import Period, Step
from covextract.errors import InputFileError, RasterError, RecipeError
from covextract.io.series_files import discover_series, template_fields

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
