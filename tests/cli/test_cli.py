"""The ``covextract`` commands, driven through typer's CliRunner.

The commands are thin: these tests check exit codes, what is printed where
(results on stdout, problems and warnings on stderr) and the files written.
"""

from __future__ import annotations

import csv
import re
import warnings

import numpy
import pandas as pd
import pytest
import rasterio
from typer.testing import CliRunner

import covextract
from covextract.cli.app import app
from covextract.errors import UnitOutsideLayerWarning

runner = CliRunner()

OUTPUT_NAMES = ("table", "codebook", "codebook_md", "manifest")


#: A finished pass as the CLI prints it on stderr when stderr is not a terminal.
PASS_LINE = re.compile(r"^\S.* \(.+\): \d+ blocks? in \d+\.\d s$")


def without_progress(stderr: str) -> str:
    """``stderr`` without the one line per finished pass (the rest: warnings and errors)."""
    return "".join(
        line for line in stderr.splitlines(keepends=True) if not PASS_LINE.match(line.rstrip("\n"))
    )


def printed_outputs(stdout: str) -> dict:
    """``name: path`` lines of the summary, for the output names."""
    out = {}
    for line in stdout.splitlines():
        name, sep, path = line.partition(": ")
        if sep and name in OUTPUT_NAMES:
            out[name] = path
    return out


# -------------------------------------------------------------------------- run
def test_run_writes_the_outputs_and_prints_where_they_are(demo_dir):
    recipe = demo_dir / "recipe.yaml"
    result = runner.invoke(app, ["run", str(recipe)])
    assert result.exit_code == 0, result.output
    lines = result.stdout.splitlines()
    # the column line and the line under the preview table agree: 6 + 32 = 38 value columns
    assert lines[0] == (
        "40 units, 5 layers (cover_2021, lights, ndvi, surface_temp, veg), "
        "47 new columns: 38 value columns and 9 QA columns"
    )
    assert (
        "shown above: 6 of 38 value columns; not shown: 32 value columns and 9 QA columns" in lines
    )
    # four grids; covariates on a grid already seen in the run reuse its weights
    assert lines[1].startswith("weight sets: 4 built")
    # the population-proxy fit is part of the summary (a, b, R2, RMSE, n, smearing)
    assert "calibration hh_fit: log(count) = " in result.stdout
    assert "smearing" in result.stdout
    paths = printed_outputs(result.stdout)
    out = demo_dir / "out"
    assert paths == {
        "table": str(out / "villages_covariates.csv"),
        "codebook": str(out / "codebook.csv"),
        "codebook_md": str(out / "codebook.md"),
        "manifest": str(out / "villages_covariates_manifest.json"),
    }
    with open(paths["table"], encoding="utf-8", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 40 and rows[0]["village_id"] == "003"
    # stderr holds one progress line per pass (it is not a terminal here), nothing else
    passes = result.stderr.splitlines()
    assert passes and all(PASS_LINE.match(line) for line in passes)
    assert passes[0].startswith("ndvi (") and ": 18 blocks in " in passes[0]
    again = runner.invoke(app, ["run", str(recipe)])
    assert again.exit_code == 0
    assert again.stdout.splitlines()[1].startswith("weight sets: 0 built")


def test_run_quiet_prints_nothing_and_still_writes(demo_dir):
    result = runner.invoke(app, ["run", "--quiet", str(demo_dir / "recipe.yaml")])
    assert result.exit_code == 0
    assert result.stdout == "" and result.stderr == ""
    assert (demo_dir / "out" / "villages_covariates_manifest.json").is_file()


def test_run_shows_warnings_as_one_line_on_stderr(demo_dir, ndvi_recipe, write_recipe):
    (demo_dir / "two.csv").write_text(
        "village_id,lon,lat,visit_date\n001,4.631062,-11.696279,2021-01-14\n"
        "002,20.0,-12.0,2021-01-14\n",
        encoding="utf-8",
    )
    data = ndvi_recipe()
    data["study"]["table"] = "two.csv"
    path = write_recipe(demo_dir, data)
    # The CLI shows warnings itself (one line each on stderr); pytest.warns would
    # take them before the CLI sees them, so the test lets this one class through.
    with warnings.catch_warnings():
        warnings.simplefilter("always", UnitOutsideLayerWarning)
        result = runner.invoke(app, ["run", str(path)])
    assert result.exit_code == 0, result.output
    assert without_progress(result.stderr) == (
        "warning (UnitOutsideLayerWarning): 1 of 2 units lie wholly outside layer 'ndvi'; "
        "their ndvi values are missing (QA code outside_layer)\n"
    )
    assert "outside_layer x1" in result.stdout


def test_run_without_a_recipe_is_a_usage_error():
    result = runner.invoke(app, ["run"])
    assert result.exit_code == 2


# ------------------------------------------------------------------------ check
def test_check_good_recipe(demo_dir, folder_snapshot):
    before = folder_snapshot(demo_dir)
    result = runner.invoke(app, ["check", str(demo_dir / "recipe.yaml")])
    assert result.exit_code == 0, result.output
    assert result.stdout == (
        f"{demo_dir / 'recipe.yaml'}: recipe and inputs look right; nothing was computed.\n"
    )
    assert folder_snapshot(demo_dir) == before  # check writes nothing, not even a cache


def test_check_bad_recipe_lists_problems_on_stderr(demo_dir, ndvi_recipe, write_recipe):
    data = ndvi_recipe()
    data["layers"]["ndvi"]["file"] = "ndvi_2020.tif"
    data["output"]["drop"] = ["lat", "lon", "altitude"]
    path = write_recipe(demo_dir, data)
    result = runner.invoke(app, ["check", str(path)])
    assert result.exit_code == 1
    assert result.stdout == ""
    lines = result.stderr.splitlines()
    assert lines[0] == f"2 problem(s) found in {path}:"
    assert "output.drop: column 'altitude' is not in the study table" in lines[1]
    assert "layers.ndvi.file: raster of layer 'ndvi' not found" in lines[2]
    assert len(lines) == 3
    assert "Traceback" not in result.output


def test_run_bad_recipe_traceback_only_with_debug(demo_dir, ndvi_recipe, write_recipe):
    data = ndvi_recipe()
    data["layers"]["ndvi"]["file"] = "ndvi_2020.tif"
    path = write_recipe(demo_dir, data)
    plain = runner.invoke(app, ["run", str(path)])
    assert plain.exit_code == 1
    assert plain.stderr.startswith("error: raster of layer 'ndvi' not found: ")
    assert len(plain.stderr.splitlines()) == 1
    assert "Traceback" not in plain.output
    debug = runner.invoke(app, ["run", "--debug", str(path)])
    assert debug.exit_code == 1
    assert "Traceback (most recent call last)" in debug.stderr
    assert "covextract.errors.InputFileError" in debug.stderr


# --------------------------------------------------------------------- describe
@pytest.mark.parametrize(
    "name", ["ndvi_2021.tif", "surface_temp_2021.tif", "night_lights_2021.tif"]
)
def test_describe_raster(demo_dir, name):
    path = demo_dir / name
    result = runner.invoke(app, ["describe", str(path)])
    assert result.exit_code == 0, result.output
    lines = set(result.stdout.splitlines())
    # Reference: the same facts read with rasterio.
    with rasterio.open(path) as ds:
        expected = {
            f"crs: {ds.crs.to_string()}",
            f"width: {ds.width}",
            f"height: {ds.height}",
            f"dtypes: {list(ds.dtypes)}",
            f"nodata: {list(ds.nodatavals)}",
            f"bands: {ds.count}",
        }
    assert expected <= lines


def test_describe_demo_rasters_by_hand(demo_dir):
    # The demo's three grids, as demo_data/README.md describes them.
    expected = {
        "ndvi_2021.tif": ("crs: EPSG:4326", "dtypes: ['int16']", "nodata: [-3000.0]"),
        "surface_temp_2021.tif": ("crs: EPSG:32731",),
        "night_lights_2021.tif": ("crs: EPSG:3857", "nodata: [-1.0]"),
    }
    for name, facts in expected.items():
        out = runner.invoke(app, ["describe", str(demo_dir / name)]).stdout.splitlines()
        for fact in facts:
            assert fact in out, (name, fact)


def test_describe_geopackage(demo_dir):
    result = runner.invoke(app, ["describe", str(demo_dir / "village_areas.gpkg")])
    assert result.exit_code == 0, result.output
    lines = result.stdout.splitlines()
    for line in (
        "layer: village_areas",
        "feature_count: 40",
        "columns:",
        "  village_id: object",
        "geometry_types:",
        "  Polygon: 40",
        "crs: EPSG:4326",
    ):
        assert line in lines


def test_describe_missing_file(demo_dir):
    result = runner.invoke(app, ["describe", str(demo_dir / "missing.tif")])
    assert result.exit_code == 1
    assert "not found" in result.stderr and "missing.tif" in result.stderr


# ------------------------------------------------------------------------- demo
def test_demo_lays_out_runs_and_prints_the_outputs(tmp_path):
    folder = tmp_path / "try-it"
    result = runner.invoke(app, ["demo", "--out", str(folder)])
    assert result.exit_code == 0, result.output
    assert f"demo scenario (invented data) laid out in {folder}" in result.stdout
    paths = printed_outputs(result.stdout)
    assert set(paths) == set(OUTPUT_NAMES)
    for path in paths.values():
        assert path.startswith(str(folder / "out"))
        assert (folder / "out").joinpath(path.rsplit("/", 1)[1]).is_file()
    for name in ("recipe.yaml", "villages.csv", "ndvi_2021.tif", "village_areas.gpkg"):
        assert (folder / name).is_file()
    # the generated 31-year series gives SPI-3 before each visit without a short-baseline
    # warning (the test run turns covextract warnings into errors)
    assert len(list((folder / "spi_rain").glob("rain_*.tif"))) == 31 * 12
    assert "villages per WMO category:" in result.stdout
    spi = pd.read_csv(folder / "out" / "villages_spi.csv", dtype=str, keep_default_na=False)
    assert len(spi) == 40
    assert spi["spi3_mean_cat"].ne("").all()
    assert spi["spi3_qa"].eq("").all()


def test_demo_refuses_a_foreign_non_empty_folder(tmp_path):
    (tmp_path / "notes.txt").write_text("mine\n", encoding="utf-8")
    result = runner.invoke(app, ["demo", "--out", str(tmp_path)])
    assert result.exit_code == 1
    assert "is not empty and holds no earlier demo" in result.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["notes.txt"]


# ---------------------------------------------------------------------- version
def test_version():
    result = runner.invoke(app, ["--version"])
    assert result.exit_code == 0, result.output
    lines = result.stdout.splitlines()
    assert f"covextract: {covextract.__version__}" in lines
    assert f"numpy: {numpy.__version__}" in lines
    assert f"gdal: {rasterio.__gdal_version__}" in lines


def test_help_lists_the_commands():
    result = runner.invoke(app, ["--help"])
    assert result.exit_code == 0
    for command in ("run", "check", "describe", "demo"):
        assert f" {command} " in result.stdout
