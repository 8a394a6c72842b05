"""Categorical covariates through a recipe: columns, codebook, unknown codes, grid checks."""

import numpy as np
import pytest
import rasterio
from affine import Affine
from numpy.testing import assert_allclose

from covextract.errors import UnknownClassWarning
from covextract.run import check_recipe, run

T = Affine(0.001, 0, 10.0, 0, -0.001, 1.0)  # lat/lon grid near the equator
CLASSES = {1: "cropland", 2: "forest", 3: "grassland", 4: "built"}


def _write(path, data, transform=T):
    with rasterio.open(
        path,
        "w",
        driver="GTiff",
        width=data.shape[1],
        height=data.shape[0],
        count=1,
        dtype=data.dtype,
        crs="EPSG:4326",
        transform=transform,
        nodata=0,
    ) as ds:
        ds.write(data, 1)


@pytest.fixture
def scene(tmp_path):
    early = np.full((100, 100), 2, dtype=np.uint8)  # all forest
    early[:, :50] = 1
    late = early.copy()
    late[40:60, 50:70] = 4  # forest -> built
    late[0:10, 0:10] = 7  # a code outside the table
    _write(tmp_path / "cover_2015.tif", early)
    _write(tmp_path / "cover_2020.tif", late)
    (tmp_path / "sites.csv").write_text("site,lon,lat\nA,10.0600,0.9500\nB,10.0050,0.9950\n")
    recipe = {
        "version": 1,
        "study": {"table": "sites.csv", "id": "site", "points": {"x": "lon", "y": "lat"}},
        "units": {"buffer_m": 1500},
        "layers": {
            "cover_2015": {
                "file": "cover_2015.tif",
                "kind": "categorical",
                "classes": CLASSES,
                "groups": {"green": [2, 3]},
            },
            "cover_2020": {
                "file": "cover_2020.tif",
                "kind": "categorical",
                "classes": CLASSES,
                "groups": {"green": [2, 3]},
            },
        },
        "covariates": [
            {"layer": "cover_2020", "stats": ["share", "dominant", "shannon", "valid_share"]},
            {
                "layer": "cover_2020",
                "name": "change",
                "since": "cover_2015",
                "stats": ["transition", "net_change"],
                "pairs": [["forest", "built"], ["any", "built"]],
            },
        ],
        "output": {"table": "out/sites.csv", "keep_coordinates": True},
    }
    return tmp_path, recipe


def test_categorical_recipe_columns_and_values(scene):
    folder, recipe = scene
    with pytest.warns(UnknownClassWarning, match="7"):
        result = _run(folder, recipe)
    t = result.table
    for label in ("cropland", "forest", "grassland", "built", "green", "other"):
        assert f"cover_2020_share_{label}" in t.columns
    a = t.iloc[0]
    total = sum(
        float(a[f"cover_2020_share_{lbl}"])
        for lbl in ("cropland", "forest", "grassland", "built", "other")
    )
    assert_allclose(total, 1.0, atol=1e-12)
    assert a["cover_2020_dominant"] in ("forest", "built")
    # B sits in the corner with the unknown code 7
    assert float(t.iloc[1]["cover_2020_share_other"]) > 0
    # change: net change of built equals forest -> built (nothing else became built)
    assert_allclose(float(a["change_net_built"]), float(a["change_forest_to_built"]))
    assert_allclose(float(a["change_any_to_built"]), float(a["change_forest_to_built"]))
    assert float(a["change_net_forest"]) < 0
    rows = {r["column"]: r for r in result.codebook}
    assert rows["cover_2020_share_forest"]["definition"] == (
        "share of the unit's valid area in class forest (nodata excluded)"
    )
    assert "class table: 1 = cropland" in rows["cover_2020_share_forest"]["method"]
    assert rows["change_forest_to_built"]["statistic"] == "transition"


def _run(folder, recipe):
    from covextract.recipe import load_recipe

    return run(load_recipe(recipe, base_dir=folder), write=False)


def test_transition_on_different_grids_is_a_check_problem(scene):
    folder, recipe = scene
    _write(
        folder / "cover_2015.tif",
        np.full((50, 50), 2, np.uint8),
        Affine(0.002, 0, 10, 0, -0.002, 1.0),
    )
    from covextract.recipe import load_recipe

    with pytest.warns(UnknownClassWarning):  # the later layer still holds code 7
        problems = check_recipe(load_recipe(recipe, base_dir=folder))
    assert any("not on the same grid" in str(p) and "since" in str(p) for p in problems)


@pytest.mark.parametrize(
    "change,why",
    [
        (
            {"stats": ["transition"], "pairs": [["forest", "built"]]},
            "compares with an earlier layer",
        ),
        ({"stats": ["net_change"], "since": "nope"}, "unknown layer 'nope'"),
        ({"stats": ["transition"], "since": "cover_2015"}, "transition needs pairs"),
        (
            {"stats": ["transition"], "since": "cover_2015", "pairs": [["forrest", "built"]]},
            "'forrest' is not a class",
        ),
    ],
)
def test_bad_change_covariates_are_explained(scene, change, why):
    from covextract.errors import RecipeError
    from covextract.recipe import load_recipe

    folder, recipe = scene
    recipe["covariates"][1] = {"layer": "cover_2020", "name": "change", **change}
    with pytest.raises(RecipeError, match=why):
        load_recipe(recipe, base_dir=folder)


def test_check_reports_codes_missing_from_the_class_table(scene):
    from covextract.recipe import load_recipe

    folder, recipe = scene
    with pytest.warns(
        UnknownClassWarning, match=r"'cover_2020' holds codes not in its class table \(7\)"
    ):
        problems = check_recipe(load_recipe(recipe, base_dir=folder))
    assert problems == []
