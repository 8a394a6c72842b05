"""Every covariate kind's codebook rows say exactly what each column holds.

The expected texts are written out here as a reader should see them; none is
built from the code's own tables. One recipe on the demo data covers every
kind (zonal, weighted, land cover and its change, windows, anomalies, SPI,
trend, change, periods, reallocation, calibration); a second uses point units.
"""

from __future__ import annotations

import hashlib
import json
import re
import shutil
import warnings

import pytest
import yaml

from covextract.demo import lay_out_demo
from covextract.demo.spi import write_spi_series
from covextract.outputs.codebook import codebook_markdown, methods_paragraph
from covextract.recipe import load_recipe
from covextract.run import run

STUDY = {
    "table": "villages.csv",
    "id": "village_id",
    "points": {"x": "lon", "y": "lat", "crs": "EPSG:4326"},
    "date": "visit_date",
}
CLASSES = {11: "cropland", 12: "orchard", 21: "forest", 22: "scrub", 31: "grassland"}
CLASSES.update({41: "built", 51: "water"})
LAYERS = {
    "ndvi": {"file": "ndvi_2021.tif", "scale": 0.0001, "nodata": -3000, "unit": "NDVI, unitless"},
    "lights": {"file": "night_lights_2021.tif", "unit": "nW/cm2/sr"},
    "pop": {"file": "population_2021.tif", "unit": "people/km2"},
    "veg": {
        "bands": {
            "red": {"file": "red_2021.tif", "scale": 0.0001, "nodata": 0},
            "nir": {"file": "nir_2021.tif", "scale": 0.0001, "nodata": 0},
        },
        "index": "ndvi",
        "unit": "NDVI, unitless",
    },
    "cover_2015": {"file": "land_cover_2015.tif", "kind": "categorical", "classes": CLASSES},
    "cover_2021": {
        "file": "land_cover_2021.tif",
        "kind": "categorical",
        "classes": CLASSES,
        "groups": {"tree_cover": [12, 21]},
    },
    "rain": {"file": "rain/rain_{year}{month:02d}.tif", "every": "month", "unit": "mm"},
    "cube": {"file": "rain_2019_2021.nc", "variable": "precip", "unit": "mm"},
    "spi_rain": {"file": "spi_rain/rain_{year}{month:02d}.tif", "every": "month", "unit": "mm"},
}
ZONAL = ["mean", "std", "cv", "q90", "q2.5", "count", "valid_share", "area_km2"]
ZONAL += ["share_above", "area_above", "sum", "density_total"]
COVARIATES = [
    {"layer": "ndvi", "stats": ZONAL, "threshold": 0.5},
    {"layer": "veg", "name": "veg_popw", "weight_by": "pop", "stats": ["mean"]},
    {"layer": "cover_2021", "stats": ["share", "dominant", "shannon"]},
    {
        "layer": "cover_2021",
        "name": "lc",
        "since": "cover_2015",
        "stats": ["transition", "net_change"],
        "pairs": [["forest", "cropland"]],
    },
    {"layer": "rain", "stats": ["mean"], "before": {"months": 3, "lag_months": 1}},
    {
        "layer": "rain",
        "name": "wet",
        "stats": ["mean"],
        "before": {"months": 6, "lag_months": 1, "combine": "count_above", "threshold": 100},
    },
    {
        "layer": "rain",
        "name": "rpct",
        "stats": ["mean"],
        "anomaly": {"baseline": "2019..2020", "kind": "percent", "min_years": 2},
        "before": {"months": 1, "lag_months": 1, "combine": "mean"},
    },
    {
        "layer": "rain",
        "name": "rz",
        "stats": ["mean"],
        "anomaly": {"baseline": "2019..2020", "kind": "zscore", "min_years": 2},
        "before": {"months": 1, "lag_months": 1, "combine": "mean"},
    },
    {"layer": "rain", "stats": ["mean"], "trend": {"periods": "2019..2021", "min_years": 3}},
    {"layer": "rain", "stats": ["mean"], "change": {"from": "2019", "to": "2021"}},
    {"layer": "cube", "stats": ["mean"], "periods": "2021-01..2021-06"},
    {
        "layer": "spi_rain",
        "name": "spi3",
        "stats": ["mean"],
        "anomaly": {"baseline": "1991..2020", "kind": "spi", "months": 3},
        "before": {"months": 1, "lag_months": 1, "combine": "mean"},
    },
    {
        "layer": "lights",
        "name": "pop_alloc",
        "stats": ["allocated"],
        "reallocate": {
            "zones": {"file": "districts.gpkg", "id": "district_id"},
            "totals": {"file": "district_totals.csv", "id": "district_id", "column": "population"},
        },
    },
    {
        "layer": "lights",
        "name": "hh_fit",
        "stats": ["predicted"],
        "calibrate": {"known": "households", "light": "density_total"},
    },
]

# Texts a reader needs again and again, written out once.
W = "w = coverage x true pixel area (coverage alone with area weighting off)"
MEAN = f"weighted mean of valid pixels, sum(w v) / sum(w), {W}"
PER_MONTH_MEAN = f"per-period mean ({MEAN})"
LAG1 = "ending with the month 1 month before the month of the record's date (visit_date)"
RAIN_FILES = "36 monthly files rain/rain_{year}{month:02d}.tif, 2019-01 to 2021-12, 0 gaps"
RAIN_36 = (
    "statistics computed for each of the 36 monthly periods of the series with the same weights"
)
PROXY = "a proxy, not a count: lights miss unlit settlements and saturate in towns"
FIT = (
    "the fit of log(known count in column 'households') = a + b log(light density_total of "
    "layer 'lights') on units with a known count > 0 and light > 0 (unlit units get no "
    "prediction)"
)


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    folder = lay_out_demo(tmp_path_factory.mktemp("kinds") / "demo")
    write_spi_series(folder)
    return folder


@pytest.fixture(scope="module")
def result(demo):
    recipe = load_recipe(
        {
            "version": 1,
            "study": STUDY,
            "units": {"buffer_m": 2000},
            "layers": LAYERS,
            "covariates": COVARIATES,
            "output": {"table": "out/t.csv", "panel": "out/panel", "keep_coordinates": True},
        },
        base_dir=demo,
    )
    with warnings.catch_warnings():
        # the 3-year anomaly baseline is short on purpose (covextract warns about it)
        warnings.simplefilter("ignore")
        return run(recipe, write=False)


@pytest.fixture(scope="module")
def rows(result):
    table = {r["column"]: r for r in result.codebook if r["output"] == "table"}
    panel = {r["column"]: r for r in result.codebook if r["output"] == "long panel"}
    return table, panel


def check(row, statistic, unit, definition, **more):
    assert row["statistic"] == statistic, row["column"]
    assert row["unit_of_measure"] == unit, row["column"]
    assert row["definition"] == definition, row["column"]
    for key, value in more.items():
        assert row[key] == value, (row["column"], key)


# ----------------------------------------------------------------------- zonal
def test_zonal_statistics_of_a_continuous_layer(rows):
    t, _ = rows
    nd = "NDVI, unitless"
    check(t["ndvi_mean"], "mean", nd, MEAN, source_file="file ndvi_2021.tif, band 1")
    check(
        t["ndvi_std"],
        "std",
        nd,
        f"weighted standard deviation of valid pixels, ddof = 0 (weights are areas), {W}",
    )
    check(
        t["ndvi_cv"],
        "cv",
        "none (ratio std / |mean|, may exceed 1)",
        "coefficient of variation: weighted standard deviation / |weighted mean| of valid "
        "pixels (missing where the mean is 0)",
    )
    check(
        t["ndvi_q90"],
        "q90",
        nd,
        "weighted 90th percentile of valid pixels (weighted form of numpy's linear method)",
    )
    # q2.5 is a legal column name only as q2p5
    check(
        t["ndvi_q2p5"],
        "q2.5",
        nd,
        "weighted 2.5th percentile of valid pixels (weighted form of numpy's linear method)",
    )
    check(
        t["ndvi_count"],
        "count",
        "pixels",
        "number of pixels with coverage >= 1e-10 and a valid value",
    )
    check(
        t["ndvi_valid_share"],
        "valid_share",
        "fraction (0-1)",
        "share of the unit's weighted area with valid pixels; the part of the unit outside the "
        "raster counts as invalid",
    )
    check(
        t["ndvi_area_km2"],
        "area_km2",
        "km2",
        "area of the unit on the raster grid: sum of coverage x true pixel area, in km2",
    )
    check(
        t["ndvi_share_above"],
        "share_above",
        "fraction (0-1)",
        "share of the valid weighted area with value > 0.5",
    )
    check(
        t["ndvi_area_above"],
        "area_above",
        "km2",
        "area of valid pixels with value > 0.5: sum of coverage x true pixel area, km2",
    )
    # totals: the layer's unit times what was summed
    check(
        t["ndvi_sum"],
        "sum",
        "NDVI, unitless x pixels",
        "sum over pixels of coverage x value (the right total for per-pixel counts)",
    )
    check(
        t["ndvi_density_total"],
        "density_total",
        "NDVI, unitless x km2",
        "sum over pixels of coverage x value x pixel ground area in km2 (the right total for "
        "densities such as people per km2 or radiance)",
    )


def test_weighted_mean_names_its_weight_layer(rows):
    t, _ = rows
    check(
        t["veg_popw_mean"],
        "mean",
        "NDVI, unitless",
        f"{MEAN}; every pixel's weight is also multiplied by its value in layer pop "
        "(people/km2) (pixels where that layer is missing or negative are left out)",
        source_file="band math ndvi from bands red (red_2021.tif band 1) and nir "
        "(nir_2021.tif band 1)",
    )


def test_point_units_give_the_value_under_each_point(demo):
    recipe = load_recipe(
        {
            "version": 1,
            "study": STUDY,
            "units": {"at_point": "nearest"},
            "layers": {"ndvi": LAYERS["ndvi"]},
            "covariates": [{"layer": "ndvi", "stats": ["value", "valid_share"]}],
            "output": {"table": "out/points.csv", "keep_coordinates": True},
        },
        base_dir=demo,
    )
    t = {r["column"]: r for r in run(recipe, write=False).codebook}
    check(
        t["ndvi_value"],
        "value",
        "NDVI, unitless",
        "value of the raster at the point (nearest); missing when no pixel it reads is valid",
        pixel_rule="nearest: the pixel containing the point",
        unit_shape="value at each point (nearest)",
    )
    check(
        t["ndvi_valid_share"],
        "valid_share",
        "fraction (0-1)",
        "share of the point's weight on valid pixels (nearest: 1 when its pixel is valid, else 0)",
    )


# ------------------------------------------------------------------ land cover
def test_land_cover_shares_labels_and_diversity(rows):
    t, _ = rows
    check(
        t["cover_2021_share_forest"],
        "share",
        "fraction (0-1)",
        "share of the unit's valid area in class forest (nodata excluded)",
    )
    check(
        t["cover_2021_share_tree_cover"],
        "share",
        "fraction (0-1)",
        "share of the unit's valid area in group tree_cover (codes 12, 21) (nodata excluded)",
    )
    check(
        t["cover_2021_dominant"],
        "dominant",
        "none (a label)",
        "class with the largest share of the valid area; a tie goes to the lowest code",
    )
    check(
        t["cover_2021_shannon"],
        "shannon",
        "nats (natural logarithm)",
        "Shannon diversity -sum p ln p over the class shares (Shannon 1948)",
    )
    assert t["cover_2021_shannon"]["method"] == (
        "class table: 11 = cropland; 12 = orchard; 21 = forest; 22 = scrub; 31 = grassland; "
        "41 = built; 51 = water; groups: tree_cover = 12, 21; codes not in the class table "
        "count as 'other'"
    )


def test_land_cover_change_names_both_layers(rows):
    t, _ = rows
    check(
        t["lc_forest_to_cropland"],
        "transition",
        "fraction (0-1)",
        "share of the unit's area that was class forest in layer cover_2015 and is class "
        "cropland in layer cover_2021, on pixels valid in both",
    )
    check(
        t["lc_net_built"],
        "net_change",
        "difference of fractions (-1 to 1)",
        "share of class built in layer cover_2021 minus its share in layer cover_2015, on "
        "pixels valid in both",
    )


# --------------------------------------------------------------------- windows
def test_window_sum_says_the_window_and_the_per_period_statistic(rows):
    t, _ = rows
    check(
        t["rain_mean_sum3m_lag1"],
        "sum",
        "mm",
        f"sum over the 3 calendar months {LAG1} of the {PER_MONTH_MEAN}",
        source_file=RAIN_FILES,
        method=f"{RAIN_36}; combined by sum over the 3 calendar months {LAG1}; a period longer "
        "than the window counts by its overlap with it",
    )


def test_count_above_counts_months(rows):
    t, _ = rows
    check(
        t["wet_mean"],
        "count_above",
        "months",
        f"number of months in the 6 calendar months {LAG1} whose {PER_MONTH_MEAN} is > 100 mm",
    )


def test_anomaly_columns_carry_the_anomaly_unit(rows):
    t, _ = rows
    check(
        t["rpct_mean"],
        "mean",
        "percent of normal",
        f"mean over the 1 calendar month {LAG1} of the per-period 100 x value / the unit's "
        "mean for the same calendar month over 2019..2020 (missing where that mean is 0), "
        f"computed from the {PER_MONTH_MEAN} (a period counts by its overlap)",
        method=f"{RAIN_36}; percent of normal per unit and calendar month against the baseline "
        "2019..2020 (fewer than 2 valid baseline years: missing, QA short_baseline); combined "
        f"by mean over the 1 calendar month {LAG1}; a period longer than the window counts by "
        "its overlap with it",
    )
    check(
        t["rz_mean"],
        "mean",
        "none (standard deviations from the baseline mean)",
        f"mean over the 1 calendar month {LAG1} of the per-period (value - the unit's mean for "
        "the same calendar month over 2019..2020) / its standard deviation (ddof 1), computed "
        f"from the {PER_MONTH_MEAN} (a period counts by its overlap)",
    )


def test_spi_is_unitless_and_says_scale_baseline_and_lag(rows):
    t, _ = rows
    spi = (
        "standardized precipitation index SPI-3 (McKee et al. 1993; WMO-No. 1090): gamma "
        "distribution (location 0) fitted per unit and calendar month to the 3-month totals "
        "over 1991..2020, zeros mixed back in, standard normal quantile"
    )
    method = (
        "statistics computed for each of the 372 monthly periods of the series with the same "
        "weights; SPI-3 of each unit's series: 3-month totals, a gamma distribution fitted per "
        "calendar month over the baseline 1991..2020 (fewer than 10 valid baseline years: "
        f"missing, QA short_baseline); combined by mean over the 1 calendar month {LAG1}; a "
        "period longer than the window counts by its overlap with it"
    )
    check(
        t["spi3_mean"],
        "mean",
        "none (standard normal deviate)",
        f"mean over the 1 calendar month {LAG1} of the per-period {spi}, computed from the "
        f"{PER_MONTH_MEAN} (a period counts by its overlap)",
        method=method,
        source_file="372 monthly files spi_rain/rain_{year}{month:02d}.tif, 1991-01 to "
        "2021-12, 0 gaps",
    )
    check(
        t["spi3_mean_cat"],
        "category",
        "none (a label)",
        "WMO class of the SPI in column spi3_mean (half-open intervals): extremely wet >= 2, "
        "very wet [1.5, 2), moderately wet [1, 1.5), near normal (-1, 1), moderately dry "
        "(-1.5, -1], severely dry (-2, -1.5], extremely dry <= -2",
        method=method,
    )


# ------------------------------------------------------- trend, change, periods
def test_trend_slopes_per_year_and_p_value(rows):
    t, _ = rows
    annual = f"the unit's annual mean ({MEAN}) over 2019..2021 (at least 3 valid years)"
    check(
        t["rain_mean_trend_ols"],
        "ols",
        "mm per year",
        f"ordinary least squares slope per year of {annual}",
    )
    check(
        t["rain_mean_trend_sen"],
        "sen",
        "mm per year",
        f"Theil-Sen slope per year (Sen 1968) of {annual}",
    )
    check(
        t["rain_mean_trend_p"],
        "p",
        "probability (0-1)",
        f"Mann-Kendall two-sided p-value (tie-corrected) of {annual}",
        method=f"{RAIN_36}; trend per year of the unit's annual values over 2019..2021 (a finer "
        "series is collapsed to annual means first, since seasonality and autocorrelation make "
        "monthly p-values far too small)",
    )


def test_change_says_what_is_summarised_and_relchange_is_a_ratio(rows):
    t, _ = rows
    how = (
        "per-pixel change from 2019 to 2021 (each side collapsed per pixel by mean over its 12 "
        "and 12 periods)"
    )
    check(
        t["rain_mean_change_2019_2021"],
        "mean",
        "mm",
        f"{how}, summarised over the unit by its mean: {MEAN}",
    )
    check(
        t["rain_relchange_2019_2021"],
        "relchange",
        "ratio (change / earlier value)",
        "relative change: the unit's mean per-pixel change divided by its mean earlier value "
        f"on the same pixels (missing where that mean is 0); the change is the {how}",
    )


def test_periods_go_to_the_long_panel_with_a_described_qa_column(rows, result):
    _, p = rows
    check(
        p["cube_mean"],
        "mean",
        "mm",
        PER_MONTH_MEAN,
        output="long panel",
        source_file="NetCDF cube rain_2019_2021.nc, variable precip, 36 monthly steps 2019-01 "
        "to 2021-12",
        method=f"{RAIN_36}; periods 2021-01 to 2021-06 (6 periods) written to the long panel "
        "(output.panel), one row per unit, column and period",
    )
    check(
        p["qa"],
        "qa",
        "none (text codes)",
        "reason codes of the unit in that period, separated by ';', empty when all is well; in "
        "the long panel's rows of cube_mean",
        output="long panel",
    )
    assert p["qa"]["qa_codes"].startswith(
        "outside_layer: the unit lies wholly outside the layer's grid; values are missing; "
    )
    # the panel holds exactly these columns, keyed by the study's id
    assert list(result.panel.columns) == [
        "village_id",
        "column",
        "period_start",
        "period_end",
        "value",
        "qa",
    ]
    assert set(result.panel["column"]) == {"cube_mean"}


# --------------------------------------------------------------------- proxies
def test_reallocation_carries_the_totals_unit(rows):
    t, _ = rows
    check(
        t["pop_alloc_allocated"],
        "allocated",
        "as column 'population' of the totals file",
        "zone totals spread over each zone's pixels in proportion to light x pixel area, then "
        "summed over the unit (dasymetric reallocation; each zone's pixels sum to its total, "
        "Tobler 1979); totals from district_totals.csv (column 'population'), zones from "
        "districts.gpkg; zones without light spread their total evenly over their area; " + PROXY,
        method="dasymetric reallocation of zone totals by night-time light",
    )


def test_calibration_carries_the_calibrated_column_unit(rows):
    t, _ = rows
    unit = "as column 'households' of the study table"
    check(
        t["hh_fit_predicted"],
        "predicted",
        unit,
        f"exp(a + b log light) x Duan (1983) smearing factor, from {FIT}; {PROXY}",
    )
    for end in ("lower", "upper"):
        check(
            t[f"hh_fit_{end}"],
            end,
            unit,
            f"{end} end of the 95 % prediction interval (exp of the log-scale OLS interval), "
            f"from {FIT}; {PROXY}",
        )
    assert re.fullmatch(
        r"log-log calibration of known counts on night-time light; fitted: a = \S+, b = \S+, "
        r"r2 = \S+, rmse = \S+, n = 40, smearing = \S+, light_min = \S+, light_max = \S+, "
        r"level = 0\.95",
        t["hh_fit_predicted"]["method"],
    )


def test_every_column_of_the_run_has_a_row_with_a_unit(result):
    described = {r["column"] for r in result.codebook if r["output"] == "table"}
    assert described == set(result.columns)
    assert all(r["unit_of_measure"] for r in result.codebook)


# --------------------------------------------------------------- methods paragraph
def test_methods_paragraph_names_rules_windows_methods_and_references(result):
    text, refs = methods_paragraph(result)
    assert text.startswith("Environmental covariates were extracted with covextract ")
    assert (
        "from 9 raster layers (ndvi, lights, pop, veg, cover_2015, cover_2021, rain, cube, "
        "spi_rain) for 40 study units (geodesic buffer of 2000 m around each point)"
    ) in text
    assert "pixels were counted by the rule overlap: each pixel weighted by the exact " in text
    assert "center:" not in text  # only the rules this run used are described
    assert " Buffers are geodesic circles drawn on the ellipsoid." in text
    assert f" Covariate rain: {RAIN_36}; combined by sum over the 3 calendar months {LAG1};" in text
    assert " Covariate spi3: statistics computed for each of the 372 monthly periods" in text
    assert "SPI-3 of each unit's series: 3-month totals" in text
    assert (
        " Covariate pop_alloc: dasymetric reallocation of zone totals by night-time light." in text
    )
    assert [r.split(" (")[0] for r in refs] == [
        "Karney CFF",
        "Rouse JW et al.",  # the band-math NDVI of layer veg
        "McKee TB, Doesken NJ, Kleist J",
        "Sen PK",
        "Shannon CE",
        "Tobler WR",
        "Duan N",
    ]


def test_ndvi_reference_comes_from_the_band_math_index_not_from_text(result):
    assert result.layers["veg"]["index"] == "ndvi"
    assert result.layers["ndvi"]["index"] == ""  # an NDVI product read from a file
    layers = {k: {**v, "index": ""} for k, v in result.layers.items()}
    plain = type(result)(**{**result.__dict__, "layers": layers})
    _, refs = methods_paragraph(plain)
    assert not any(r.startswith("Rouse") for r in refs)


def test_markdown_lists_layers_read_only_as_weight_or_earlier_layer(result):
    md = codebook_markdown(result)
    assert (
        "- **pop**: file population_2021.tif, band 1; unit people/km2; grid 667 x 667 pixels "
        "in EPSG:4326; no columns of its own; read by veg_popw as its weight layer (weight_by)"
    ) in md
    assert "read by lc as its earlier layer (since)" in md
    # the panel's qa column is summarised from the panel's own rows of cube_mean
    section = md.split("### `qa`")[1].split("###")[0]
    assert "- **output**: long panel" in section
    assert re.search(r"- \*\*values in this run\*\*: \d+ empty", section)


# ------------------------------------------------------------ no private paths
def test_shared_files_reveal_no_local_folder(tmp_path):
    folder = lay_out_demo(tmp_path / "study")
    elsewhere = tmp_path / "private_elsewhere"
    elsewhere.mkdir()
    shutil.move(folder / "night_lights_2021.tif", elsewhere / "night_lights_2021.tif")
    lights = elsewhere / "night_lights_2021.tif"
    recipe = {
        "version": 1,
        "study": STUDY,
        "units": {"buffer_m": 2000},
        "layers": {
            "lights": {"file": str(lights), "unit": "nW/cm2/sr"},
            # the same file reached by a relative path leading out of the recipe's folder
            "lights_rel": {"file": "../private_elsewhere/night_lights_2021.tif"},
            "ndvi": LAYERS["ndvi"],
            "rain": LAYERS["rain"],
        },
        "covariates": [
            {"layer": "lights", "stats": ["mean"]},
            {"layer": "lights_rel", "stats": ["sum"]},
            {"layer": "ndvi", "stats": ["mean"]},
            {"layer": "rain", "stats": ["mean"], "periods": "2021-01..2021-02"},
        ],
        "output": {
            "table": "out/t.csv",
            "codebook": "out/codebook.csv",
            "manifest": "out/manifest.json",
            "panel": "out/panel",
            "drop": ["lat", "lon"],
        },
    }
    (folder / "recipe.yaml").write_text(yaml.safe_dump(recipe), encoding="utf-8")
    result = run(folder / "recipe.yaml")
    texts = {
        role: result.outputs[role].read_text(encoding="utf-8")
        for role in ("codebook", "codebook_md", "manifest")
    }
    for role, text in texts.items():
        assert str(tmp_path) not in text, role
        assert "private_elsewhere" not in text, role
    digest = hashlib.sha256(lights.read_bytes()).hexdigest()
    named = f"night_lights_2021.tif (sha256 {digest[:12]})"
    manifest = json.loads(texts["manifest"])
    paths = {i["role"]: i["path"] for i in manifest["inputs"]}
    assert paths["layer:lights"] == named
    assert paths["layer:ndvi"] == "ndvi_2021.tif"
    rows = {r["column"]: r for r in result.codebook}
    assert rows["lights_mean"]["source_file"] == f"file {named}, band 1"
    assert rows["lights_rel_sum"]["source_file"] == f"file {named}, band 1"
    assert rows["ndvi_mean"]["source_file"] == "file ndvi_2021.tif, band 1"
    assert f"- **lights**: file {named}, band 1;" in texts["codebook_md"]
