"""Every kind of recipe problem: the message names the problem, the key and the line.

Each test edits one line of ``BASE``, a valid recipe whose line numbers are
written beside it, so the expected line can be read off by hand.
"""

from __future__ import annotations

import pytest

from covextract.errors import InputFileError, RecipeError
from covextract.recipe import load_recipe

BASE = """\
version: 1
study:
  table: data/villages.csv
  id: village_id
  points: {x: lon, y: lat}
units:
  buffer_m: 2000
layers:
  ndvi:
    file: rasters/ndvi_2020.tif
    scale: 0.0001
    nodata: -3000
  cover:
    file: rasters/landcover_2020.tif
    kind: categorical
    classes: {1: cropland, 2: forest}
covariates:
  - layer: ndvi
    stats: [mean, std]
  - layer: cover
    stats: [share]
output:
  table: out/villages_covariates.csv
"""
# Lines of BASE: 1 version, 2 study, 3 table, 4 id, 5 points, 6 units, 7 buffer_m,
# 8 layers, 9 ndvi, 10 file, 11 scale, 12 nodata, 13 cover, 14 file, 15 kind,
# 16 classes, 17 covariates, 18 first covariate (layer: ndvi), 19 its stats,
# 20 second covariate (layer: cover), 21 its stats, 22 output, 23 table.


def variant(old: str, new: str) -> str:
    assert BASE.count(old) == 1, old
    return BASE.replace(old, new)


def load_text(tmp_path, text: str):
    path = tmp_path / "recipe.yaml"
    path.write_text(text, encoding="utf-8")
    return load_recipe(path)


def problems(tmp_path, text: str) -> list:
    with pytest.raises(RecipeError) as info:
        load_text(tmp_path, text)
    return info.value.problems


def only(found: list, key: str):
    matching = [p for p in found if p.key == key]
    assert len(matching) == 1, [str(p) for p in found]
    return matching[0]


def test_base_recipe_is_valid(tmp_path):
    recipe = load_text(tmp_path, BASE)
    assert [c.layer for c in recipe.covariates] == ["ndvi", "cover"]


def test_missing_file_is_an_input_file_error_and_an_oserror(tmp_path):
    missing = tmp_path / "nowhere" / "recipe.yaml"
    with pytest.raises(InputFileError) as info:
        load_recipe(missing)
    assert isinstance(info.value, OSError)
    assert str(missing) in str(info.value)
    assert "not found" in str(info.value)
    assert "check the path" in str(info.value)


def test_folder_instead_of_file(tmp_path):
    with pytest.raises(InputFileError, match="is a folder"):
        load_recipe(tmp_path)


def test_yaml_syntax_error_gives_line_and_column(tmp_path):
    found = problems(tmp_path, variant("  id: village_id\n", "  id: village_id: x\n"))
    assert len(found) == 1
    (problem,) = found
    assert problem.line == 4
    assert problem.file == str(tmp_path / "recipe.yaml")
    assert "not valid YAML" in problem.message
    assert "line 4, column 17" in problem.message
    assert str(problem).startswith(f"{tmp_path / 'recipe.yaml'}:4: ")


def test_not_utf8(tmp_path):
    path = tmp_path / "recipe.yaml"
    path.write_bytes(BASE.encode("utf-8").replace(b"village_id", b"villag\xe9_id", 1))
    with pytest.raises(RecipeError) as info:
        load_recipe(path)
    (problem,) = info.value.problems
    assert "UTF-8" in problem.message
    assert problem.line == 4


def test_top_level_not_a_mapping(tmp_path):
    (problem,) = problems(tmp_path, "- version: 1\n- study: {}\n")
    assert "must be a mapping" in problem.message
    assert "got a list" in problem.message
    assert problem.line == 1


def test_empty_file(tmp_path):
    (problem,) = problems(tmp_path, "# nothing yet\n")
    assert "empty" in problem.message
    assert "version: 1" in problem.message


def test_unknown_key_with_hint(tmp_path):
    found = problems(tmp_path, variant("    scale: 0.0001\n", "    scael: 0.0001\n"))
    problem = only(found, "layers.ndvi.scael")
    assert problem.line == 11
    assert "unknown key 'scael'" in problem.message
    assert "did you mean 'scale'?" in problem.message
    assert "nodata" in problem.message  # the keys allowed at that level are listed
    assert len(found) == 1


def test_misspelt_required_key_is_one_problem_not_two(tmp_path):
    found = problems(tmp_path, variant("covariates:\n", "covariate:\n"))
    assert len(found) == 1, [str(p) for p in found]
    problem = only(found, "covariate")
    assert problem.line == 17
    assert "did you mean 'covariates' (required here)?" in problem.message


def test_unknown_key_without_close_match_lists_allowed_keys(tmp_path):
    found = problems(tmp_path, variant("  table: out/", "  colour: red\n  table: out/"))
    problem = only(found, "output.colour")
    assert problem.line == 23
    assert "did you mean" not in problem.message
    assert (
        "allowed here: table, codebook, manifest, drop, keep_coordinates, state" in problem.message
    )


def test_wrong_type_names_expected_type_and_value(tmp_path):
    found = problems(tmp_path, variant("  id: village_id\n", "  id: 12\n"))
    problem = only(found, "study.id")
    assert problem.line == 4
    assert "expected text" in problem.message
    assert "got 12 (a whole number)" in problem.message
    assert "quotes" in problem.message


def test_wrong_type_of_number(tmp_path):
    found = problems(tmp_path, variant("    nodata: -3000\n", "    nodata: -3000\n    band: '2'\n"))
    problem = only(found, "layers.ndvi.band")
    assert problem.line == 13
    assert "expected a whole number, got '2' (text)" in problem.message


def test_yes_no_words_are_explained(tmp_path):
    found = problems(tmp_path, variant("1: cropland", "1: no"))
    problem = only(found, "layers.cover.classes.1")
    assert problem.line == 16
    assert "expected text" in problem.message
    assert "yes, no, on, off" in problem.message


def test_wrong_type_of_block(tmp_path):
    found = problems(tmp_path, variant("  points: {x: lon, y: lat}\n", "  points: lon lat\n"))
    problem = only(found, "study.points")
    assert problem.line == 5
    assert "expected a block of key: value lines" in problem.message
    assert "'lon lat' (text)" in problem.message


def test_list_expected(tmp_path):
    found = problems(tmp_path, variant("    stats: [share]\n", "    stats: share\n"))
    problem = only(found, "covariates[1].stats")
    assert problem.line == 21
    assert "expected a list" in problem.message
    assert "[share]" in problem.message


def test_missing_required_key(tmp_path):
    found = problems(tmp_path, variant("  id: village_id\n", ""))
    problem = only(found, "study.id")
    assert "missing required key 'id'" in problem.message
    assert problem.line == 2  # the block the key belongs in


def test_missing_top_level_block(tmp_path):
    text = BASE[: BASE.index("output:")]
    found = problems(tmp_path, text)
    problem = only(found, "output")
    assert "missing required key 'output'" in problem.message
    assert "table:" in problem.message


def test_invalid_choice_lists_valid_ones(tmp_path):
    found = problems(tmp_path, variant("    kind: categorical\n", "    kind: categoric\n"))
    problem = only(found, "layers.cover.kind")
    assert problem.line == 15
    assert "invalid choice 'categoric'" in problem.message
    assert "did you mean 'categorical'?" in problem.message
    assert "valid: continuous, categorical" in problem.message


def test_invalid_pixel_rule(tmp_path):
    found = problems(
        tmp_path,
        variant("    stats: [mean, std]\n", "    stats: [mean, std]\n    pixels: centre\n"),
    )
    problem = only(found, "covariates[0].pixels")
    assert problem.line == 20
    assert "valid: overlap, center, touched" in problem.message
    assert "did you mean 'center'?" in problem.message


def test_area_weighting_true_is_refused(tmp_path):
    text = variant("    stats: [mean, std]\n", "    stats: [mean, std]\n    area_weighting: on\n")
    problem = only(problems(tmp_path, text), "covariates[0].area_weighting")
    assert problem.line == 20
    assert "true is not a choice" in problem.message
    assert "auto" in problem.message and "off" in problem.message


def test_unknown_layer_with_hint(tmp_path):
    found = problems(tmp_path, variant("  - layer: ndvi\n", "  - layer: ndiv\n"))
    problem = only(found, "covariates[0].layer")
    assert problem.line == 18
    assert "unknown layer 'ndiv'" in problem.message
    assert "did you mean 'ndvi'?" in problem.message
    assert "ndvi, cover" in problem.message
    assert len(found) == 1  # no follow-on complaints about its statistics


def test_unknown_statistic_with_hint(tmp_path):
    found = problems(tmp_path, variant("[mean, std]", "[mean, stdev]"))
    problem = only(found, "covariates[0].stats[1]")
    assert problem.line == 19
    assert "unknown statistic 'stdev'" in problem.message
    assert "did you mean 'std'?" in problem.message


def test_continuous_statistic_on_categorical_layer(tmp_path):
    found = problems(tmp_path, variant("[share]", "[share, mean]"))
    problem = only(found, "covariates[1].stats[1]")
    assert problem.line == 21
    assert "for a categorical layer" in problem.message
    assert "share, dominant, classes_present, shannon" in problem.message
    assert "continuous layers" in problem.message


def test_percentile_out_of_range(tmp_path):
    found = problems(tmp_path, variant("[mean, std]", "[mean, q150]"))
    problem = only(found, "covariates[0].stats[1]")
    assert "out of range" in problem.message
    assert "q0 to q100" in problem.message


def test_point_statistic_without_point_units(tmp_path):
    found = problems(tmp_path, variant("[mean, std]", "[value]"))
    problem = only(found, "covariates[0].stats[0]")
    assert "units.at_point" in problem.message


def test_area_statistic_with_point_units(tmp_path):
    found = problems(tmp_path, variant("  buffer_m: 2000\n", "  at_point: nearest\n"))
    problem = only(found, "covariates[0].stats[0]")
    assert problem.line == 19
    assert "point units" in problem.message
    assert "value, valid_share" in problem.message


def test_threshold_missing(tmp_path):
    found = problems(tmp_path, variant("[mean, std]", "[mean, share_above]"))
    problem = only(found, "covariates[0].threshold")
    assert "share_above needs a threshold" in problem.message
    assert problem.line == 18  # the covariate it must be added to


def test_threshold_without_statistic_that_uses_it(tmp_path):
    text = variant("    stats: [mean, std]\n", "    stats: [mean, std]\n    threshold: 0.3\n")
    problem = only(problems(tmp_path, text), "covariates[0].threshold")
    assert problem.line == 20
    assert "only used by area_above and share_above" in problem.message


def test_statistic_listed_twice(tmp_path):
    problem = only(
        problems(tmp_path, variant("[mean, std]", "[mean, std, mean]")), "covariates[0].stats[2]"
    )
    assert "listed twice" in problem.message


def test_bad_crs(tmp_path):
    found = problems(tmp_path, variant("{x: lon, y: lat}", '{x: lon, y: lat, crs: "EPSG:4327000"}'))
    problem = only(found, "study.points.crs")
    assert problem.line == 5
    assert "'EPSG:4327000' is not a coordinate reference system" in problem.message
    assert "EPSG:4326" in problem.message


def test_bad_layer_name(tmp_path):
    problem = only(problems(tmp_path, variant("  ndvi:\n", "  NDVI-2020:\n")), "layers.NDVI-2020")
    assert problem.line == 9
    assert "cannot be used as a name" in problem.message
    assert "'ndvi_2020'" in problem.message


def test_two_unit_shapes(tmp_path):
    text = variant("  buffer_m: 2000\n", "  buffer_m: 2000\n  at_point: nearest\n")
    problem = only(problems(tmp_path, text), "units")
    assert problem.line == 6
    assert "only one unit shape" in problem.message
    assert "buffer_m and at_point" in problem.message


def test_negative_buffer(tmp_path):
    problem = only(problems(tmp_path, variant("buffer_m: 2000", "buffer_m: -5")), "units.buffer_m")
    assert problem.line == 7
    assert "more than 0 metres" in problem.message


def test_categorical_layer_without_classes(tmp_path):
    problem = only(
        problems(tmp_path, variant("    classes: {1: cropland, 2: forest}\n", "")),
        "layers.cover.classes",
    )
    assert problem.line == 13
    assert "needs classes" in problem.message


def test_group_code_not_in_classes(tmp_path):
    text = variant("2: forest}\n", "2: forest}\n    groups: {green: [2, 7]}\n")
    problem = only(problems(tmp_path, text), "layers.cover.groups.green[1]")
    assert problem.line == 17
    assert "class code 7 is not in classes" in problem.message
    assert "1, 2" in problem.message


def test_wrong_study_table_type(tmp_path):
    problem = only(problems(tmp_path, variant("villages.csv", "villages.xlsx")), "study.table")
    assert problem.line == 3
    assert ".csv, .parquet, .gpkg, .geojson, .shp" in problem.message


def test_output_over_input(tmp_path):
    text = variant("  table: out/villages_covariates.csv", "  table: ./data/villages.csv")
    problem = only(problems(tmp_path, text), "output.table")
    assert problem.line == 23
    assert "never writes over an input" in problem.message


def test_csv_without_geometry(tmp_path):
    text = variant("  points: {x: lon, y: lat}\n", "")
    problem = only(problems(tmp_path, text), "study.points")
    assert "no geometry" in problem.message
    assert problem.line == 2


def test_points_without_unit_shape(tmp_path):
    problem = only(problems(tmp_path, variant("units:\n  buffer_m: 2000\n", "")), "units")
    assert "covariates[0], covariates[1]" in problem.message
    assert "units.buffer_m" in problem.message


def test_duplicate_key(tmp_path):
    text = variant("    nodata: -3000\n", "    nodata: -3000\n    scale: 0.001\n")
    problem = only(problems(tmp_path, text), "layers.ndvi.scale")
    assert problem.line == 13
    assert "appears twice" in problem.message
    assert "first on line 11" in problem.message


def test_wrong_version(tmp_path):
    problem = only(problems(tmp_path, variant("version: 1\n", "version: 2\n")), "version")
    assert problem.line == 1
    assert "unsupported recipe version 2" in problem.message
    assert "version: 1" in problem.message


def test_every_problem_is_reported_together_in_file_order(tmp_path):
    text = (
        BASE.replace("  id: village_id\n", "  id: 12\n")
        .replace("    scale: 0.0001\n", "    scael: 0.0001\n")
        .replace("  - layer: ndvi\n", "  - layer: ndiv\n")
        .replace("    stats: [share]\n", "    stats: [share, meen]\n")
        .replace("  table: out/villages_covariates.csv\n", "  table: out/villages.xlsx\n")
    )
    with pytest.raises(RecipeError) as info:
        load_text(tmp_path, text)
    found = info.value.problems
    assert [(p.key, p.line) for p in found] == [
        ("study.id", 4),
        ("layers.ndvi.scael", 11),
        ("covariates[0].layer", 18),
        ("covariates[1].stats[1]", 21),
        ("output.table", 23),
    ]
    assert str(info.value).startswith("5 problems in the recipe:")
    for p in found:
        assert f"recipe.yaml:{p.line} {p.key}: " in str(info.value)


def test_mapping_input_problems_have_keys_but_no_file_or_line():
    data = {
        "version": 1,
        "study": {"table": "villages.gpkg", "id": "village_id"},
        "layers": {"ndvi": {"file": "ndvi.tif"}},
        "covariates": [{"layer": "ndvi", "stats": ["mean", "meen"]}],
        "output": {"table": "out.csv"},
    }
    with pytest.raises(RecipeError) as info:
        load_recipe(data)
    (problem,) = info.value.problems
    assert problem.key == "covariates[0].stats[1]"
    assert problem.file is None and problem.line is None
    assert "did you mean 'mean'?" in problem.message
    assert str(problem).startswith("covariates[0].stats[1]: unknown statistic 'meen'")


# ---- buffer_m: one check (covextract.core.options.parse_buffer) for every caller


def test_buffer_above_the_limit_is_a_recipe_problem(tmp_path):
    problem = only(
        problems(tmp_path, variant("buffer_m: 2000", "buffer_m: 2000000")), "units.buffer_m"
    )
    assert problem.line == 7
    assert problem.message == (
        "a buffer radius of 2e+06 m is above the limit of 1e+06 m; the radius is in "
        "metres: 2 km is 2000"
    )


def test_buffer_yes_no_value_on_a_covariate(tmp_path):
    text = variant("    stats: [mean, std]\n", "    stats: [mean, std]\n    buffer_m: yes\n")
    problem = only(problems(tmp_path, text), "covariates[0].buffer_m")
    assert problem.line == 20
    assert problem.message.startswith(
        "expected a buffer radius in metres (a number > 0) or {column: <column of radii in "
        "metres>}, got true (a yes/no value"
    )


def test_buffer_column_with_a_misspelt_key(tmp_path):
    problem = only(
        problems(tmp_path, variant("buffer_m: 2000", "buffer_m: {colum: radius_m}")),
        "units.buffer_m.colum",
    )
    assert problem.line == 7
    assert "did you mean 'column' (required here)?" in problem.message
