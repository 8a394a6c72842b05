"""A renamed key is reported as renamed, at its file and line, not as an unknown key.

No key has been renamed in recipe version 1, so these tests put entries in
``RENAMED_KEYS`` for the time of one test.
"""

from __future__ import annotations

import pytest

from covextract.errors import RecipeError
from covextract.recipe import load_recipe
from covextract.recipe import renamed as renamed_module

RECIPE = """\
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
covariates:
  - layer: ndvi
    stats: [mean]
    pixel_rule: center
output:
  table: out/villages_covariates.csv
"""
# Line 14 holds the old key pixel_rule of the first covariate.


def problems_of(tmp_path, text: str) -> list:
    path = tmp_path / "recipe.yaml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(RecipeError) as info:
        load_recipe(path)
    return info.value.problems


def test_no_key_is_renamed_in_version_1():
    assert renamed_module.RENAMED_KEYS == {}


def test_unknown_key_without_a_rename_keeps_the_did_you_mean(tmp_path):
    (problem,) = problems_of(tmp_path, RECIPE)
    assert problem.line == 14
    assert problem.message.startswith("unknown key 'pixel_rule'; did you mean 'pixels'?")


def test_renamed_key_names_the_new_key_with_file_and_line(tmp_path, monkeypatch):
    monkeypatch.setitem(renamed_module.RENAMED_KEYS, "Covariate", {"pixel_rule": "pixels"})
    (problem,) = problems_of(tmp_path, RECIPE)
    assert problem.key == "covariates[0].pixel_rule"
    assert problem.line == 14
    assert problem.message == ("key 'pixel_rule' was renamed to 'pixels'; rename it in your recipe")
    assert str(problem) == (
        f"{tmp_path / 'recipe.yaml'}:14 covariates[0].pixel_rule: key 'pixel_rule' was "
        "renamed to 'pixels'; rename it in your recipe"
    )


def test_renamed_required_key_is_one_problem_not_two(tmp_path, monkeypatch):
    monkeypatch.setitem(renamed_module.RENAMED_KEYS, "Study", {"id_column": "id"})
    text = RECIPE.replace("  id: village_id\n", "  id_column: village_id\n")
    text = text.replace("    pixel_rule: center\n", "")
    (problem,) = problems_of(tmp_path, text)
    assert problem.key == "study.id_column"
    assert problem.line == 4
    assert problem.message == "key 'id_column' was renamed to 'id'; rename it in your recipe"


def test_rename_applies_only_in_its_own_block(tmp_path, monkeypatch):
    monkeypatch.setitem(renamed_module.RENAMED_KEYS, "Layer", {"pixel_rule": "band"})
    (problem,) = problems_of(tmp_path, RECIPE)
    assert problem.message.startswith("unknown key 'pixel_rule'")


def test_rename_to_a_key_that_does_not_exist_is_ignored(tmp_path, monkeypatch):
    monkeypatch.setitem(renamed_module.RENAMED_KEYS, "Covariate", {"pixel_rule": "pixel_mode"})
    (problem,) = problems_of(tmp_path, RECIPE)
    assert problem.message.startswith("unknown key 'pixel_rule'")
    assert "did you mean 'pixels'? Allowed here: layer, stats, pixels," in problem.message
