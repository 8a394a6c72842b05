"""Band-math layers, ceilings and population-weighted statistics through a recipe."""

import numpy as np
import pytest
import rasterio
from affine import Affine
from numpy.testing import assert_allclose

from covextract.errors import RecipeError
from covextract.recipe import load_recipe
from covextract.run import check_recipe, run

T = Affine(100.0, 0, 500_000.0, 0, -100.0, 9_000_000.0)


def _write(path, data, transform=T, nodata=None):
    with rasterio.open(
        path,
        "w",
        driver="GTiff",
        width=data.shape[1],
        height=data.shape[0],
        count=1,
        dtype=data.dtype,
        crs="EPSG:32733",
        transform=transform,
        nodata=nodata,
    ) as ds:
        ds.write(data, 1)


@pytest.fixture
def folder(tmp_path):
    rng = np.random.default_rng(3)
    red = rng.integers(300, 1500, size=(40, 40)).astype(np.int16)
    nir = rng.integers(2000, 5000, size=(40, 40)).astype(np.int16)
    red[5:8, 5:8] = 0  # fill value
    _write(tmp_path / "red.tif", red)
    _write(tmp_path / "nir.tif", nir)
    temp = np.linspace(290, 310, 1600).reshape(40, 40).astype(np.float32)
    _write(tmp_path / "temp.tif", temp)
    pop = np.zeros((40, 40), np.float32)
    pop[:, 20:] = 100.0  # people only in the east half
    pop[0, 0] = -1
    _write(tmp_path / "pop.tif", pop, nodata=-1)
    lights = np.full((40, 40), 80.0, np.float32)
    _write(tmp_path / "lights.tif", lights)
    # one square unit covering the whole raster, given as a GeoJSON polygon table
    x0, y1 = 500_000.0, 9_000_000.0
    (tmp_path / "area.geojson").write_text(
        '{"type": "FeatureCollection", "crs": {"type": "name", "properties": {"name": "EPSG:32733"}},'
        '"features": [{"type": "Feature", "properties": {"uid": "u1"}, "geometry": {"type": "Polygon",'
        f'"coordinates": [[[{x0}, {y1}], [{x0 + 4000}, {y1}], [{x0 + 4000}, {y1 - 4000}], [{x0}, {y1 - 4000}], [{x0}, {y1}]]]}}}}]}}'
    )
    return tmp_path, red, nir, temp


def _recipe(layers, covariates):
    return {
        "version": 1,
        "study": {"table": "area.geojson", "id": "uid"},
        "layers": layers,
        "covariates": covariates,
        "output": {"table": "out/t.csv"},
    }


def test_ndvi_from_bands_matches_the_formula(folder):
    path, red, nir, _ = folder
    recipe = _recipe(
        {
            "veg": {
                "bands": {
                    "red": {"file": "red.tif", "scale": 1e-4, "nodata": 0},
                    "nir": {"file": "nir.tif", "scale": 1e-4},
                },
                "index": "ndvi",
            },
            "veg2": {
                "bands": {
                    "red": {"file": "red.tif", "scale": 1e-4, "nodata": 0},
                    "nir": {"file": "nir.tif", "scale": 1e-4},
                },
                "expression": "(nir - red) / (nir + red)",
            },
        },
        [
            {"layer": "veg", "stats": ["mean", "count"], "area_weighting": "off"},
            {"layer": "veg2", "stats": ["mean"], "area_weighting": "off"},
        ],
    )
    result = run(load_recipe(recipe, base_dir=path), write=False)
    ok = red != 0
    r, n = red[ok] * 1e-4, nir[ok] * 1e-4
    # Rouse et al. (1974): NDVI = (NIR - Red) / (NIR + Red)
    assert_allclose(float(result.table["veg_mean"][0]), np.mean((n - r) / (n + r)), rtol=1e-12)
    assert int(result.table["veg_count"][0]) == ok.sum()
    assert_allclose(
        float(result.table["veg2_mean"][0]), float(result.table["veg_mean"][0]), rtol=1e-15
    )
    rows = {r["column"]: r for r in result.codebook}
    assert "division by zero gives nodata" in rows["veg_mean"]["nodata_handling"]


def test_population_weighted_mean_equals_hand_computation(folder):
    path, _, _, temp = folder
    recipe = _recipe(
        {"temp": {"file": "temp.tif"}, "pop": {"file": "pop.tif"}},
        [
            {
                "layer": "temp",
                "stats": ["mean", "valid_share"],
                "weight_by": "pop",
                "name": "temp_popw",
            },
            {"layer": "temp", "stats": ["mean"]},
        ],
    )
    result = run(load_recipe(recipe, base_dir=path), write=False)
    # weight = coverage x area x population density; the UTM pixels have one area, so the
    # population-weighted mean is the mean of the east half (hand computation)
    assert_allclose(
        float(result.table["temp_popw_mean"][0]), temp[:, 20:].mean(dtype=np.float64), rtol=1e-9
    )
    assert float(result.table["temp_popw_mean"][0]) > float(result.table["temp_mean"][0])
    # the pixel with a missing weight is excluded and reported in the valid share
    assert_allclose(float(result.table["temp_popw_valid_share"][0]), 1 - 1 / 1600, rtol=1e-12)


def test_ceiling_clips_saturated_lights(folder):
    path, *_ = folder
    recipe = _recipe(
        {"lights": {"file": "lights.tif", "ceiling": 63.0}},
        [{"layer": "lights", "stats": ["max", "mean"]}],
    )
    result = run(load_recipe(recipe, base_dir=path), write=False)
    assert float(result.table["lights_max"][0]) == 63.0


def test_derived_layer_problems_are_reported(folder):
    path, *_ = folder
    with pytest.raises(RecipeError, match="'swir' is not a band"):
        load_recipe(
            _recipe(
                {
                    "veg": {
                        "bands": {"red": {"file": "red.tif"}, "nir": {"file": "nir.tif"}},
                        "expression": "(swir - red)",
                    }
                },
                [{"layer": "veg", "stats": ["mean"]}],
            ),
            base_dir=path,
        )
    with pytest.raises(RecipeError, match="index ndvi needs bands named nir, red; missing: red"):
        load_recipe(
            _recipe(
                {"veg": {"bands": {"nir": {"file": "nir.tif"}}, "index": "ndvi"}},
                [{"layer": "veg", "stats": ["mean"]}],
            ),
            base_dir=path,
        )
    _write(
        path / "coarse.tif",
        np.ones((20, 20), np.float32),
        Affine(200.0, 0, 500_000, 0, -200.0, 9_000_000),
    )
    problems = check_recipe(
        load_recipe(
            _recipe(
                {"temp": {"file": "temp.tif"}, "pop": {"file": "coarse.tif"}},
                [{"layer": "temp", "stats": ["mean"], "weight_by": "pop"}],
            ),
            base_dir=path,
        )
    )
    assert any("not on the same grid" in str(p) and "weight_by" in str(p) for p in problems)
    problems = check_recipe(
        load_recipe(
            _recipe(
                {
                    "veg": {
                        "bands": {"red": {"file": "red.tif"}, "nir": {"file": "coarse.tif"}},
                        "index": "ndvi",
                    }
                },
                [{"layer": "veg", "stats": ["mean"]}],
            ),
            base_dir=path,
        )
    )
    assert any("not on the same grid" in str(p) for p in problems)
