"""Fixtures of the refresh tests: their recipe, on the invented demo district.

Rain (36 months) feeds two window covariates with the same per-period
statistic (so they share pieces) and a ``periods:`` covariate; monthly NDVI
(24 months) one window; the 2021 NDVI raster one covariate without periods.
"""

from __future__ import annotations

import copy

import pytest

REFRESH_RECIPE = {
    "version": 1,
    "study": {
        "table": "villages.csv",
        "id": "village_id",
        "points": {"x": "lon", "y": "lat", "crs": "EPSG:4326"},
        "date": "visit_date",
    },
    "units": {"buffer_m": 3000},
    "layers": {
        "rain": {"file": "rain/rain_{year}{month:02d}.tif", "every": "month", "unit": "mm"},
        "ndvi_m": {
            "file": "ndvi_monthly/ndvi_{year}{month:02d}.tif",
            "every": "month",
            "scale": 0.0001,
            "nodata": -3000,
        },
        "ndvi": {"file": "ndvi_2021.tif"},
    },
    "covariates": [
        {"layer": "rain", "stats": ["mean"], "before": {"months": 3, "lag_months": 1}},
        {
            "layer": "rain",
            "name": "wet_months",
            "stats": ["mean"],
            "before": {"months": 6, "lag_months": 1, "combine": "count_above", "threshold": 200},
        },
        {"layer": "ndvi_m", "stats": ["mean"], "before": {"months": 2, "lag_months": 1}},
        {"layer": "rain", "name": "rain_month", "stats": ["max"], "periods": "2021-01.."},
        {"layer": "ndvi", "stats": ["mean", "valid_share"]},
    ],
    "output": {"table": "out/table.csv", "panel": "out/panel", "drop": ["lat", "lon"]},
}


@pytest.fixture
def refresh_recipe() -> dict:
    """A fresh copy of :data:`REFRESH_RECIPE` (tests may change it)."""
    return copy.deepcopy(REFRESH_RECIPE)


@pytest.fixture(scope="session")
def refresh_recipe_data() -> dict:
    """:data:`REFRESH_RECIPE` itself, for module-scoped fixtures (do not change it)."""
    return REFRESH_RECIPE
