"""Reliability catalogue: recipes that are malformed, hostile or oversized.

Each case asserts the exact message, exit code 1, no traceback and no file
changed (see ``conftest.py``). The bounded-loading cases also assert that
the refusal is fast: a recipe must never make ``check`` hang.
"""

from __future__ import annotations

import os
import time

import pytest


def _check(scenario, message, **kw):
    return scenario.expect(["check", scenario.recipe], code=1, message=message, **kw)


def test_yaml_syntax_error(scenario):
    scenario.write_recipe(text="version: 1\nstudy: [unclosed\n")
    _check(scenario, "case.yaml:3: the recipe is not valid YAML: ")


def test_unknown_key(scenario):
    scenario.data["units"]["bufer_m"] = scenario.data["units"].pop("buffer_m")
    scenario.write_recipe()
    _check(scenario, "units.bufer_m: unknown key 'bufer_m'; did you mean 'buffer_m'?")


def test_study_that_is_text(scenario):
    scenario.edit_recipe(study="villages.csv")
    _check(
        scenario,
        "study: expected a block of key: value lines (or {key: value, ...}), got "
        "'villages.csv' (text)",
    )


def test_stats_that_is_text(scenario):
    scenario.data["covariates"][0]["stats"] = "mean"
    scenario.write_recipe()
    _check(
        scenario,
        "covariates[0].stats: expected a list, got 'mean' (text); write [mean] for a list of one",
    )


def test_layers_that_is_a_list(scenario):
    scenario.edit_recipe(layers=["ndvi"])
    _check(scenario, "layers: expected a block of key: value lines")


def test_classes_that_is_text_on_a_layer_used_with_since(scenario):
    scenario.data["layers"]["cover_2015"]["classes"] = "11: cropland"
    scenario.write_recipe()
    result = _check(
        scenario,
        "layers.cover_2015.classes: expected a block of key: value lines (or {key: value, "
        "...}), got '11: cropland' (text)",
    )
    assert "1 problem(s) found" in result.stdout + (result.stderr or "")


def test_groups_that_is_a_list(scenario):
    scenario.data["layers"]["cover_2021"]["groups"] = [12, 21]
    scenario.write_recipe()
    _check(
        scenario,
        "layers.cover_2021.groups: expected a block of key: value lines (or {key: value, "
        "...}), got a list",
    )


def test_python_yaml_tag(scenario):
    scenario.write_recipe(text="version: 1\nstudy: !!python/object:os.system [ls]\n")
    _check(
        scenario,
        "case.yaml:2: the YAML tag '!!python/object:os.system' is not allowed in a recipe "
        "(a recipe holds only plain text, numbers, yes/no, lists and blocks); remove the tag",
    )


ALIAS_BOMB = "a: &a [x, x, x, x, x, x, x, x, x]\n" + "".join(
    f"{chr(98 + i)}: &{chr(98 + i)} [" + ", ".join(["*" + chr(97 + i)] * 9) + "]\n"
    for i in range(8)
)


def test_alias_bomb_is_refused_fast(scenario):
    assert len(ALIAS_BOMB) < 700  # nine levels, nine-way: 387 million values expanded
    scenario.write_recipe(text=ALIAS_BOMB)
    start = time.perf_counter()
    _check(
        scenario,
        "case.yaml:2: YAML aliases (*name) make this recipe expand to more than 100,000 "
        "values (the first alias is on this line); write the values out, or use fewer aliases",
    )
    assert time.perf_counter() - start < 1.0


def test_alias_inside_its_own_anchor(scenario):
    scenario.write_recipe(text="version: 1\nstudy: &s {table: *s}\n")
    _check(
        scenario,
        "case.yaml:2: a YAML alias (*name) sits inside its own anchor (&name), which would "
        "repeat without end; write the value out",
    )


def test_five_megabyte_comment_is_refused_fast(scenario):
    text = scenario.recipe.read_text(encoding="utf-8") + "#" + "x" * 5_000_000 + "\n"
    scenario.write_recipe(text=text)
    size = len(text.encode("utf-8"))
    start = time.perf_counter()
    _check(
        scenario,
        f"the recipe file is {size / 1e6:.1f} MB ({size:,} bytes); a recipe may hold at most "
        "1.0 MB (1,000,000 bytes)",
    )
    assert time.perf_counter() - start < 1.0


def test_five_megabyte_list_of_statistics_is_refused_fast(scenario):
    scenario.data["covariates"][0]["stats"] = ["mean"] * 800_000
    scenario.write_recipe()
    size = scenario.recipe.stat().st_size
    assert size > 5_000_000
    start = time.perf_counter()
    _check(
        scenario,
        f"the recipe file is {size / 1e6:.1f} MB ({size:,} bytes); a recipe may hold at most "
        "1.0 MB (1,000,000 bytes): check that this is the recipe",
    )
    assert time.perf_counter() - start < 1.0


def test_long_list_of_statistics_under_the_size_limit(scenario):
    scenario.data["covariates"][0]["stats"] = ["mean"] * 5000
    scenario.write_recipe()
    _check(
        scenario,
        "covariates[0].stats: this list holds 5,000 entries; a recipe allows at most 100 here",
    )


def test_deep_brackets_are_refused_fast(scenario):
    scenario.write_recipe(text="version: 1\nstudy: " + "[" * 900_000 + "\n")
    start = time.perf_counter()
    _check(
        scenario,
        "case.yaml:2: the recipe nests deeper than 20 levels of blocks and lists; a recipe "
        "needs about six: check the brackets and indentation",
    )
    assert time.perf_counter() - start < 1.0


def test_control_character(scenario):
    scenario.write_recipe(text='version: 1\nstudy: {table: "a\x07b"}\n')
    _check(scenario, "case.yaml:2: the recipe holds a control character (0x0007)")


def test_impossible_date(scenario):
    scenario.write_recipe(text="version: 1\nstudy: {table: villages.csv, id: 2021-02-30}\n")
    _check(
        scenario,
        "case.yaml:2: '2021-02-30' cannot be read as a date (day is out of range for month); "
        "put it in quotes to mean text",
    )


def test_nul_character_in_a_path(scenario):
    scenario.data["study"]["table"] = "villages\x00.csv"
    scenario.write_recipe()
    _check(
        scenario,
        "study.table: the text holds a NUL character (\\0), which no name or path may hold; "
        "remove it",
    )


def test_symlinked_recipe_works(scenario):
    link = scenario.folder / "linked.yaml"
    link.symlink_to(scenario.recipe)
    scenario.expect(["check", link], code=0, message="")


def test_dangling_symlink_recipe(scenario):
    link = scenario.folder / "dangling.yaml"
    link.symlink_to(scenario.folder / "gone.yaml")
    scenario.expect(
        ["check", link],
        code=1,
        message=f"is a symbolic link to {scenario.folder / 'gone.yaml'}, which does not exist; "
        "point the link at the recipe or give the recipe's own path",
    )


def test_symlink_loop_recipe(scenario):
    a, b = scenario.folder / "a.yaml", scenario.folder / "b.yaml"
    a.symlink_to(b)
    b.symlink_to(a)
    result = scenario.expect(
        ["check", a],
        code=1,
        message="is a symbolic link loop (the links point at each other and never reach a "
        "file); give the path of the recipe file itself",
    )
    assert "does not exist" not in result.stdout + (result.stderr or "")
    assert "not found" not in result.stdout + (result.stderr or "")


BUFFER_MESSAGES = {
    "1e9": "units.buffer_m: expected a buffer radius in metres (a number > 0) or {column: "
    "<column of radii in metres>}, got '1e9' (text; YAML reads 1e9 as text: write 1.0e+9 "
    "or 1000000000 for a number)",
    "0": "units.buffer_m: a buffer radius must be more than 0 metres, got 0",
    "-500": "units.buffer_m: a buffer radius must be more than 0 metres, got -500",
    ".nan": "units.buffer_m: a buffer radius must be a finite number of metres",
    ".inf": "units.buffer_m: a buffer radius must be a finite number of metres",
    "yes": "units.buffer_m: expected a buffer radius in metres (a number > 0) or {column: "
    "<column of radii in metres>}, got true (a yes/no value",
}


@pytest.mark.parametrize("written", list(BUFFER_MESSAGES))
def test_bad_buffer(scenario, written):
    text = scenario.recipe.read_text(encoding="utf-8")
    assert "buffer_m: 2000\n" in text
    scenario.write_recipe(text=text.replace("buffer_m: 2000\n", f"buffer_m: {written}\n"))
    _check(scenario, BUFFER_MESSAGES[written])


def test_recipe_that_is_a_folder(scenario):
    os.mkdir(scenario.folder / "folder.yaml")
    scenario.expect(
        ["check", scenario.folder / "folder.yaml"],
        code=1,
        message="is a folder, not a recipe file; give the path of the recipe's .yaml file",
    )
