"""The codebook says what every new column holds; the manifest says what went in and came out."""

from __future__ import annotations

import csv
import hashlib
import json
from datetime import datetime

import numpy
import pandas
import pyproj
import pytest
import rasterio
import yaml

import covextract
from covextract.demo import lay_out_demo
from covextract.engine.zonal import QA_CODES as ENGINE_QA_CODES
from covextract.outputs.codebook import CAUTIONS, CODEBOOK_FIELDS
from covextract.outputs.manifest import verify_manifest
from covextract.recipe import load_recipe
from covextract.run import run
from covextract.units.build import QA_CODES as UNIT_QA_CODES


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    folder = lay_out_demo(tmp_path_factory.mktemp("codebook") / "demo")
    result = run(folder / "recipe.yaml")
    return folder, result


@pytest.fixture(scope="module")
def codebook(demo_run):
    _, result = demo_run
    with open(result.outputs["codebook"], encoding="utf-8", newline="") as fh:
        reader = csv.DictReader(fh)
        assert reader.fieldnames == CODEBOOK_FIELDS
        return {row["column"]: row for row in reader}


@pytest.fixture(scope="module")
def manifest(demo_run):
    _, result = demo_run
    return json.loads(result.outputs["manifest"].read_text(encoding="utf-8"))


def sha256(path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


# -------------------------------------------------------------------- codebook
def test_one_codebook_row_per_new_column_in_order(demo_run):
    _, result = demo_run
    with open(result.outputs["codebook"], encoding="utf-8", newline="") as fh:
        columns = [row["column"] for row in csv.DictReader(fh)]
    assert columns == result.columns
    assert len(result.codebook) == len(result.columns)


def test_codebook_rows_carry_layer_source_and_metadata(demo_run, codebook):
    folder, _ = demo_run
    recipe = yaml.safe_load((folder / "recipe.yaml").read_text(encoding="utf-8"))
    for column, row in codebook.items():
        layer = recipe["layers"][row["layer"]]
        named = [c.get("name") for c in recipe["covariates"] if c["layer"] == row["layer"]]
        assert any(column.startswith((n or row["layer"]) + "_") for n in named)
        # relative to the recipe's folder, so the codebook reveals no local folder names
        files = [layer["file"]] if "file" in layer else [b["file"] for b in layer["bands"].values()]
        assert all(f in row["source_file"] for f in files), (column, row["source_file"])
        assert str(folder) not in row["source_file"]
        for key in ("source", "version", "citation", "license"):
            assert row[key] == layer.get(key, ""), (column, key)
        assert row["unit_shape"] == "geodesic buffer of 2000 m around each point"
        assert row["pixel_rule"].startswith("overlap: ")


def test_codebook_statistic_definitions_and_units_of_measure(codebook):
    # Expected texts written out here, not taken from the code's own tables.
    weights = "w = coverage x true pixel area (coverage alone with area weighting off)"
    expected = {
        # column: (statistic, definition, unit of measure)
        "ndvi_mean": (
            "mean",
            f"weighted mean of valid pixels, sum(w v) / sum(w), {weights}",
            "NDVI, unitless",
        ),
        "ndvi_std": (
            "std",
            f"weighted standard deviation of valid pixels, ddof = 0 (weights are areas), {weights}",
            "NDVI, unitless",
        ),
        "ndvi_q90": (
            "q90",
            "weighted 90th percentile of valid pixels (weighted form of numpy's linear method)",
            "NDVI, unitless",
        ),
        "ndvi_valid_share": (
            "valid_share",
            "share of the unit's weighted area with valid pixels; the part of the unit outside "
            "the raster counts as invalid",
            "fraction (0-1)",
        ),
        "surface_temp_mean": (
            "mean",
            f"weighted mean of valid pixels, sum(w v) / sum(w), {weights}",
            "K",
        ),
        "surface_temp_min": ("min", "smallest valid pixel value among covered pixels", "K"),
        "lights_density_total": (
            "density_total",
            "sum over pixels of coverage x value x pixel ground area in km2 (the right total for "
            "densities such as people per km2 or radiance)",
            "nW/cm2/sr x km2",
        ),
        "lights_area_above": (
            "area_above",
            "area of valid pixels with value > 1.0: sum of coverage x true pixel area, km2",
            "km2",
        ),
    }
    for column, (stat, definition, unit) in expected.items():
        row = codebook[column]
        assert (row["statistic"], row["definition"], row["unit_of_measure"]) == (
            stat,
            definition,
            unit,
        ), column


def test_codebook_nodata_handling_and_area_weighting_per_layer(codebook):
    ndvi = codebook["ndvi_mean"]["nodata_handling"]
    # The file declares -3000 and the recipe repeats it: listed once.
    assert ndvi.count("-3000.0") == 1
    assert "stored x 0.0001 + 0.0" in ndvi and "applied before any statistic" in ndvi
    assert "NaN" in codebook["surface_temp_mean"]["nodata_handling"]
    assert "-1.0" in codebook["lights_mean"]["nodata_handling"]  # the file's own code
    # Pixel ground area varies by more than 0.1 % over all three demo grids: lat/lon
    # and Web Mercator by latitude, the UTM grid (1.6-2.4 degrees east of its central
    # meridian) through the scale factor, by about 0.14 %.
    for column in ("ndvi_mean", "surface_temp_mean", "lights_mean"):
        assert codebook[column]["area_weighting"] == "on (grid pixel area varies)"


def test_qa_rows_list_every_code_with_its_meaning(codebook):
    for qa_col in ("ndvi_qa", "surface_temp_qa", "lights_qa"):
        row = codebook[qa_col]
        assert row["statistic"] == "qa"
        assert row["unit_of_measure"] == "none (text codes)"
        for code, meaning in {**UNIT_QA_CODES, **ENGINE_QA_CODES}.items():
            assert f"{code}: {meaning}" in row["qa_codes"], (qa_col, code)
    for column, row in codebook.items():
        if not column.endswith("_qa"):
            assert row["qa_codes"] == ""


def test_markdown_codebook_has_cautions_and_one_section_per_column(demo_run):
    _, result = demo_run
    text = result.outputs["codebook_md"].read_text(encoding="utf-8")
    assert result.outputs["codebook_md"].suffix == ".md"
    assert text.startswith("# Codebook for villages_covariates.csv\n")
    cautions = text.index("## Cautions")
    columns = text.index("## Columns")
    assert cautions < columns
    for caution in CAUTIONS:
        assert f"- {caution}" in text[cautions:columns]
    assert "association, not cause" in text
    headings = [line[5:-1] for line in text.splitlines() if line.startswith("### `")]
    assert headings == result.columns
    # a methods paragraph to adapt, with the published methods it used
    assert "## Methods (a paragraph to adapt)" in text
    assert "Karney CFF (2013)" in text and "Tobler WR (1979)" in text
    # per column: missing values and min / median / max from this run
    assert "- **values in this run**: 0 missing of 40; min " in text
    section = text.split("### `ndvi_mean`")[1].split("### ")[0]
    assert "- **unit of measure**: NDVI, unitless" in section
    assert "- **unit shape**: geodesic buffer of 2000 m around each point" in section
    assert "- **nodata handling**: stored values -3000.0, NaN are missing" in section


# -------------------------------------------------------------------- manifest
def test_manifest_recipe_fingerprint(demo_run, manifest):
    folder, _ = demo_run
    assert manifest["manifest_version"] == 2
    # relative to the recipe's folder: a shared manifest reveals no local folder names
    assert manifest["recipe"]["file"] == "recipe.yaml"
    assert str(folder) not in (folder / "out" / "villages_covariates_manifest.json").read_text()
    assert manifest["recipe"]["fingerprint"] == load_recipe(folder / "recipe.yaml").fingerprint
    assert len(manifest["recipe"]["fingerprint"]) == 64


def test_manifest_fingerprints_every_input(demo_run, manifest):
    folder, _ = demo_run
    roles = {item["role"]: item for item in manifest["inputs"]}
    assert set(roles) == {
        "recipe",
        "study_table",
        "layer:ndvi",
        "layer:surface_temp",
        "layer:lights",
        "layer:cover_2015",
        "layer:cover_2021",
        "layer:veg.red",
        "layer:veg.nir",
        "layer:pop",
        "zones:pop_alloc",
        "totals:pop_alloc",
    }
    files = {
        "recipe": "recipe.yaml",
        "study_table": "villages.csv",
        "layer:ndvi": "ndvi_2021.tif",
        "layer:surface_temp": "surface_temp_2021.tif",
        "layer:lights": "night_lights_2021.tif",
        "layer:cover_2015": "land_cover_2015.tif",
        "layer:cover_2021": "land_cover_2021.tif",
        "layer:veg.red": "red_2021.tif",
        "layer:veg.nir": "nir_2021.tif",
        "layer:pop": "population_2021.tif",
        "zones:pop_alloc": "districts.gpkg",
        "totals:pop_alloc": "district_totals.csv",
    }
    for role, name in files.items():
        path = folder / name
        assert roles[role]["path"] == name
        assert roles[role]["outside_recipe_folder"] is False
        # Reference: hashlib's SHA-256 of the file's bytes.
        assert roles[role]["sha256"] == sha256(path)
        assert roles[role]["bytes"] == path.stat().st_size


def test_manifest_versions_and_layer_crs(demo_run, manifest):
    folder, _ = demo_run
    versions = manifest["versions"]
    assert versions["covextract"] == covextract.__version__
    assert versions["numpy"] == numpy.__version__
    assert versions["pandas"] == pandas.__version__
    assert versions["rasterio"] == rasterio.__version__
    assert versions["gdal"] == rasterio.__gdal_version__
    assert versions["proj"] == pyproj.proj_version_str
    expected_crs = {
        "ndvi": "EPSG:4326",
        "surface_temp": "EPSG:32731",
        "lights": "EPSG:3857",
        "cover_2015": "EPSG:4326",
        "cover_2021": "EPSG:4326",
        "veg": "EPSG:4326",
        "pop": "EPSG:4326",
    }
    files = {
        "ndvi": "ndvi_2021.tif",
        "surface_temp": "surface_temp_2021.tif",
        "lights": "night_lights_2021.tif",
        "cover_2015": "land_cover_2015.tif",
        "cover_2021": "land_cover_2021.tif",
        "veg": "red_2021.tif",
        "pop": "population_2021.tif",
    }
    assert set(manifest["layers"]) == set(expected_crs)
    for name, crs in expected_crs.items():
        layer = manifest["layers"][name]
        assert layer["crs"] == crs
        with rasterio.open(folder / files[name]) as ds:
            assert (layer["width"], layer["height"]) == (ds.width, ds.height)
            assert layer["transform"] == list(ds.transform)[:6]


def test_manifest_is_written_last_and_matches_the_outputs(demo_run, manifest):
    _, result = demo_run
    folder, _ = demo_run
    recorded = {item["path"]: item["sha256"] for item in manifest["outputs"]}
    written = [result.outputs[k] for k in ("table", "codebook", "codebook_md")]
    assert recorded == {p.relative_to(folder).as_posix(): sha256(p) for p in written}
    manifest_time = result.outputs["manifest"].stat().st_mtime_ns
    assert all(p.stat().st_mtime_ns <= manifest_time for p in written)
    started = datetime.fromisoformat(manifest["run"]["started"])
    finished = datetime.fromisoformat(manifest["run"]["finished"])
    assert started <= finished
    assert verify_manifest(result.outputs["manifest"], base_dir=folder) == []


def test_verify_manifest_reports_a_changed_output(demo_dir):
    result = run(demo_dir / "recipe.yaml")
    md = result.outputs["codebook_md"]
    md.write_text(md.read_text(encoding="utf-8") + "edited by hand\n", encoding="utf-8")
    result.outputs["codebook"].unlink()
    assert verify_manifest(result.outputs["manifest"], base_dir=demo_dir) == [
        "out/codebook.csv is missing",
        "out/codebook.md has changed since the run",
    ]


def test_manifest_lists_the_boundary_file_and_codebook_the_boundary_shape(
    demo_dir, demo_recipe_data, write_recipe
):
    data = dict(demo_recipe_data)
    data["study"] = {k: v for k, v in data["study"].items() if k != "points"}
    data["units"] = {
        "boundaries": {"file": "village_areas.gpkg", "layer": "village_areas", "id": "village_id"}
    }
    data["layers"] = {"ndvi": data["layers"]["ndvi"]}
    data["covariates"] = [{"layer": "ndvi", "stats": ["mean"]}]
    data["output"] = {"table": "out/boundaries.csv"}
    result = run(write_recipe(demo_dir, data))
    doc = json.loads(result.outputs["manifest"].read_text(encoding="utf-8"))
    roles = {item["role"]: item for item in doc["inputs"]}
    assert roles["boundaries"]["sha256"] == sha256(demo_dir / "village_areas.gpkg")
    assert result.outputs["manifest"].name == "boundaries_manifest.json"
    assert result.outputs["codebook"].name == "boundaries_codebook.csv"
    assert result.codebook[0]["unit_shape"] == (
        "boundary from village_areas.gpkg, matched on village_id"
    )
