"""The written study table: the user's rows and cells untouched, new columns appended.

Runs go through :func:`covextract.run.run` on a copy of the invented demo
scenario (``demo_dir``) or on small tables written here.
"""

from __future__ import annotations

import csv
import io

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose

from covextract.errors import CovextractError, OutputError, RecipeError
from covextract.outputs.manifest import verify_manifest
from covextract.run import check_recipe, run


def read_text_csv(path) -> pd.DataFrame:
    return pd.read_csv(path, dtype=object, keep_default_na=False)


def csv_rows(path) -> list[list[str]]:
    with open(path, encoding="utf-8", newline="") as fh:
        return list(csv.reader(fh))


def temp_leftovers(folder) -> list[str]:
    return sorted(p.name for p in folder.rglob("*") if ".tmp" in p.name)


# -------------------------------------------------------------- rows and cells
def test_rows_order_ids_and_cells_of_the_demo_are_unchanged(demo_dir):
    result = run(demo_dir / "recipe.yaml")
    source = read_text_csv(demo_dir / "villages.csv")
    out = read_text_csv(result.outputs["table"])
    kept = [c for c in source.columns if c not in ("lat", "lon")]
    assert len(out) == len(source) == 40
    assert list(out.columns) == kept + result.columns
    assert list(out["village_id"]) == list(source["village_id"])
    pd.testing.assert_frame_equal(out[kept], source[kept])
    # The demo's own awkward cells: a note that reads "NA", quotes inside a cell.
    notes = dict(zip(out["village_id"], out["notes"], strict=True))
    assert notes["070"] == "NA"
    assert notes["029"] == 'headman said "about 40 compounds"'
    assert notes["081"] == "0012 households re-listed"


SPECIAL_ROWS = [
    # id,   lon,         lat,          visit,                        measure,               note
    ["007", "4.631062", "-11.696279", "2021-01-14", "0.12345678901234567", "NA"],
    ["0012", "5.316006", "-12.410372", "14/01/2021", "12345678901234567", ""],
    ["12", "5.188764", "-12.296539", "2021-01-31T08:30:00+01:00", "1e-7", "N/A"],
    ["A-01", "4.678176", "-12.280233", "", "-0.0", 'said "yes", then "no"'],
    ["000", "5.001440", "-11.736241", "2021-02-02", "+5", "  padded  "],
    ["0", "4.810862", "-11.756114", "31.12.2021", "3.14159265358979323", "null"],
]
SPECIAL_HEADER = ["village_id", "lon", "lat", "visit_date", "measure", "notes"]


@pytest.fixture
def special_table(demo_dir):
    """A CSV whose cells a spreadsheet or a careless parser would change."""
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(SPECIAL_HEADER)
    writer.writerows(SPECIAL_ROWS)
    path = demo_dir / "special.csv"
    path.write_text(buf.getvalue(), encoding="utf-8")
    return path


def test_leading_zeros_na_dates_and_long_decimals_survive(
    demo_dir, special_table, ndvi_recipe, write_recipe
):
    data = ndvi_recipe(output={"table": "out/special_out.csv"})
    data["study"]["table"] = "special.csv"
    del data["study"]["date"]  # the dates here are deliberately in mixed formats
    result = run(write_recipe(demo_dir, data, "special.yaml"))
    rows = csv_rows(result.outputs["table"])
    assert rows[0] == SPECIAL_HEADER + ["ndvi_mean", "ndvi_valid_share", "ndvi_qa"]
    # Cell by cell, as the csv module reads them: identical text.
    assert [r[: len(SPECIAL_HEADER)] for r in rows[1:]] == SPECIAL_ROWS
    # The same through pandas with every cell as text.
    out = read_text_csv(result.outputs["table"])
    source = read_text_csv(special_table)
    pd.testing.assert_frame_equal(out[SPECIAL_HEADER], source)
    assert list(out["village_id"]) == ["007", "0012", "12", "A-01", "000", "0"]
    # The rows sit at six demo villages: the values equal the demo run's (same
    # buffers on the same raster), so the table's text never leaked into the numbers.
    demo = run(demo_dir / "recipe.yaml", write=False).table
    expected = demo.set_index("village_id").loc[["003", "008", "010", "013", "016", "047"]]
    assert_allclose(
        out["ndvi_mean"].astype(float), expected["ndvi_mean"].astype(float), rtol=0, atol=0
    )


def test_drop_removes_columns_and_keeps_the_order_of_the_rest(demo_dir, ndvi_recipe, write_recipe):
    data = ndvi_recipe(output={"table": "out/shared.csv", "drop": ["lat", "village_name", "lon"]})
    result = run(write_recipe(demo_dir, data))
    header = csv_rows(result.outputs["table"])[0]
    assert header == [
        "village_id",
        "settlement",
        "buffer_radius_m",
        "visit_date",
        "households",
        "notes",
        "ndvi_mean",
        "ndvi_valid_share",
        "ndvi_qa",
    ]
    assert "lat" not in result.table.columns and "village_name" not in result.table.columns


def test_new_columns_are_numbers_in_python_and_shortest_text_in_csv(
    demo_dir, ndvi_recipe, write_recipe
):
    result = run(write_recipe(demo_dir, ndvi_recipe()))
    assert result.table["ndvi_mean"].dtype == np.float64
    assert result.table["ndvi_valid_share"].dtype == np.float64
    text = read_text_csv(result.outputs["table"])
    for col in ("ndvi_mean", "ndvi_valid_share"):
        expected = [repr(float(v)) for v in result.table[col]]
        assert list(text[col]) == expected


# --------------------------------------------------------------------- formats
def test_parquet_output_keeps_text_cells_and_numeric_covariates(
    demo_dir, ndvi_recipe, write_recipe
):
    csv_result = run(write_recipe(demo_dir, ndvi_recipe(), "as_csv.yaml"))
    data = ndvi_recipe(output={"table": "out/table.parquet", "drop": ["lat", "lon"]})
    result = run(write_recipe(demo_dir, data, "as_parquet.yaml"))
    assert result.outputs["table"].suffix == ".parquet"
    got = pd.read_parquet(result.outputs["table"])
    source = read_text_csv(demo_dir / "villages.csv").drop(columns=["lat", "lon"])
    assert list(got.columns) == list(source.columns) + ["ndvi_mean", "ndvi_valid_share", "ndvi_qa"]
    for col in source.columns:
        assert [str(v) for v in got[col]] == list(source[col]), col
    assert got["ndvi_mean"].dtype == np.float64
    csv_text = read_text_csv(csv_result.outputs["table"])
    # Shortest round-trip text in the CSV reads back as the very same float.
    assert_allclose(got["ndvi_mean"], csv_text["ndvi_mean"].astype(float), rtol=0, atol=0)


def test_geopackage_output_from_a_point_table(demo_dir, ndvi_recipe, write_recipe):
    data = ndvi_recipe(output={"table": "out/villages.gpkg", "drop": []})
    result = run(write_recipe(demo_dir, data))
    gdf = gpd.read_file(result.outputs["table"])
    source = read_text_csv(demo_dir / "villages.csv")
    assert len(gdf) == 40
    assert gdf.crs.to_epsg() == 4326
    assert list(gdf["village_id"]) == list(source["village_id"])
    assert_allclose(gdf.geometry.x, source["lon"].astype(float), rtol=0, atol=1e-12)
    assert_allclose(gdf.geometry.y, source["lat"].astype(float), rtol=0, atol=1e-12)
    assert_allclose(gdf["ndvi_mean"], result.table["ndvi_mean"], rtol=0, atol=0)


def test_geopackage_without_the_coordinates_is_refused_before_anything_is_written(
    demo_dir, ndvi_recipe, write_recipe, folder_snapshot
):
    path = write_recipe(
        demo_dir, ndvi_recipe(output={"table": "out/villages.gpkg", "drop": ["lat", "lon"]})
    )
    problems = [str(p) for p in check_recipe(path)]
    assert len(problems) == 1
    assert "output.table" in problems[0] and "GeoPackage" in problems[0]
    assert "lon, lat" in problems[0] and ".csv or .parquet" in problems[0]
    before = folder_snapshot(demo_dir)
    with pytest.raises(
        OutputError, match=r"output\.drop removes the coordinate column\(s\) lon, lat"
    ):
        run(path)
    assert folder_snapshot(demo_dir) == before


# ------------------------------------------------------------- reproducibility
@pytest.mark.parametrize("suffix", [".csv", ".parquet"])
def test_two_runs_give_byte_identical_tables(tmp_path, suffix, demo_recipe_data, write_recipe):
    from covextract.demo import lay_out_demo

    data = dict(demo_recipe_data, output={"table": f"out/table{suffix}", "drop": ["lat", "lon"]})
    first_dir, second_dir = lay_out_demo(tmp_path / "a"), lay_out_demo(tmp_path / "b")
    first = run(write_recipe(first_dir, data))
    bytes_first = first.outputs["table"].read_bytes()
    again = run(write_recipe(first_dir, data))  # weights now come from the cache
    assert again.summary["weights_from_cache"] == 8
    assert again.outputs["table"].read_bytes() == bytes_first
    elsewhere = run(write_recipe(second_dir, data))  # another folder, weights built afresh
    assert elsewhere.summary["weights_built"] == 4
    assert elsewhere.outputs["table"].read_bytes() == bytes_first


# ------------------------------------------------------- never over the input
@pytest.mark.parametrize("target", ["villages.csv", "../demo/villages.csv"])
def test_output_over_the_input_is_refused_and_nothing_is_written(
    demo_dir, ndvi_recipe, write_recipe, folder_snapshot, target
):
    # "villages.csv" is caught by the recipe schema (same text); "../demo/villages.csv"
    # names the same file differently and is caught when the plan resolves paths.
    path = write_recipe(demo_dir, ndvi_recipe(output={"table": target}))
    original = (demo_dir / "villages.csv").read_bytes()
    problems = [str(p) for p in check_recipe(path)]
    assert len(problems) == 1 and "output.table" in problems[0]
    assert "never" in problems[0] and ("input" in problems[0] or "study table" in problems[0])
    before = folder_snapshot(demo_dir)
    with pytest.raises((RecipeError, OutputError)) as info:
        run(path)
    assert isinstance(info.value, CovextractError)
    assert "output.table" in str(info.value)
    assert (demo_dir / "villages.csv").read_bytes() == original
    assert folder_snapshot(demo_dir) == before


# ------------------------------------------------------------------- atomicity
def test_writes_leave_no_temporary_files(demo_dir):
    result = run(demo_dir / "recipe.yaml")
    assert temp_leftovers(demo_dir) == []
    assert sorted(p.name for p in (demo_dir / "out").iterdir()) == sorted(
        p.name for p in result.outputs.values()
    )


def test_an_interrupted_write_leaves_the_previous_outputs_intact(demo_dir, monkeypatch):
    first = run(demo_dir / "recipe.yaml")
    table_bytes = first.outputs["table"].read_bytes()
    manifest_bytes = first.outputs["manifest"].read_bytes()

    def broken_to_csv(self, path, *args, **kwargs):
        with open(path, "w", encoding="utf-8") as fh:
            fh.write("village_id,ndvi_me")  # half a header, then the disk "fails"
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(pd.DataFrame, "to_csv", broken_to_csv)
    with pytest.raises(OSError, match="No space left"):
        run(demo_dir / "recipe.yaml")
    assert first.outputs["table"].read_bytes() == table_bytes
    assert first.outputs["manifest"].read_bytes() == manifest_bytes
    assert temp_leftovers(demo_dir) == []
    assert verify_manifest(first.outputs["manifest"], base_dir=demo_dir) == []
