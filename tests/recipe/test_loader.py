"""Loading recipes: the full example, paths, lines, mappings, fingerprints."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

from covextract.recipe import Recipe, load_recipe

# The example of the recipe contract (villages and rasters are invented), with
# every optional key of version 1 written out at least once.
EXAMPLE = """\
version: 1
study:
  table: data/villages.csv        # csv, parquet, gpkg, geojson, shp
  id: village_id                  # unique key, kept as text
  points: {x: lon, y: lat, crs: "EPSG:4326"}   # for point tables
  date: visit_date                # optional; enables windows before each visit
  date_format: "%d/%m/%Y"
units:
  buffer_m: 2000                  # a number, or {column: radius_m}
layers:
  ndvi:
    file: rasters/ndvi_2020.tif
    band: 1
    scale: 0.0001                 # stored integers to physical values
    offset: 0
    nodata: -3000
    valid_range: [-1, 1]
    unit: "NDVI, unitless"
    source: Lake Morrow vegetation survey
    version: "2.1"
    citation: Invented for the tests
    license: CC-BY-4.0
  cover:
    file: rasters/landcover_2020.tif
    kind: categorical
    nodata: [0, 255]
    crs: "EPSG:32736"
    classes: {1: cropland, 2: forest, 3: grassland, 4: built, 5: water}   # invented legend
    groups: {green: [2, 3]}       # optional: several codes counted as one
covariates:
  - layer: ndvi
    stats: [mean, std, q90, valid_share]
    pixels: overlap               # overlap | center | touched
    area_weighting: auto
  - layer: ndvi
    name: ndvi_wide
    stats: [median, area_above]
    threshold: 0.4
    pixels: touched
    area_weighting: off
    buffer_m: {column: radius_m}
  - layer: cover
    stats: [share, dominant]
output:
  table: out/villages_covariates.csv
  codebook: out/codebook.csv
  drop: [lat, lon]
execution:
  threads: 2
  scheduler: tcp://127.0.0.1:8786
"""


@pytest.fixture
def example_file(tmp_path) -> Path:
    folder = tmp_path / "study"
    folder.mkdir()
    path = folder / "recipe.yaml"
    path.write_text(EXAMPLE, encoding="utf-8")
    return path


def test_example_loads_with_every_field(example_file):
    recipe = load_recipe(example_file)
    assert isinstance(recipe, Recipe)
    assert recipe.version == 1
    assert recipe.study.table == "data/villages.csv"
    assert recipe.study.id == "village_id"
    assert (recipe.study.points.x, recipe.study.points.y) == ("lon", "lat")
    assert recipe.study.points.crs == "EPSG:4326"
    assert recipe.study.date == "visit_date"
    assert recipe.study.date_format == "%d/%m/%Y"
    assert recipe.units.buffer_m == 2000.0
    assert recipe.units.boundaries is None and recipe.units.at_point is None

    assert list(recipe.layers) == ["ndvi", "cover"]
    ndvi, cover = recipe.layers["ndvi"], recipe.layers["cover"]
    assert ndvi.kind == "continuous" and ndvi.band == 1
    assert (ndvi.scale, ndvi.offset) == (0.0001, 0.0)
    assert ndvi.nodata == [-3000.0]  # a single number becomes a list of one
    assert ndvi.valid_range == [-1.0, 1.0]
    assert ndvi.unit == "NDVI, unitless"
    assert (ndvi.source, ndvi.version, ndvi.citation, ndvi.license) == (
        "Lake Morrow vegetation survey",
        "2.1",
        "Invented for the tests",
        "CC-BY-4.0",
    )
    assert cover.kind == "categorical"
    assert cover.nodata == [0.0, 255.0]
    assert cover.crs == "EPSG:32736"
    assert cover.classes == {1: "cropland", 2: "forest", 3: "grassland", 4: "built", 5: "water"}
    assert cover.groups == {"green": [2, 3]}

    first, wide, shares = recipe.covariates
    assert first.stats == ["mean", "std", "q90", "valid_share"]
    assert (first.pixels, first.area_weighting, first.buffer_m, first.name) == (
        "overlap",
        "auto",
        None,
        None,
    )
    assert wide.name == "ndvi_wide" and wide.threshold == 0.4
    assert wide.pixels == "touched"
    assert wide.area_weighting == "off"  # unquoted off reads as false in YAML 1.1
    assert wide.buffer_m.column == "radius_m"
    assert shares.stats == ["share", "dominant"]

    assert recipe.output.table == "out/villages_covariates.csv"
    assert recipe.output.codebook == "out/codebook.csv"
    assert recipe.output.manifest == os.path.join("out", "villages_covariates_manifest.json")
    assert recipe.output.drop == ["lat", "lon"]
    assert recipe.output.state == os.path.join("data", ".covextract-state")
    assert recipe.execution.threads == 2
    assert recipe.execution.scheduler == "tcp://127.0.0.1:8786"


def test_base_dir_and_source_file(example_file):
    recipe = load_recipe(example_file)
    assert recipe.base_dir == example_file.parent
    assert recipe.source_file == example_file


def test_relative_paths_resolve_against_the_recipe_folder(example_file, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)  # somewhere else than the recipe's folder
    recipe = load_recipe(Path("study") / "recipe.yaml")
    folder = example_file.parent
    assert recipe.base_dir == folder
    assert recipe.resolve(recipe.study.table) == folder / "data" / "villages.csv"
    assert recipe.resolve(recipe.layers["ndvi"].file) == folder / "rasters" / "ndvi_2020.tif"
    assert recipe.resolve("../shared/x.tif") == tmp_path / "shared" / "x.tif"
    absolute = tmp_path / "elsewhere" / "y.tif"
    assert recipe.resolve(absolute) == absolute
    assert recipe.resolve(str(absolute)) == absolute


def test_resolve_expands_home(example_file, tmp_path, monkeypatch):
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    recipe = load_recipe(example_file)
    assert recipe.resolve("~/rasters/a.tif") == tmp_path / "home" / "rasters" / "a.tif"


def test_base_dir_argument_overrides_the_file_folder(example_file, tmp_path):
    recipe = load_recipe(example_file, base_dir=tmp_path)
    assert recipe.base_dir == tmp_path
    assert recipe.resolve("data/v.csv") == tmp_path / "data" / "v.csv"


def test_mapping_input_uses_cwd_or_base_dir(example_file, tmp_path, monkeypatch):
    data = load_recipe(example_file).to_dict()
    monkeypatch.chdir(tmp_path)
    recipe = load_recipe(data)
    assert recipe.base_dir == tmp_path
    assert recipe.source_file is None
    assert recipe.line_of("study.table") is None
    assert recipe.resolve("data/v.csv") == tmp_path / "data" / "v.csv"
    other = load_recipe(data, base_dir=tmp_path / "other")
    assert other.base_dir == tmp_path / "other"


def test_to_dict_round_trips(example_file):
    recipe = load_recipe(example_file)
    data = recipe.to_dict()
    assert data["covariates"][1]["buffer_m"] == {"column": "radius_m"}
    assert data["layers"]["cover"]["classes"][2] == "forest"
    assert "units" in data and "boundaries" not in data["units"]  # empty keys left out
    again = load_recipe(data)
    assert again.to_dict() == data
    assert again.fingerprint == recipe.fingerprint


def test_line_of(example_file):
    recipe = load_recipe(example_file)
    assert recipe.line_of("version") == 1
    assert recipe.line_of("study") == 2
    assert recipe.line_of("study.points.crs") == 5
    assert recipe.line_of("layers.cover") == 23
    assert recipe.line_of("layers.cover.classes.3") == 28
    assert recipe.line_of(("layers", "cover", "classes", 3)) == 28
    assert recipe.line_of("covariates[1]") == 35
    assert recipe.line_of("covariates[1].stats[1]") == 37
    assert recipe.line_of(("covariates", 1, "threshold")) == 38
    # A key the file does not hold points at the block it would go in.
    assert recipe.line_of("covariates[2].name") == 42
    assert recipe.line_of("output.manifest") == 44


def test_unquoted_off_means_off_and_false_is_accepted(tmp_path):
    text = EXAMPLE.replace("    area_weighting: auto\n", "    area_weighting: 'off'\n")
    path = tmp_path / "r.yaml"
    path.write_text(text, encoding="utf-8")
    recipe = load_recipe(path)
    assert [c.area_weighting for c in recipe.covariates] == ["off", "off", "auto"]
    data = recipe.to_dict()
    data["covariates"][2]["area_weighting"] = False
    assert load_recipe(data).covariates[2].area_weighting == "off"


def test_yaml_merge_keys_and_anchors(tmp_path):
    text = EXAMPLE.replace(
        "  - layer: cover\n    stats: [share, dominant]\n",
        "  - &common\n    layer: cover\n    stats: [share, dominant]\n"
        "  - <<: *common\n    name: cover_near\n    buffer_m: 500\n",
    )
    path = tmp_path / "r.yaml"
    path.write_text(text, encoding="utf-8")
    recipe = load_recipe(path)
    near = recipe.covariates[3]
    assert (near.layer, near.name, near.buffer_m) == ("cover", "cover_near", 500.0)
    assert near.stats == ["share", "dominant"]


def test_fingerprint_ignores_key_order_and_explicit_defaults(example_file, tmp_path):
    recipe = load_recipe(example_file)
    data = recipe.to_dict()
    reordered = {key: data[key] for key in reversed(list(data))}
    reordered["layers"] = {
        name: dict(reversed(list(layer.items()))) for name, layer in data["layers"].items()
    }
    reordered["study"] = dict(reversed(list(data["study"].items())))
    assert load_recipe(reordered).fingerprint == recipe.fingerprint

    # Defaults written out and whole numbers written as floats change nothing.
    text = EXAMPLE.replace("  buffer_m: 2000 ", "  buffer_m: 2000.0 ").replace(
        "    kind: categorical\n", "    kind: categorical\n    band: 1\n"
    )
    path = tmp_path / "same.yaml"
    path.write_text(text, encoding="utf-8")
    assert load_recipe(path).fingerprint == recipe.fingerprint


def test_fingerprint_changes_with_a_value(example_file):
    recipe = load_recipe(example_file)
    data = recipe.to_dict()
    data["layers"]["ndvi"]["scale"] = 0.001
    assert load_recipe(data).fingerprint != recipe.fingerprint
    data = recipe.to_dict()
    data["covariates"][0]["stats"] = ["std", "mean", "q90", "valid_share"]
    assert load_recipe(data).fingerprint != recipe.fingerprint  # column order differs
    assert len(recipe.fingerprint) == 64
    int(recipe.fingerprint, 16)


def test_fingerprint_ignores_execution(example_file):
    recipe = load_recipe(example_file)
    data = recipe.to_dict()
    data["execution"] = {"threads": 8}
    assert load_recipe(data).fingerprint == recipe.fingerprint


def test_fingerprint_does_not_depend_on_the_folder(example_file, tmp_path):
    moved = tmp_path / "moved" / "recipe.yaml"
    moved.parent.mkdir()
    moved.write_text(example_file.read_text(encoding="utf-8"), encoding="utf-8")
    assert load_recipe(moved).fingerprint == load_recipe(example_file).fingerprint


def test_source_of_wrong_type():
    with pytest.raises(TypeError, match="file path or a mapping"):
        load_recipe(42)
