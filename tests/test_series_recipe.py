"""Series layers through a recipe: per-period panel and windows before each visit."""

import numpy as np
import pandas as pd
import pytest
import rasterio
from affine import Affine
from numpy.testing import assert_allclose

from covextract.errors import InputFileError, LagZeroWarning, TableError
from covextract.recipe import load_recipe
from covextract.run import check_recipe, run

T = Affine(0.01, 0, 10.0, 0, -0.01, 1.0)
MONTHS = pd.period_range("2019-01", "2020-12", freq="M")


@pytest.fixture
def folder(tmp_path):
    rng = np.random.default_rng(9)
    (tmp_path / "rain").mkdir()
    for k, month in enumerate(MONTHS):
        data = (rng.gamma(2.0, 40.0, size=(30, 30)) + k).astype(np.float32)
        with rasterio.open(
            tmp_path / "rain" / f"rain_{month.year}{month.month:02d}.tif",
            "w",
            driver="GTiff",
            width=30,
            height=30,
            count=1,
            dtype="float32",
            crs="EPSG:4326",
            transform=T,
        ) as ds:
            ds.write(data, 1)
    (tmp_path / "sites.csv").write_text(
        "site,lon,lat,visit\nA,10.10,0.85,2020-05-17\nB,10.20,0.80,2019-02-03\n"
        "C,10.15,0.90,\nD,10.05,0.75,2020-12-31\n"
    )
    return tmp_path


def _recipe(folder, covariates, **output):
    return load_recipe(
        {
            "version": 1,
            "study": {
                "table": "sites.csv",
                "id": "site",
                "points": {"x": "lon", "y": "lat"},
                "date": "visit",
            },
            "units": {"buffer_m": 5000},
            "layers": {
                "rain": {"file": "rain/rain_{year}{month:02d}.tif", "every": "month", "unit": "mm"}
            },
            "covariates": covariates,
            "output": {"table": "out/sites.csv", "keep_coordinates": True, **output},
        },
        base_dir=folder,
    )


def test_window_before_each_visit_equals_a_brute_force_sum(folder):
    recipe = _recipe(
        folder,
        [
            {
                "layer": "rain",
                "stats": ["mean"],
                "before": {"months": 3, "lag_months": 1, "combine": "sum"},
            },
            {
                "layer": "rain",
                "name": "wet",
                "stats": ["mean"],
                "before": {"months": 6, "lag_months": 1, "combine": "count_above", "threshold": 90},
            },
            {"layer": "rain", "stats": ["mean"], "periods": "2019-01.."},
        ],
        panel="out/panel",
    )
    result = run(recipe)
    t = result.table
    panel = result.panel
    assert result.summary["weights_built"] == 1  # one grid: 24 periods, one weight build
    monthly = panel[panel["column"] == "rain_mean"].set_index(["site", "period_start"])["value"]
    # Brute force with pandas: visit 17 May 2020, N=3, L=1 -> Feb, Mar, Apr 2020
    expected = sum(monthly[("A", pd.Timestamp(f"2020-{m:02d}-01"))] for m in (2, 3, 4))
    assert_allclose(t["rain_mean_sum3m_lag1"][0], expected, rtol=1e-12)
    six = [
        monthly[("A", pd.Timestamp(f"{y}-{m:02d}-01"))]
        for y, m in [(2019, 11), (2019, 12), (2020, 1), (2020, 2), (2020, 3), (2020, 4)]
    ]
    assert t["wet_mean"][0] == sum(v > 90 for v in six)
    # B: the window (Nov 2018 - Jan 2019) reaches before the series; C has no date
    assert (
        np.isnan(t["rain_mean_sum3m_lag1"][1])
        and "window_outside_series" in t["rain_sum3m_lag1_qa"][1]
    )
    assert np.isnan(t["rain_mean_sum3m_lag1"][2]) and "no_date" in t["rain_sum3m_lag1_qa"][2]
    # the panel: one Parquet file per period, keyed by unit, column and period
    files = sorted((folder / "out" / "panel").glob("*.parquet"))
    assert [f.stem for f in files] == [f"{m.year}-{m.month:02d}-01" for m in MONTHS]
    one = pd.read_parquet(files[0])
    # keyed by the study's own id column, each value once under its codebook name, with QA
    assert list(one.columns) == ["site", "column", "period_start", "period_end", "value", "qa"]
    assert set(one["column"]) == {"rain_mean"}
    rows = {r["column"]: r for r in result.codebook}
    assert (
        "the 3 calendar months ending with the month 1 month before the month of the record's date (visit)"
        in rows["rain_mean_sum3m_lag1"]["definition"]
    )
    assert rows["rain_mean_sum3m_lag1"]["unit_of_measure"] == "mm"
    assert rows["wet_mean"]["unit_of_measure"] == "months"
    assert rows["rain_mean"]["output"] == "long panel"


def test_lag_zero_warns_and_flags_after_visit(folder):
    with pytest.warns(LagZeroWarning):
        result = run(
            _recipe(
                folder,
                [{"layer": "rain", "stats": ["mean"], "before": {"months": 2, "lag_months": 0}}],
            ),
            write=False,
        )
    assert "after_visit" in result.table["rain_sum2m_lag0_qa"][0]


def test_periods_need_a_panel_folder_and_mixed_dates_are_refused(folder):
    problems = check_recipe(
        _recipe(folder, [{"layer": "rain", "stats": ["mean"], "periods": "2019-01.."}])
    )
    assert any("output: {panel:" in str(p) for p in problems)
    (folder / "sites.csv").write_text(
        "site,lon,lat,visit\nA,10.1,0.85,2020-05-17\nB,10.2,0.8,03/02/2019\n"
    )
    with pytest.raises(TableError, match="mixes date formats.*date_format"):
        run(
            _recipe(
                folder,
                [{"layer": "rain", "stats": ["mean"], "before": {"months": 1, "lag_months": 1}}],
            ),
            write=False,
        )


def test_template_matching_no_file_is_a_clear_error(folder):
    recipe = _recipe(
        folder, [{"layer": "rain", "stats": ["mean"], "before": {"months": 1, "lag_months": 1}}]
    )
    recipe.layers["rain"].file = "rain/precip_{year}{month:02d}.tif"
    problems = check_recipe(recipe)
    assert any("precip_" in str(p) for p in problems)
    with pytest.raises(InputFileError):
        run(recipe, write=False)


def test_netcdf_cube_gives_the_geotiff_series_values(folder):
    import xarray as xr

    stack = []
    for month in MONTHS:
        with rasterio.open(folder / "rain" / f"rain_{month.year}{month.month:02d}.tif") as ds:
            stack.append(ds.read(1))
    lat = 1.0 - 0.005 - 0.01 * np.arange(30)
    lon = 10.0 + 0.005 + 0.01 * np.arange(30)
    times = pd.to_datetime([f"{m.year}-{m.month:02d}-15" for m in MONTHS])
    ds = xr.Dataset(
        {"precip": (("time", "lat", "lon"), np.array(stack))},
        coords={"time": times, "lat": lat, "lon": lon},
    )
    ds["precip"].attrs["grid_mapping"] = "crs"
    ds["crs"] = xr.DataArray(0, attrs={"grid_mapping_name": "latitude_longitude"})
    ds.to_netcdf(folder / "rain.nc")
    covs = [{"layer": "rain", "stats": ["mean"], "before": {"months": 3, "lag_months": 1}}]
    tif = run(_recipe(folder, covs), write=False).table
    recipe = _recipe(folder, covs)
    recipe.layers["rain"].file = "rain.nc"
    recipe.layers["rain"].variable = "precip"
    cube = run(recipe, write=False).table
    assert_allclose(
        cube["rain_mean_sum3m_lag1"].to_numpy(float),
        tif["rain_mean_sum3m_lag1"].to_numpy(float),
        rtol=1e-9,
        equal_nan=True,
    )


def _yearly_folder(tmp_path, years, make):
    (tmp_path / "y").mkdir()
    for y in years:
        with rasterio.open(
            tmp_path / "y" / f"v_{y}.tif",
            "w",
            driver="GTiff",
            width=30,
            height=30,
            count=1,
            dtype="float32",
            crs="EPSG:4326",
            transform=T,
        ) as ds:
            ds.write(make(y).astype(np.float32), 1)
    (tmp_path / "sites.csv").write_text(
        "site,lon,lat,visit\nA,10.10,0.85,2020-05-17\nB,10.20,0.80,2019-02-03\n"
    )


def test_trend_equals_scipy_on_the_unit_series(tmp_path):
    # References: scipy.stats.linregress (OLS) and scipy.stats.theilslopes (Sen 1968)
    from scipy import stats

    rng = np.random.default_rng(4)
    years = range(2001, 2016)
    _yearly_folder(tmp_path, years, lambda y: 0.3 * (y - 2001) + rng.normal(0, 1, (30, 30)))
    recipe = load_recipe(
        {
            "version": 1,
            "study": {"table": "sites.csv", "id": "site", "points": {"x": "lon", "y": "lat"}},
            "units": {"buffer_m": 5000},
            "layers": {"v": {"file": "y/v_{year}.tif", "every": "year"}},
            "covariates": [{"layer": "v", "stats": ["mean"], "trend": {"periods": "2001..2015"}}],
            "output": {"table": "out/t.csv", "keep_coordinates": True},
        },
        base_dir=tmp_path,
    )
    result = run(recipe, write=False)
    series_recipe = load_recipe(
        {
            **recipe.to_dict(),
            "covariates": [{"layer": "v", "stats": ["mean"], "periods": "2001..2015"}],
            "output": {"table": "out/t.csv", "panel": "out/p", "keep_coordinates": True},
        },
        base_dir=tmp_path,
    )
    panel = run(series_recipe, write=False).panel
    a = panel[panel["site"] == "A"].sort_values("period_start")["value"].to_numpy()
    x = np.arange(2001, 2016)
    assert_allclose(result.table["v_mean_trend_ols"][0], stats.linregress(x, a).slope, rtol=1e-10)
    assert_allclose(result.table["v_mean_trend_sen"][0], stats.theilslopes(a, x)[0], rtol=1e-10)
    assert result.table["v_mean_trend_p"][0] < 0.01
    rows = {r["column"]: r for r in result.codebook}
    assert "Theil-Sen" in rows["v_mean_trend_sen"]["definition"]
    assert rows["v_mean_trend_sen"]["unit_of_measure"] == "layer unit per year"


def test_anomaly_of_a_constant_series_is_zero_and_spi_has_categories(folder):
    # common practice: the anomaly of a series equal to its normal is 0
    recipe = _recipe(
        folder,
        [
            {
                "layer": "rain",
                "name": "ra",
                "stats": ["mean"],
                "anomaly": {"baseline": "2019..2020", "kind": "difference", "min_years": 2},
                "before": {"months": 1, "lag_months": 1, "combine": "mean"},
            },
        ],
    )
    for month in MONTHS:
        with rasterio.open(folder / "rain" / f"rain_{month.year}{month.month:02d}.tif", "r+") as ds:
            ds.write(np.full((30, 30), 50.0, np.float32), 1)
    result = run(recipe, write=False)
    assert_allclose(result.table["ra_mean"][0], 0.0, atol=1e-12)


def test_spi_before_visit_matches_the_library(tmp_path):
    # SPI-1 against covextract.derive.spi on the same unit series (itself checked against
    # scipy.stats.gamma in tests/derive/test_spi.py; McKee et al. 1993, WMO-No. 1090)
    import warnings

    from covextract.derive.spi import ShortBaselineWarning, spi

    rng = np.random.default_rng(2)
    (tmp_path / "rain").mkdir()
    months = pd.period_range("2000-01", "2011-12", freq="M")
    for month in months:
        data = rng.gamma(2.0, 30.0, size=(30, 30)).astype(np.float32)
        with rasterio.open(
            tmp_path / "rain" / f"rain_{month.year}{month.month:02d}.tif",
            "w",
            driver="GTiff",
            width=30,
            height=30,
            count=1,
            dtype="float32",
            crs="EPSG:4326",
            transform=T,
        ) as ds:
            ds.write(data, 1)
    (tmp_path / "sites.csv").write_text("site,lon,lat,visit\nA,10.10,0.85,2011-06-10\n")
    base = {
        "version": 1,
        "study": {
            "table": "sites.csv",
            "id": "site",
            "points": {"x": "lon", "y": "lat"},
            "date": "visit",
        },
        "units": {"buffer_m": 5000},
        "layers": {"rain": {"file": "rain/rain_{year}{month:02d}.tif", "every": "month"}},
        "output": {"table": "out/t.csv", "panel": "out/p", "keep_coordinates": True},
    }
    with pytest.warns(ShortBaselineWarning):
        result = run(
            load_recipe(
                {
                    **base,
                    "covariates": [
                        {
                            "layer": "rain",
                            "stats": ["mean"],
                            "anomaly": {"baseline": "2000..2011", "kind": "spi", "months": 1},
                            "before": {"months": 1, "lag_months": 1, "combine": "mean"},
                        }
                    ],
                },
                base_dir=tmp_path,
            ),
            write=False,
        )
    plain = run(
        load_recipe(
            {**base, "covariates": [{"layer": "rain", "stats": ["mean"], "periods": "2000-01.."}]},
            base_dir=tmp_path,
        ),
        write=False,
    ).panel
    long = pd.DataFrame(
        {
            "unit": 0,
            "start": plain["period_start"],
            "end": plain["period_end"],
            "value": plain["value"],
        }
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ShortBaselineWarning)
        ref = spi(long, months=1, baseline=(2000, 2011))
    may = ref[pd.to_datetime(ref["start"]) == pd.Timestamp("2011-05-01")]["value"].iloc[0]
    assert_allclose(result.table["rain_mean_spi1_mean1m_lag1"][0], may, rtol=1e-10)
    assert result.table["rain_mean_spi1_mean1m_lag1_cat"][0] in {
        "extremely wet",
        "very wet",
        "moderately wet",
        "near normal",
        "moderately dry",
        "severely dry",
        "extremely dry",
    }


def test_change_is_computed_per_pixel_on_pixels_valid_in_both(tmp_path):
    # Hand computation: per-pixel change on pixels valid in both years, then the unit mean,
    # differs from the difference of two unit means when nodata differs (the point of the rule).
    (tmp_path / "y").mkdir()
    a = np.full((30, 30), 10.0, np.float32)
    b = np.full((30, 30), 14.0, np.float32)
    a[:, :15] = 0.0  # low values on the west half in 2019 ...
    b[:, :15] = -9999  # ... which is nodata in 2020
    for y, d in ((2019, a), (2020, b)):
        with rasterio.open(
            tmp_path / "y" / f"v_{y}.tif",
            "w",
            driver="GTiff",
            width=30,
            height=30,
            count=1,
            dtype="float32",
            crs="EPSG:32633",
            transform=Affine(100, 0, 500_000, 0, -100, 9_000_000),
            nodata=-9999,
        ) as ds:
            ds.write(d, 1)
    (tmp_path / "a.geojson").write_text(
        '{"type": "FeatureCollection", "crs": {"type": "name", "properties": {"name": "EPSG:32633"}},'
        '"features": [{"type": "Feature", "properties": {"uid": "u"}, "geometry": {"type": "Polygon",'
        '"coordinates": [[[500000, 9000000], [503000, 9000000], [503000, 8997000], [500000, 8997000],'
        " [500000, 9000000]]]}}]}"
    )
    recipe = load_recipe(
        {
            "version": 1,
            "study": {"table": "a.geojson", "id": "uid"},
            "layers": {"v": {"file": "y/v_{year}.tif", "every": "year"}},
            "covariates": [
                {"layer": "v", "stats": ["mean", "count"], "change": {"from": 2019, "to": 2020}}
            ],
            "output": {"table": "out/t.csv", "keep_coordinates": True},
        },
        base_dir=tmp_path,
    )
    t = run(recipe, write=False).table
    assert_allclose(t["v_mean_change_2019_2020"][0], 4.0)  # 14 - 10 on the east half
    assert t["v_count_change_2019_2020"][0] == 450
    assert_allclose(t["v_relchange_2019_2020"][0], 0.4)


def test_check_lists_periods_and_gaps(folder):
    import yaml
    from typer.testing import CliRunner

    from covextract.cli.app import app

    (folder / "rain" / "rain_202003.tif").unlink()
    recipe = _recipe(
        folder, [{"layer": "rain", "stats": ["mean"], "before": {"months": 1, "lag_months": 1}}]
    )
    path = folder / "r.yaml"
    data = recipe.to_dict()
    path.write_text(yaml.safe_dump(data))
    result = CliRunner().invoke(app, ["check", str(path)])
    assert result.exit_code == 0, result.output
    assert "layer rain: 23 periods of month, 2019-01 to 2020-12; 1 gap(s): 2020-03" in result.stdout
