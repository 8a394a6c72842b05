"""The Python API end to end: run_recipe, zonal_statistics, unit shapes, point values, the cache."""

from __future__ import annotations

import copy
import math

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
import shapely
import yaml
from numpy.testing import assert_allclose

import covextract
from covextract.run import run

NDVI_STATS = ["mean", "std", "q90", "median", "count", "valid_share", "area_km2"]


def read_text_csv(path) -> pd.DataFrame:
    return pd.read_csv(path, dtype=object, keep_default_na=False)


def boundary_recipe(demo_recipe_data, stats, pixels="overlap") -> dict:
    data = copy.deepcopy(demo_recipe_data)
    del data["study"]["points"]
    data["units"] = {
        "boundaries": {"file": "village_areas.gpkg", "layer": "village_areas", "id": "village_id"}
    }
    data["layers"] = {"ndvi": data["layers"]["ndvi"]}
    data["covariates"] = [{"layer": "ndvi", "stats": stats, "pixels": pixels}]
    data["output"] = {"table": "out/boundaries.csv"}
    return data


# ------------------------------------------------------------------ run_recipe
def test_run_recipe_returns_the_augmented_table(demo_dir):
    table = covextract.run_recipe(demo_dir / "recipe.yaml")
    assert isinstance(table, pd.DataFrame)
    written = read_text_csv(demo_dir / "out" / "villages_covariates.csv")
    assert list(table.columns) == list(written.columns)
    assert len(table) == 40
    original = [c for c in written.columns if c in read_text_csv(demo_dir / "villages.csv")]
    pd.testing.assert_frame_equal(table[original], written[original])
    for col in ("ndvi_mean", "surface_temp_max", "lights_density_total"):
        assert table[col].dtype == np.float64
        assert_allclose(table[col], written[col].astype(float), rtol=0, atol=0)
    # Kelvin, within the invented demo's range of warm tropical land surfaces.
    assert ((table["surface_temp_mean"] > 290) & (table["surface_temp_mean"] < 320)).all()


def test_run_recipe_accepts_a_dict(demo_dir, demo_recipe_data, monkeypatch):
    from_file = covextract.run_recipe(demo_dir / "recipe.yaml", write=False)
    monkeypatch.chdir(demo_dir)  # a dict's relative paths are relative to the current folder
    from_dict = covextract.run_recipe(copy.deepcopy(demo_recipe_data), write=False)
    pd.testing.assert_frame_equal(from_dict, from_file)
    assert not (demo_dir / "out").exists()


# ------------------------------------------------------------ zonal_statistics
def test_zonal_statistics_equals_the_recipe_for_the_same_units(
    demo_dir, demo_recipe_data, write_recipe
):
    areas = gpd.read_file(demo_dir / "village_areas.gpkg")
    direct = covextract.zonal_statistics(
        demo_dir / "ndvi_2021.tif",
        areas,
        NDVI_STATS,
        id_column="village_id",
        pixels="overlap",
        scale=0.0001,
        nodata=-3000,
    )
    assert direct.index.name == "village_id"
    assert list(direct.index) == list(areas["village_id"])  # the GeoDataFrame's order
    assert list(direct.columns) == NDVI_STATS
    result = run(write_recipe(demo_dir, boundary_recipe(demo_recipe_data, NDVI_STATS)), write=False)
    via_recipe = result.table.set_index("village_id")
    # The boundary file is in another order than the study table: compare by id.
    assert list(via_recipe.index) != list(direct.index)
    for stat in NDVI_STATS:
        assert_allclose(
            direct.loc[via_recipe.index, stat].to_numpy(float),
            via_recipe[f"ndvi_{stat}"].to_numpy(float),
            rtol=1e-12,
            atol=0,
        )


def test_zonal_statistics_reprojects_units_and_applies_scale(demo_dir):
    areas = gpd.read_file(demo_dir / "village_areas.gpkg")
    in_degrees = covextract.zonal_statistics(
        demo_dir / "ndvi_2021.tif",
        areas,
        ["mean", "area_km2"],
        id_column="village_id",
        scale=0.0001,
        nodata=-3000,
    )
    # The same polygons given in UTM (EPSG:32731) come back to the raster's lat/lon grid.
    in_metres = covextract.zonal_statistics(
        demo_dir / "ndvi_2021.tif",
        areas.to_crs("EPSG:32731"),
        ["mean", "area_km2"],
        id_column="village_id",
        scale=0.0001,
        nodata=-3000,
    )
    assert_allclose(in_metres["mean"], in_degrees["mean"], rtol=1e-6)
    assert_allclose(in_metres["area_km2"], in_degrees["area_km2"], rtol=1e-5)
    # Reference: pyproj Geod(ellps="WGS84").geometry_area_perimeter, the polygons' area
    # on the ellipsoid (Karney 2013); the grid sees the same area within 1e-4.
    from pyproj import Geod

    geod = Geod(ellps="WGS84")
    true_km2 = np.array([abs(geod.geometry_area_perimeter(g)[0]) / 1e6 for g in areas.geometry])
    assert_allclose(in_degrees["area_km2"], true_km2, rtol=1e-4)
    raw = covextract.zonal_statistics(
        demo_dir / "ndvi_2021.tif", areas, ["mean"], id_column="village_id", scale=1.0, nodata=-3000
    )
    assert_allclose(raw["mean"] * 0.0001, in_degrees["mean"], rtol=1e-12)


def test_boundaries_give_other_values_than_buffers(demo_dir, demo_recipe_data, write_recipe):
    buffers = run(demo_dir / "recipe.yaml", write=False).table.set_index("village_id")
    polygons = (
        run(
            write_recipe(demo_dir, boundary_recipe(demo_recipe_data, ["mean", "area_km2"])),
            write=False,
        )
        .table.set_index("village_id")
        .loc[buffers.index]
    )
    diff = np.abs(polygons["ndvi_mean"].to_numpy(float) - buffers["ndvi_mean"].to_numpy(float))
    assert (diff > 1e-4).sum() >= 35
    # A 2 km buffer covers pi * 4 km2 = 12.6 km2; the village polygons are 1-3 km across.
    assert (polygons["ndvi_area_km2"] < 4 * math.pi).all()


# ---------------------------------------------------- buffer sensitivity runs
def test_per_covariate_buffers_area_and_nested_counts(demo_dir, repo_root, write_recipe):
    data = yaml.safe_load((repo_root / "recipes" / "sensitivity_buffers.yaml").read_text())
    data["study"]["table"] = "villages.csv"
    data["layers"]["ndvi"]["file"] = "ndvi_2021.tif"
    for cov in data["covariates"]:
        cov["stats"] = cov["stats"] + ["area_km2", "count"]
    result = run(write_recipe(demo_dir, data), write=False)
    table = result.table
    for r_km in (1, 2, 5):
        # A geodesic circle of radius r << R has area pi r^2 (spherical cap
        # 2 pi R^2 (1 - cos(r/R)) differs by (r/R)^2 / 12, below 1e-7 here); the
        # buffer is an inscribed 128-gon (0.04 % less) and lies wholly on the grid.
        area = table[f"ndvi_{r_km}km_area_km2"].to_numpy(float)
        assert_allclose(area, math.pi * r_km**2, rtol=1e-2)
    counts = table[[f"ndvi_{r}km_count" for r in (1, 2, 5)]].to_numpy(float)
    assert (np.diff(counts, axis=1) >= 0).all()
    assert (counts[:, 2] > counts[:, 0]).all()
    # The 2 km entry is the demo's own buffer: the same numbers.
    demo = run(demo_dir / "recipe.yaml", write=False).table
    assert_allclose(table["ndvi_2km_mean"], demo["ndvi_mean"], rtol=0, atol=0)


# ---------------------------------------------------------------- point values
@pytest.mark.parametrize("method,rtol", [("nearest", 1e-15), ("bilinear", 1e-6)])
def test_point_values_equal_rasterstats_point_query(
    demo_dir, demo_recipe_data, write_recipe, method, rtol
):
    # Reference: rasterstats.point_query on the demo NDVI raster (stored values; the
    # recipe's scale 0.0001 applied here). Nearest agrees to the last bit of float64
    # (the engine takes a weighted mean of one pixel); bilinear weights are stored as
    # float32, hence rtol 1e-6 there; rasterstats falls back to the nearest pixel when one of
    # the four neighbours is nodata, where covextract gives a missing value instead.
    from rasterstats import point_query

    data = copy.deepcopy(demo_recipe_data)
    data["units"] = {"at_point": method}
    data["layers"] = {"ndvi": data["layers"]["ndvi"]}
    data["covariates"] = [{"layer": "ndvi", "stats": ["value"]}]
    data["output"] = {"table": "out/points.csv"}
    result = run(write_recipe(demo_dir, data), write=False)
    villages = read_text_csv(demo_dir / "villages.csv")
    points = [
        shapely.Point(float(x), float(y))
        for x, y in zip(villages["lon"], villages["lat"], strict=True)
    ]
    reference = point_query(points, str(demo_dir / "ndvi_2021.tif"), interpolate=method)
    ref = np.array([np.nan if v is None else v * 0.0001 for v in reference])
    ours = result.table["ndvi_value"].to_numpy(float)
    assert np.isnan(ref).sum() == 1  # one village sits under a cloud gap
    assert_allclose(ours, ref, rtol=rtol, atol=0, equal_nan=True)
    gap = result.table.loc[np.isnan(ref), "ndvi_qa"].tolist()
    assert gap == ["no_valid_pixel"]


def test_zonal_statistics_for_points(demo_dir, demo_recipe_data, write_recipe):
    villages = read_text_csv(demo_dir / "villages.csv")
    gdf = gpd.GeoDataFrame(
        villages[["village_id"]],
        geometry=gpd.points_from_xy(villages["lon"].astype(float), villages["lat"].astype(float)),
        crs="EPSG:4326",
    )
    direct = covextract.zonal_statistics(
        demo_dir / "night_lights_2021.tif",
        gdf,
        ["value"],
        id_column="village_id",
        pixels="nearest",
        with_qa=True,
    )
    data = copy.deepcopy(demo_recipe_data)
    data["units"] = {"at_point": "nearest"}
    data["layers"] = {"lights": data["layers"]["lights"]}
    data["covariates"] = [{"layer": "lights", "stats": ["value"]}]
    data["output"] = {"table": "out/points.csv"}
    result = run(write_recipe(demo_dir, data), write=False)
    assert list(direct.index) == list(villages["village_id"])
    assert_allclose(direct["value"], result.table["lights_value"], rtol=0, atol=0)
    assert list(direct["qa"]) == list(result.table["lights_qa"])


# ---------------------------------------------------------------------- cache
def test_a_second_run_reuses_the_cached_weights(demo_dir):
    first = run(demo_dir / "recipe.yaml")
    # four grids; covariates on a grid already seen in the run reuse its weights
    assert (first.summary["weights_built"], first.summary["weights_from_cache"]) == (4, 4)
    cached = sorted((demo_dir / ".covextract-state" / "weights").glob("*.npz"))
    assert len(cached) == 4  # one weight set per raster grid
    second = run(demo_dir / "recipe.yaml")
    assert (second.summary["weights_built"], second.summary["weights_from_cache"]) == (0, 8)
    pd.testing.assert_frame_equal(second.table, first.table)
    # Another unit shape on the same grids needs its own weights.
    data = yaml.safe_load((demo_dir / "recipe.yaml").read_text())
    data["units"] = {"buffer_m": 3000}
    (demo_dir / "wider.yaml").write_text(yaml.safe_dump(data))
    wider = run(demo_dir / "wider.yaml")
    assert (wider.summary["weights_built"], wider.summary["weights_from_cache"]) == (4, 4)
