"""Every shipped recipe checks clean against the demo data and yields the documented columns.

The recipes in ``recipes/`` read the packaged demo data in place, so they are
run with ``write=False`` (no outputs, no weights cache in the repository).
"""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from covextract.demo import demo_data_folder
from covextract.run import check_recipe, run

REPO = Path(__file__).resolve().parents[1]
RECIPES = sorted((REPO / "recipes").glob("*.yaml")) + [demo_data_folder() / "recipe.yaml"]

VILLAGE_COLUMNS = [
    "village_id",
    "village_name",
    "settlement",
    "buffer_radius_m",
    "visit_date",
    "households",
    "notes",
]
# the invented land-cover legend of the demo, in code order
CLASSES = ("cropland", "orchard", "forest", "scrub", "grassland", "built", "water")
DEMO_NEW = (
    [
        "ndvi_mean",
        "ndvi_std",
        "ndvi_q90",
        "ndvi_valid_share",
        "ndvi_qa",
        "surface_temp_mean",
        "surface_temp_min",
        "surface_temp_max",
        "surface_temp_qa",
        "lights_density_total",
        "lights_mean",
        "lights_area_above",
        "lights_qa",
    ]
    + [f"cover_2021_share_{c}" for c in CLASSES + ("tree_cover", "other")]
    + [
        "cover_2021_dominant",
        "cover_2021_shannon",
        "cover_2021_qa",
        "cover_change_forest_to_cropland",
        "cover_change_any_to_built",
    ]
    + [f"cover_change_net_{c}" for c in CLASSES + ("tree_cover",)]
    + ["cover_change_qa"]
    + [
        "veg_mean",
        "veg_valid_share",
        "veg_qa",
        "veg_popw_mean",
        "veg_popw_qa",
        "pop_alloc_allocated",
        "pop_alloc_qa",
        "hh_fit_predicted",
        "hh_fit_lower",
        "hh_fit_upper",
        "hh_fit_qa",
    ]
)
# The columns each recipe documents (in its comments and in the README), in order:
# the study table's columns minus output.drop, then <layer or name>_<stat> and
# <layer or name>_qa per covariate.
EXPECTED = {
    "demo.yaml": ("villages.csv", VILLAGE_COLUMNS + DEMO_NEW),
    "recipe.yaml": ("villages.csv", VILLAGE_COLUMNS + DEMO_NEW),
    "point_values.yaml": (
        "villages.csv",
        VILLAGE_COLUMNS
        + [
            "ndvi_value",
            "ndvi_qa",
            "surface_temp_value",
            "surface_temp_qa",
            "lights_value",
            "lights_qa",
        ],
    ),
    "sensitivity_buffers.yaml": (
        "villages.csv",
        VILLAGE_COLUMNS
        + [f"ndvi_{r}km_{s}" for r in (1, 2, 5) for s in ("mean", "std", "valid_share", "qa")],
    ),
    "survey_clusters.yaml": (
        "survey_clusters.csv",
        [
            "cluster_id",
            "residence",
            "radius_m",
            "interview_date",
            "ndvi_mean",
            "ndvi_std",
            "ndvi_valid_share",
            "ndvi_qa",
            "surface_temp_mean",
            "surface_temp_qa",
            "lights_density_total",
            "lights_share_above",
            "lights_qa",
        ],
    ),
    "land_cover_change.yaml": (
        "villages.csv",
        VILLAGE_COLUMNS
        + [f"cover_2021_share_{c}" for c in CLASSES + ("tree_cover", "other")]
        + [
            "cover_2021_dominant",
            "cover_2021_shannon",
            "cover_2021_valid_share",
            "cover_2021_qa",
            "cover_change_forest_to_cropland",
            "cover_change_forest_to_built",
            "cover_change_any_to_built",
        ]
        + [f"cover_change_net_{c}" for c in CLASSES + ("tree_cover",)]
        + [
            "cover_change_qa",
            "cover_5km_forest_to_cropland",
            "cover_5km_any_to_built",
        ]
        + [f"cover_5km_net_{c}" for c in CLASSES + ("tree_cover",)]
        + ["cover_5km_qa"],
    ),
    "rainfall_before_visit.yaml": (
        "villages.csv",
        VILLAGE_COLUMNS
        + [
            "rain_mean_sum3m_lag1",
            "rain_sum3m_lag1_qa",
            "wet_months_mean",
            "wet_months_qa",
            "ndvi_m_mean_mean2m_lag1",
            "ndvi_m_mean2m_lag1_qa",
        ],
    ),
    "village_boundaries.yaml": (
        "villages.csv",
        VILLAGE_COLUMNS
        + [
            "ndvi_mean",
            "ndvi_median",
            "ndvi_q10",
            "ndvi_q90",
            "ndvi_valid_share",
            "ndvi_qa",
            "ndvi_center_mean",
            "ndvi_center_valid_share",
            "ndvi_center_qa",
            "surface_temp_mean",
            "surface_temp_max",
            "surface_temp_qa",
            "lights_area_km2",
            "lights_density_total",
            "lights_share_above",
            "lights_qa",
        ],
    ),
}


def _ids(table_name: str) -> list[str]:
    with open(demo_data_folder() / table_name, encoding="utf-8", newline="") as fh:
        rows = list(csv.reader(fh))
    return [r[0] for r in rows[1:]]


def test_every_recipe_file_has_an_expectation():
    assert sorted(p.name for p in RECIPES) == sorted(EXPECTED)


@pytest.mark.parametrize("path", RECIPES, ids=lambda p: p.name)
def test_recipe_checks_clean(path):
    assert [str(p) for p in check_recipe(path)] == []


@pytest.mark.parametrize("path", RECIPES, ids=lambda p: p.name)
def test_recipe_runs_with_the_documented_columns(path):
    table_name, expected = EXPECTED[path.name]
    result = run(path, write=False)
    table = result.table
    assert list(table.columns) == expected
    assert result.columns == expected[len(expected) - len(result.columns) :]
    assert result.outputs == {}
    # Every record, in the order of the file, with its id as written ("003", not 3).
    assert list(table.iloc[:, 0]) == _ids(table_name)
    new = [c for c in result.columns if not c.endswith(("_qa", "_dominant"))]
    values = table[new].to_numpy(dtype=float)
    # No covariate is wholly missing on the demo data (all units lie on every layer).
    assert np.isfinite(values).any(axis=0).all()
    for col in new:
        v = table[col].to_numpy(dtype=float)
        v = v[np.isfinite(v)]
        if col.endswith("valid_share") or col.endswith("share_above"):
            assert ((v >= 0) & (v <= 1)).all(), col
        elif col.startswith("ndvi"):
            # NDVI is defined in [-1, 1] (Rouse et al. 1974).
            assert ((v >= -1) & (v <= 1)).all(), col
    for qa_col in (c for c in result.columns if c.endswith("_qa")):
        assert pd.Series(table[qa_col]).map(type).eq(str).all()
