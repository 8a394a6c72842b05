"""Every bad input, end to end: the message names the problem and the place; nothing is written.

Each error case builds one broken scenario in a copy of the invented demo and
checks three doors into it: :func:`covextract.run.run` raises the named
error class, :func:`covextract.run.check_recipe` lists the problem with
the recipe file, line and key, and the CLI (``run`` and ``check``) exits with
1 and prints the message on stderr without a traceback. No case may write a
file. Inputs that are suspect but usable (points at (0, 0), units off a layer,
invalid polygons) warn, get a QA code and missing values, and do not fail.
"""

from __future__ import annotations

import csv
import dataclasses
import re
from collections.abc import Callable
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
import shapely
import yaml
from affine import Affine
from typer.testing import CliRunner

from covextract.cli.app import app
from covextract.covariates.naming import ordinal
from covextract.errors import (
    ColumnCollisionError,
    GeometryRepairedWarning,
    InputFileError,
    OutputError,
    RasterError,
    RecipeError,
    SuspectLocationWarning,
    TableError,
    UnitOutsideLayerWarning,
    UnknownClassWarning,
)
from covextract.run import check_recipe, run

runner = CliRunner()


class Scenario:
    """Builds broken inputs in a copy of the demo folder."""

    def __init__(self, folder: Path, ndvi_recipe, write_recipe, make_raster):
        self.folder = folder
        self._recipe = ndvi_recipe
        self._write = write_recipe
        self._raster = make_raster

    def recipe(self, **changes) -> dict:
        return self._recipe(**changes)

    def write(self, data: dict, name: str = "test_recipe.yaml") -> Path:
        return self._write(self.folder, data, name)

    def text(self, text: str, name: str = "test_recipe.yaml") -> Path:
        path = self.folder / name
        path.write_text(text, encoding="utf-8")
        return path

    def table(
        self, name: str, rows: list[str], header: str = "village_id,lon,lat,visit_date"
    ) -> str:
        (self.folder / name).write_text(header + "\n" + "\n".join(rows) + "\n", encoding="utf-8")
        return name

    def with_table(self, name: str, rows: list[str], **kw) -> Path:
        data = self.recipe()
        data["study"]["table"] = self.table(name, rows, **kw)
        return self.write(data)

    def with_layer_file(self, file: str) -> Path:
        data = self.recipe()
        data["layers"]["ndvi"]["file"] = file
        return self.write(data)

    def raster(self, name: str, **kw) -> Path:
        data = np.arange(16, dtype=np.int16).reshape(4, 4)
        return self._raster(self.folder / name, data, Affine(0.01, 0, 4.6, 0, -0.01, -11.6), **kw)


@pytest.fixture
def scenario(demo_dir, ndvi_recipe, write_recipe, make_raster):
    return Scenario(demo_dir, ndvi_recipe, write_recipe, make_raster)


def line_of(path: Path, snippet: str, occurrence: int = 1) -> int:
    """1-based line of the ``occurrence``-th line of ``path`` holding ``snippet``."""
    found = 0
    for i, line in enumerate(path.read_text(encoding="utf-8").splitlines(), start=1):
        if snippet in line:
            found += 1
            if found == occurrence:
                return i
    raise AssertionError(f"{snippet!r} not {occurrence} times in {path}")


def ndvi_text(scenario: Scenario) -> str:
    """The NDVI recipe as YAML text, one key per line (edited by the YAML cases)."""
    return yaml.safe_dump(scenario.recipe(), sort_keys=False)


# ------------------------------------------------------------------ the cases
@dataclasses.dataclass
class Case:
    build: Callable[[Scenario], Path]
    error: type
    phrases: list[str]  # each must be in every message; "{folder}" is the demo folder
    key: str | None = None  # key the check problem names
    line_snippet: str | None = None  # text of the recipe line the problem points at


def _yaml_syntax(s: Scenario) -> Path:
    return s.text(ndvi_text(s).replace("  scale: 0.0001\n", "  scale: 0.0001: 2\n"))


def _unknown_key(s: Scenario) -> Path:
    return s.text(ndvi_text(s).replace("  scale: 0.0001\n", "  scal: 0.0001\n"))


def _wrong_type(s: Scenario) -> Path:
    text = ndvi_text(s).replace("  kind: continuous\n", "  kind: continuous\n    band: '1'\n")
    return s.text(text)


def _unreadable(s: Scenario) -> Path:
    (s.folder / "broken.tif").write_text("not a raster, just text\n", encoding="utf-8")
    return s.with_layer_file("broken.tif")


def _no_crs(s: Scenario) -> Path:
    s.raster("no_crs.tif", crs=None)
    return s.with_layer_file("no_crs.tif")


def _no_coordinate_columns(s: Scenario) -> Path:
    data = s.recipe()
    data["study"]["points"] = {"x": "long", "y": "lat", "crs": "EPSG:4326"}
    return s.write(data)


def _output_over_input(s: Scenario) -> Path:
    return s.write(s.recipe(output={"table": "../demo/villages.csv"}))


def _collides_with_table(s: Scenario) -> Path:
    return s.with_table(
        "with_ndvi.csv",
        ["001,4.631062,-11.696279,2021-01-14,0.5"],
        header="village_id,lon,lat,visit_date,ndvi_mean",
    )


def _two_covariates_collide(s: Scenario) -> Path:
    return s.write(
        s.recipe(
            covariates=[
                {"layer": "ndvi", "stats": ["mean"]},
                {"layer": "ndvi", "stats": ["mean", "std"], "buffer_m": 5000},
            ]
        )
    )


def _name_too_long(s: Scenario) -> Path:
    # The third entry (covariates[2]) has a name that makes a 38-character column.
    return s.write(
        s.recipe(
            covariates=[
                {"layer": "ndvi", "stats": ["mean"]},
                {"layer": "ndvi", "name": "ndvi_5km", "stats": ["mean"], "buffer_m": 5000},
                {"layer": "ndvi", "name": "ndvi_greenness_2021_buffer", "stats": ["valid_share"]},
            ]
        )
    )


CASES = {
    "recipe file missing": Case(
        lambda s: s.folder / "no_such_recipe.yaml",
        InputFileError,
        ["recipe file not found", "{folder}/no_such_recipe.yaml", "check the path"],
    ),
    "YAML syntax error": Case(
        _yaml_syntax,
        RecipeError,
        ["not valid YAML", "mapping values are not allowed here"],
        line_snippet="scale: 0.0001: 2",
    ),
    "unknown key": Case(
        _unknown_key,
        RecipeError,
        ["unknown key 'scal'", "did you mean 'scale'?"],
        key="layers.ndvi.scal",
        line_snippet="scal: 0.0001",
    ),
    "wrong type": Case(
        _wrong_type,
        RecipeError,
        ["expected a whole number, got '1' (text)"],
        key="layers.ndvi.band",
        line_snippet="band: '1'",
    ),
    "raster file missing": Case(
        lambda s: s.with_layer_file("ndvi_2020.tif"),
        InputFileError,
        ["raster of layer 'ndvi' not found", "{folder}/ndvi_2020.tif", "relative to the recipe"],
        key="layers.ndvi.file",
        line_snippet="file: ndvi_2020.tif",
    ),
    "raster unreadable": Case(
        _unreadable,
        InputFileError,
        ["raster of layer 'ndvi'", "{folder}/broken.tif", "cannot be opened as a raster"],
        key="layers.ndvi.file",
        line_snippet="file: broken.tif",
    ),
    "raster without CRS": Case(
        _no_crs,
        RasterError,
        ["{folder}/no_crs.tif has no CRS", 'crs: "EPSG:4326"'],
        key="layers.ndvi.file",
        line_snippet="file: no_crs.tif",
    ),
    "coordinate columns missing": Case(
        _no_coordinate_columns,
        TableError,
        ["coordinate column 'long' (study.points.x) is not in villages.csv", "Did you mean 'lon'?"],
    ),
    "coordinates out of range": Case(
        lambda s: s.with_table(
            "far.csv", ["001,4.631062,-11.696279,2021-01-14", "002,200.5,-11.7,2021-01-14"]
        ),
        TableError,
        [
            "outside the range",
            "longitude -180..180, latitude -90..90",
            "row 2 (id '002')",
            "longitude out of range",  # named by row and id, never by its coordinates
            "far.csv",
        ],
    ),
    "coordinates swapped": Case(
        lambda s: s.with_table(
            "swapped.csv", ["001,4.631062,-11.696279,2021-01-14", "002,-8.2,120.5,2021-01-14"]
        ),
        TableError,
        [
            "outside the range",
            "row 2 (id '002')",
            "x and y look swapped",
            "swap study.points.x and study.points.y",
        ],
    ),
    "duplicate ids": Case(
        lambda s: s.with_table(
            "dups.csv",
            [
                "001,4.631062,-11.696279,2021-01-14",
                "002,5.316006,-12.410372,2021-01-14",
                "001,5.188764,-12.296539,2021-01-14",
            ],
        ),
        TableError,
        ["occur more than once", "'001' (rows 1, 3)", "dups.csv", "unique"],
    ),
    "missing ids": Case(
        lambda s: s.with_table(
            "gaps.csv", ["001,4.631062,-11.696279,2021-01-14", ",5.316006,-12.410372,2021-01-14"]
        ),
        TableError,
        ["have no id in column 'village_id'", "row 2", "gaps.csv"],
    ),
    "output over input": Case(
        _output_over_input,
        OutputError,
        ["output.table is villages.csv, the study table (an input)", "never writes over an input"],
        key="output.table",
        line_snippet="table: ../demo/villages.csv",
    ),
    "covariate column in the table": Case(
        _collides_with_table,
        ColumnCollisionError,
        [
            "the 1st covariate (layer 'ndvi') would write column 'ndvi_mean', which the study "
            "table already has",
            "Add name:",
        ],
        key="covariates[0]",
    ),
    "two covariates collide": Case(
        _two_covariates_collide,
        ColumnCollisionError,
        [
            "the 2nd covariate (layer 'ndvi') would write column 'ndvi_mean', which the 1st "
            "covariate already writes",
            "Add a distinct name: to the 2nd covariate (for example name: ndvi_2)",
        ],
        key="covariates[1]",
    ),
    "name makes a column too long": Case(
        _name_too_long,
        RecipeError,
        [
            "the 3rd covariate (layer 'ndvi'): column 'ndvi_greenness_2021_buffer_valid_share' "
            "is 38 characters long",
            "shorten its name: to at most 20 characters",
        ],
        key="covariates[2].name",
    ),
}


def _phrases(case: Case, scenario: Scenario) -> list[str]:
    return [p.replace("{folder}", str(scenario.folder)) for p in case.phrases]


@pytest.fixture(params=list(CASES), ids=list(CASES))
def case(request, scenario):
    c = CASES[request.param]
    return c, c.build(scenario)


def test_run_raises_the_named_error(case, scenario, folder_snapshot):
    c, path = case
    before = folder_snapshot(scenario.folder)
    with pytest.raises(c.error) as info:
        run(path)
    message = str(info.value)
    for phrase in _phrases(c, scenario):
        assert phrase in message
    if c.line_snippet is not None and c.error is RecipeError:
        line = line_of(path, c.line_snippet)
        assert re.search(re.escape(f"{path}:{line}") + "[ :]", message)
        if "YAML" in c.phrases[0]:
            assert f"at line {line}, column " in message
    assert folder_snapshot(scenario.folder) == before


def test_check_lists_the_problem_with_file_line_and_key(case, scenario):
    c, path = case
    if not path.exists():
        # Without a recipe there is nothing to list: check_recipe raises, as run does.
        with pytest.raises(c.error) as info:
            check_recipe(path)
        assert all(phrase in str(info.value) for phrase in _phrases(c, scenario))
        return
    problems = check_recipe(path)
    assert len(problems) == 1, [str(p) for p in problems]
    text = str(problems[0])
    for phrase in _phrases(c, scenario):
        assert phrase in text
    assert problems[0].file == str(path)
    if c.key is not None:
        assert problems[0].key == c.key
    entry = re.match(r"covariates\[(\d+)\]", c.key or "")
    if entry is not None:
        # The key is the YAML path, counted from 0; the words count from 1, as
        # ordinals, and name the entry the key points at first.
        n = int(entry.group(1)) + 1
        assert text.startswith(
            f"{path}:{problems[0].line} {c.key}: the {ordinal(n)} covariate (layer "
        ), text
        assert not re.search(r"\bcovariates? \d", text), text
    if c.line_snippet is not None:
        assert problems[0].line == line_of(path, c.line_snippet)
        assert re.match(re.escape(f"{path}:{problems[0].line}") + "[ :]", text)


@pytest.mark.parametrize("command", ["run", "check"])
def test_cli_exits_1_with_the_message_on_stderr(case, scenario, folder_snapshot, command):
    c, path = case
    before = folder_snapshot(scenario.folder)
    result = runner.invoke(app, [command, str(path)])
    assert result.exit_code == 1, result.output
    # Messages are wrapped by nothing: each phrase appears verbatim on stderr.
    for phrase in _phrases(c, scenario):
        assert phrase in result.stderr
    assert "Traceback" not in result.output
    assert result.stdout == ""
    assert folder_snapshot(scenario.folder) == before


def test_ordinals_count_entries_from_one():
    words = [ordinal(n) for n in (1, 2, 3, 4, 10, 11, 12, 13, 21, 22, 23, 101, 111, 112)]
    assert words == [
        "1st", "2nd", "3rd", "4th", "10th", "11th", "12th", "13th",
        "21st", "22nd", "23rd", "101st", "111th", "112th",
    ]  # fmt: skip


# ------------------------------------------------- several problems at once
def test_check_lists_every_problem_not_only_the_first(scenario):
    scenario.raster("no_crs.tif", crs=None)
    data = scenario.recipe()
    data["layers"]["ndvi"]["file"] = "ndvi_2020.tif"
    data["layers"]["lights"] = {"file": "no_crs.tif", "unit": "nW/cm2/sr"}
    data["covariates"] += [
        {"layer": "lights", "stats": ["mean"]},
        {"layer": "ndvi", "stats": ["mean"], "buffer_m": 5000},
    ]
    data["output"]["drop"] = ["lat", "lon", "elevation"]
    path = scenario.write(data)
    problems = check_recipe(path)
    found = {p.key: str(p) for p in problems}
    assert set(found) == {"output.drop", "layers.ndvi.file", "layers.lights.file", "covariates[2]"}
    assert "column 'elevation' is not in the study table" in found["output.drop"]
    assert "not found" in found["layers.ndvi.file"]
    assert "has no CRS" in found["layers.lights.file"]
    assert found["covariates[2]"].startswith(
        f"{path}:{line_of(path, '- layer: ndvi', occurrence=2)} covariates[2]: the 3rd covariate "
        "(layer 'ndvi') would write column 'ndvi_mean', which the 1st covariate already writes"
    )
    lines = {p.key: p.line for p in problems}
    assert lines == {
        "output.drop": line_of(path, "drop:"),
        "layers.ndvi.file": line_of(path, "file: ndvi_2020.tif"),
        "layers.lights.file": line_of(path, "file: no_crs.tif"),
        "covariates[2]": line_of(path, "- layer: ndvi", occurrence=2),
    }
    result = runner.invoke(app, ["check", str(path)])
    assert result.exit_code == 1
    assert f"4 problem(s) found in {path}:" in result.stderr
    for text in found.values():
        assert f"  - {text}" in result.stderr
    assert "Traceback" not in result.output


def test_schema_problems_are_listed_together(scenario):
    text = ndvi_text(scenario)
    text = text.replace("  scale: 0.0001\n", "  scal: 0.0001\n")
    text = text.replace("buffer_m: 2000", "buffer_m: -5")
    text = text.replace("  - valid_share\n", "  - valid_shares\n")
    path = scenario.text(text)
    problems = check_recipe(path)
    keys = [p.key for p in problems]
    assert keys == ["units.buffer_m", "layers.ndvi.scal", "covariates[0].stats[1]"]
    assert "more than 0 metres, got -5" in str(problems[0])
    assert "did you mean 'valid_share'?" in str(problems[2])
    result = runner.invoke(app, ["run", str(path)])
    assert result.exit_code == 1
    assert "3 problems in the recipe:" in result.stderr


def test_debug_shows_the_traceback(scenario):
    path = scenario.with_layer_file("ndvi_2020.tif")
    result = runner.invoke(app, ["run", "--debug", str(path)])
    assert result.exit_code == 1
    assert "Traceback" in result.stderr
    assert "InputFileError" in result.stderr
    assert "raster of layer 'ndvi' not found" in result.stderr


# ------------------------------------ usable but suspect: warn, QA, no values
def read_out(path) -> pd.DataFrame:
    return pd.read_csv(path, dtype=object, keep_default_na=False).set_index("village_id")


def test_points_at_zero_or_sentinel_warn_and_get_a_qa_code(scenario):
    path = scenario.with_table(
        "suspect.csv",
        [
            "001,4.631062,-11.696279,2021-01-14",
            "002,0,0,2021-01-14",
            "003,5.1,999,2021-01-14",
            "004,-999,-999,2021-01-14",
            "005,,,2021-01-14",
        ],
    )
    with pytest.warns(SuspectLocationWarning) as record:
        result = run(path)
    assert len(record) == 1
    message = str(record[0].message)
    assert "3 record(s) of suspect.csv sit at (0, 0) or at a sentinel value" in message
    # Records are named by row and id; the sentinel is named, the other coordinate is not.
    assert "row 2 (id '002'): at (0, 0)" in message and "row 3 (id '003'): y is 999" in message
    assert "5.1" not in message
    assert record[0].filename == __file__  # stacklevel points at the caller of run
    out = read_out(result.outputs["table"])
    assert out.loc["001", "ndvi_qa"] == ""
    assert float(out.loc["001", "ndvi_mean"]) > 0
    for uid in ("002", "003", "004"):
        assert out.loc[uid, "ndvi_qa"] == "suspect_location"
        assert out.loc[uid, "ndvi_mean"] == ""
    assert out.loc["005", "ndvi_qa"] == "no_location"
    assert out.loc["005", "ndvi_mean"] == ""
    assert result.summary["qa_counts"] == {"suspect_location": 3, "no_location": 1}


def test_a_unit_outside_a_layer_warns_and_gets_missing_values(scenario):
    # Village 002 lies 15 degrees east of every demo raster.
    data = scenario.recipe()
    data["study"]["table"] = scenario.table(
        "outside.csv",
        [
            "001,4.631062,-11.696279,2021-01-14",
            "002,20.0,-12.0,2021-01-14",
        ],
    )
    path = scenario.write(data)
    assert check_recipe(path) == []  # not an error: the other units are fine
    with pytest.warns(UnitOutsideLayerWarning) as record:
        result = run(path)
    assert [str(w.message) for w in record] == [
        "1 of 2 units lie wholly outside layer 'ndvi'; their ndvi values are missing "
        "(QA code outside_layer)"
    ]
    assert record[0].filename == __file__
    out = read_out(result.outputs["table"])
    assert out.loc["002", "ndvi_qa"] == "outside_layer"
    assert out.loc["002", "ndvi_mean"] == ""
    # count 0 and valid_share 0 for a unit without valid pixels; other statistics missing
    assert float(out.loc["002", "ndvi_valid_share"]) == 0.0
    assert out.loc["001", "ndvi_qa"] == ""
    assert np.isfinite(float(out.loc["001", "ndvi_mean"]))


def test_every_unit_outside_a_layer_is_a_check_problem(scenario):
    scenario.raster("elsewhere.tif", crs="EPSG:4326")  # 4 x 4 pixels near 4.6E 11.6S
    data = scenario.recipe()
    data["layers"]["ndvi"]["file"] = "elsewhere.tif"
    data["study"]["table"] = scenario.table("far_east.csv", ["001,20.0,-12.0,2021-01-14"])
    path = scenario.write(data)
    problems = check_recipe(path)
    assert len(problems) == 1
    assert problems[0].key == "covariates[0].layer"
    assert "no unit overlaps layer 'ndvi'" in str(problems[0])
    assert "EPSG:4326" in str(problems[0])


def test_empty_and_invalid_boundaries_are_repaired_or_flagged(scenario):
    areas = gpd.read_file(scenario.folder / "village_areas.gpkg")
    repaired_id, empty_id = areas["village_id"].iloc[0], areas["village_id"].iloc[1]
    c = areas.geometry.iloc[0].centroid
    # A bow-tie: its two triangles touch at the centre, so make_valid keeps both.
    bow = shapely.Polygon(
        [
            (c.x - 0.01, c.y - 0.01),
            (c.x + 0.01, c.y + 0.01),
            (c.x + 0.01, c.y - 0.01),
            (c.x - 0.01, c.y + 0.01),
        ]
    )
    assert not bow.is_valid
    areas.loc[0, "geometry"] = bow
    areas.loc[1, "geometry"] = shapely.Polygon()
    areas.to_file(scenario.folder / "bad_areas.gpkg", layer="bad_areas")
    data = scenario.recipe()
    del data["study"]["points"]
    data["units"] = {"boundaries": {"file": "bad_areas.gpkg", "id": "village_id"}}
    data["output"]["drop"] = []
    path = scenario.write(data)
    with pytest.warns(GeometryRepairedWarning) as record:
        result = run(path)
    assert len(record) == 1
    message = str(record[0].message)
    assert "1 invalid polygon(s) in bad_areas.gpkg were repaired" in message
    assert f"(id '{repaired_id}')" in message
    out = read_out(result.outputs["table"])
    assert out.loc[repaired_id, "ndvi_qa"] == "geometry_repaired"
    assert np.isfinite(float(out.loc[repaired_id, "ndvi_mean"]))
    assert out.loc[empty_id, "ndvi_qa"] == "empty_geometry"
    assert out.loc[empty_id, "ndvi_mean"] == ""
    others = out.drop(index=[repaired_id, empty_id])
    assert (others["ndvi_qa"] == "").all()
    assert result.summary["qa_counts"] == {"geometry_repaired": 1, "empty_geometry": 1}


def test_unknown_classes_in_a_change_entry_name_no_column_it_does_not_write(scenario):
    # The demo maps hold codes 12, 31 and 51 too; this class table leaves them out. A change
    # entry writes no share_other column, so the warning must not point at one.
    data = scenario.recipe()
    classes = {11: "cropland", 21: "forest", 22: "scrub", 41: "built"}
    data["layers"] = {
        "cover_2021": {"file": "land_cover_2021.tif", "kind": "categorical", "classes": classes},
        "cover_2015": {"file": "land_cover_2015.tif", "kind": "categorical", "classes": classes},
    }
    data["covariates"] = [
        {
            "layer": "cover_2021",
            "name": "cover_change",
            "since": "cover_2015",
            "stats": ["transition"],
            "pairs": [["forest", "cropland"]],
        }
    ]
    path = scenario.write(data)
    with pytest.warns(UnknownClassWarning) as record:
        result = run(path, write=False)
    assert result.columns == ["cover_change_forest_to_cropland", "cover_change_qa"]
    messages = [str(w.message) for w in record if w.category is UnknownClassWarning]
    assert messages == [
        "layer 'cover_2021' holds codes not in its class table (12, 31, 51); they are counted "
        "as 'other'. Add them to classes: to name them."
    ]


def test_the_demo_itself_does_not_warn(demo_dir, recwarn):
    result = run(demo_dir / "recipe.yaml")
    assert [str(w.message) for w in recwarn.list] == []
    with open(result.outputs["table"], encoding="utf-8", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert all(row[c] == "" for row in rows for c in ("ndvi_qa", "surface_temp_qa", "lights_qa"))
    assert re.fullmatch(r"0\.\d+", rows[0]["ndvi_mean"])
