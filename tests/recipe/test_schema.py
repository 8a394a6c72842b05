"""The recipe models on their own: defaults, normalisation and the rules of each block."""

from __future__ import annotations

import math
import os
from pathlib import Path

import pytest
from pydantic import ValidationError

from covextract.recipe import (
    Boundaries,
    ColumnBuffer,
    Covariate,
    Execution,
    Layer,
    Output,
    Recipe,
    Study,
    Units,
)


def errors_of(model, data) -> dict[tuple, str]:
    with pytest.raises(ValidationError) as info:
        model.model_validate(data)
    return {tuple(e["loc"]): e["msg"] for e in info.value.errors()}


def minimal(**changes) -> dict:
    data = {
        "version": 1,
        "study": {"table": "villages.gpkg", "id": "village_id"},
        "layers": {
            "ndvi": {"file": "ndvi.tif"},
            "cover": {
                "file": "cover.tif",
                "kind": "categorical",
                "classes": {1: "crop", 2: "forest"},
            },
        },
        "covariates": [{"layer": "ndvi", "stats": ["mean"]}],
        "output": {"table": "out/villages.csv"},
    }
    data.update(changes)
    return data


# ---- layers ---------------------------------------------------------------


def test_layer_defaults():
    layer = Layer.model_validate({"file": "a.tif"})
    assert (layer.band, layer.kind) == (1, "continuous")
    assert layer.scale is None and layer.offset is None and layer.nodata is None
    assert layer.classes is None and layer.groups is None


def test_nodata_number_becomes_list_and_numbers_become_floats():
    assert Layer.model_validate({"file": "a.tif", "nodata": -3000}).nodata == [-3000.0]
    assert Layer.model_validate({"file": "a.tif", "nodata": [-1, 65535.0]}).nodata == [
        -1.0,
        65535.0,
    ]
    assert (
        "a number or a list of numbers"
        in errors_of(Layer, {"file": "a.tif", "nodata": "none"})[("nodata",)]
    )
    assert ("nodata",) in errors_of(Layer, {"file": "a.tif", "nodata": []})
    assert ("nodata", 0) in errors_of(Layer, {"file": "a.tif", "nodata": [math.nan]})


def test_band_is_a_whole_number_from_one():
    assert ("band",) in errors_of(Layer, {"file": "a.tif", "band": 0})
    assert ("band",) in errors_of(Layer, {"file": "a.tif", "band": 1.0})
    assert ("band",) in errors_of(Layer, {"file": "a.tif", "band": True})
    assert Layer.model_validate({"file": "a.tif", "band": 3}).band == 3


def test_valid_range_and_scale():
    assert (
        "min < max" in errors_of(Layer, {"file": "a.tif", "valid_range": [1, 1]})[("valid_range",)]
    )
    assert ("valid_range",) in errors_of(Layer, {"file": "a.tif", "valid_range": [0, 1, 2]})
    assert "scale 0" in errors_of(Layer, {"file": "a.tif", "scale": 0})[("scale",)]


def test_categorical_rules():
    found = errors_of(
        Layer, {"file": "c.tif", "kind": "categorical", "scale": 2, "valid_range": [0, 9]}
    )
    assert set(found) == {("classes",), ("scale",), ("valid_range",)}
    found = errors_of(Layer, {"file": "c.tif", "classes": {1: "crop"}, "groups": {"g": [1]}})
    assert "add kind: categorical" in found[("classes",)]
    assert ("groups",) in found


def test_class_labels_and_groups():
    base = {"file": "c.tif", "kind": "categorical"}
    found = errors_of(Layer, {**base, "classes": {1: "crop", 2: "crop"}})
    assert "used for codes 1 and 2" in found[("classes", 2)]
    found = errors_of(
        Layer, {**base, "classes": {1: "crop", 2: "forest"}, "groups": {"forest": [2]}}
    )
    assert "same column" in found[("groups", "forest")]
    found = errors_of(
        Layer, {**base, "classes": {1: "crop", 2: "forest"}, "groups": {"green": [2, 2, 9]}}
    )
    assert "listed twice" in found[("groups", "green", 1)]
    assert "not in classes" in found[("groups", "green", 2)]
    assert ("classes", 1) in errors_of(Layer, {**base, "classes": {1: "Crop land"}})
    ok = Layer.model_validate(
        {**base, "classes": {0: "bare", 10: "crop"}, "groups": {"any": [0, 10]}}
    )
    assert ok.classes == {0: "bare", 10: "crop"}


def test_layer_crs_is_checked():
    assert Layer.model_validate({"file": "a.tif", "crs": "EPSG:32736"}).crs == "EPSG:32736"
    assert (
        "coordinate reference system"
        in errors_of(Layer, {"file": "a.tif", "crs": "nowhere"})[("crs",)]
    )


# ---- study, units, output ---------------------------------------------------


def test_study_rules():
    assert Study.model_validate({"table": "V.CSV", "id": "id"}).points is None
    found = errors_of(Study, {"table": "v.csv", "id": "id", "layer": "a", "date_format": "%Y"})
    assert "GeoPackage" in found[("layer",)]
    assert "no date column" in found[("date_format",)]
    assert (
        Study.model_validate({"table": "v.gpkg", "id": "id", "layer": "villages"}).layer
        == "villages"
    )
    assert ("id",) in errors_of(Study, {"table": "v.csv", "id": ""})
    points = Study.model_validate(
        {"table": "v.csv", "id": "id", "points": {"x": "e", "y": "n"}}
    ).points
    assert points.crs == "EPSG:4326"


def test_boundaries_rules():
    assert Boundaries.model_validate({"file": "b.gpkg", "id": "code", "layer": "l"}).layer == "l"
    assert ("layer",) in errors_of(Boundaries, {"file": "b.shp", "id": "code", "layer": "l"})
    assert ("file",) in errors_of(Boundaries, {"file": "b.csv", "id": "code"})


def test_buffer_forms():
    assert Units.model_validate({"buffer_m": 2000}).buffer_m == 2000.0
    assert Units.model_validate({"buffer_m": {"column": "r"}}).buffer_m == ColumnBuffer(column="r")
    for bad in (0, -1, math.inf, True, "2km"):
        assert ("buffer_m",) in errors_of(Units, {"buffer_m": bad}), bad
    assert ("buffer_m", "column") in errors_of(Units, {"buffer_m": {}})


def test_units_choices_and_one_shape():
    assert Units.model_validate({"at_point": "bilinear"}).at_point == "bilinear"
    assert ("at_point",) in errors_of(Units, {"at_point": "closest"})
    found = errors_of(Units, {"buffer_m": 10, "boundaries": {"file": "b.gpkg", "id": "i"}})
    assert "buffer_m and boundaries" in found[()]


def test_output_defaults():
    out = Output.model_validate({"table": "results/villages.parquet"})
    assert out.codebook == os.path.join("results", "villages_codebook.csv")
    assert out.manifest == os.path.join("results", "villages_manifest.json")
    assert out.drop == [] and out.state is None  # the recipe fills state in
    assert Output.model_validate({"table": "t.csv", "drop": None}).drop == []
    assert (
        "same file" in errors_of(Output, {"table": "t.csv", "codebook": "./t.csv"})[("codebook",)]
    )
    assert ("table",) in errors_of(Output, {"table": "t.xlsx"})


def test_execution():
    assert Execution.model_validate({}).threads is None
    assert ("threads",) in errors_of(Execution, {"threads": 0})


# ---- covariates ---------------------------------------------------------------


def test_covariate_defaults_and_area_weighting():
    cov = Covariate.model_validate({"layer": "ndvi", "stats": ["mean"]})
    assert (cov.pixels, cov.area_weighting, cov.buffer_m, cov.name, cov.threshold) == (
        "overlap",
        "auto",
        None,
        None,
        None,
    )
    # YAML 1.1 reads an unquoted off as False.
    assert (
        Covariate.model_validate(
            {"layer": "n", "stats": ["mean"], "area_weighting": False}
        ).area_weighting
        == "off"
    )
    assert (
        "not a choice"
        in errors_of(Covariate, {"layer": "n", "stats": ["mean"], "area_weighting": True})[
            ("area_weighting",)
        ]
    )
    assert ("stats",) in errors_of(Covariate, {"layer": "n", "stats": []})
    assert ("name",) in errors_of(Covariate, {"layer": "n", "stats": ["mean"], "name": "2020_ndvi"})


def test_statistics_accepted_per_kind_and_unit_shape():
    stats = [
        "count",
        "valid_share",
        "sum",
        "density_total",
        "area_km2",
        "mean",
        "std",
        "min",
        "max",
    ]
    stats += ["median", "q2.5", "q90", "share_above"]
    data = minimal(covariates=[{"layer": "ndvi", "stats": stats, "threshold": 0.3}])
    assert Recipe.model_validate(data).covariates[0].stats == stats
    data = minimal(
        covariates=[
            {"layer": "cover", "stats": ["share", "dominant", "classes_present", "shannon"]}
        ]
    )
    assert Recipe.model_validate(data).covariates[0].layer == "cover"
    # Point units take the value under the point; a covariate buffer brings area statistics back.
    data = minimal(
        units={"at_point": "nearest"},
        covariates=[
            {"layer": "ndvi", "stats": ["value"]},
            {"layer": "cover", "stats": ["value"]},
            {"layer": "ndvi", "stats": ["mean"], "buffer_m": 1000, "name": "ndvi_1km"},
        ],
    )
    assert [c.stats for c in Recipe.model_validate(data).covariates] == [
        ["value"],
        ["value"],
        ["mean"],
    ]


def test_bilinear_on_categorical_layer_is_refused():
    data = minimal(
        units={"at_point": "bilinear"}, covariates=[{"layer": "cover", "stats": ["value"]}]
    )
    assert "bilinear" in errors_of(Recipe, data)[("covariates", 0, "layer")]


def test_recipe_checks_run_without_the_loader():
    data = minimal(covariates=[{"layer": "ndvi_2019", "stats": ["mean"]}], output={"table": 5})
    found = errors_of(Recipe, data)
    assert "unknown layer 'ndvi_2019'" in found[("covariates", 0, "layer")]
    assert ("output", "table") in found  # the other blocks' errors come along


def test_recipe_defaults_without_a_file():
    recipe = Recipe.model_validate(minimal(units=None, execution=None))
    assert recipe.units == Units()
    assert recipe.execution == Execution()
    assert recipe.base_dir == Path.cwd()
    assert recipe.source_file is None
    assert recipe.line_of("study") is None


def test_state_folder_defaults_to_the_study_table_folder():
    # The weights cache reveals where the units are: it stays with the inputs.
    data = minimal(study={"table": "confidential/villages.gpkg", "id": "village_id"})
    recipe = Recipe.model_validate(data)
    assert recipe.output.state == os.path.join("confidential", ".covextract-state")
    data["output"] = {"table": "out/v.csv", "state": "cache"}
    assert Recipe.model_validate(data).output.state == "cache"


def test_version_must_be_the_whole_number_one():
    for bad in (2, True, 1.0, "1", None):
        assert ("version",) in errors_of(Recipe, minimal(version=bad)), bad
