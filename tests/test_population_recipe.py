"""Population proxies through a recipe, on the invented demo districts."""

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose

from covextract.derive.calibration import CalibrationWarning
from covextract.errors import RecipeError, TableError
from covextract.recipe import load_recipe
from covextract.run import check_recipe, run


def _recipe(demo_dir, covariates, units=None):
    return load_recipe(
        {
            "version": 1,
            "study": {
                "table": "villages.csv",
                "id": "village_id",
                "points": {"x": "lon", "y": "lat"},
            },
            "units": units or {"buffer_m": 2000},
            "layers": {"lights": {"file": "night_lights_2021.tif"}},
            "covariates": covariates,
            "output": {"table": "out/pop.csv", "keep_coordinates": True},
        },
        base_dir=demo_dir,
    )


REALLOCATE = {
    "layer": "lights",
    "name": "pop_alloc",
    "stats": ["allocated"],
    "reallocate": {
        "zones": {"file": "districts.gpkg", "id": "district_id"},
        "totals": {"file": "district_totals.csv", "id": "district_id", "column": "population"},
    },
}


def test_reallocated_population_of_districts_equals_their_totals(demo_dir):
    # Units identical to the zones get back exactly the zone totals (volume preservation,
    # Tobler 1979), whatever the light inside them.
    import geopandas as gpd

    zones = gpd.read_file(demo_dir / "districts.gpkg")
    zones[["district_id", "geometry"]].to_file(demo_dir / "zones_as_units.gpkg")
    pd.DataFrame({"district_id": zones["district_id"]}).to_csv(
        demo_dir / "zone_table.csv", index=False
    )
    recipe = load_recipe(
        {
            "version": 1,
            "study": {"table": "zone_table.csv", "id": "district_id"},
            "units": {"boundaries": {"file": "zones_as_units.gpkg", "id": "district_id"}},
            "layers": {"lights": {"file": "night_lights_2021.tif"}},
            "covariates": [REALLOCATE],
            "output": {"table": "out/zones.csv", "keep_coordinates": True},
        },
        base_dir=demo_dir,
    )
    result = run(recipe, write=False)
    totals = pd.read_csv(demo_dir / "district_totals.csv", dtype={"district_id": str})
    expected = (
        totals.set_index("district_id")
        .loc[result.table["district_id"], "population"]
        .to_numpy(float)
    )
    assert_allclose(result.table["pop_alloc_allocated"].to_numpy(float), expected, rtol=1e-9)
    row = {r["column"]: r for r in result.codebook}["pop_alloc_allocated"]
    assert "Tobler 1979" in row["definition"] and "a proxy, not a count" in row["definition"]
    # the totals' unit: the recipe gives none, so the codebook names the column it comes from
    assert row["unit_of_measure"] == "as column 'population' of the totals file"


def test_village_buffers_get_a_share_of_their_district(demo_dir):
    result = run(_recipe(demo_dir, [REALLOCATE]), write=False)
    values = result.table["pop_alloc_allocated"].to_numpy(float)
    assert np.all(values[np.isfinite(values)] >= 0)
    assert np.isfinite(values).sum() == len(values)
    total = pd.read_csv(demo_dir / "district_totals.csv")["population"].sum()
    assert values.sum() < total  # villages are samples; they do not cover the districts


def test_calibrated_population_and_fit_in_summary(demo_dir):
    cov = {
        "layer": "lights",
        "name": "hh_fit",
        "stats": ["predicted"],
        "calibrate": {"known": "households", "light": "density_total"},
    }
    result = run(_recipe(demo_dir, [cov]), write=False)
    t = result.table
    est, lo, hi = (t[f"hh_fit_{k}"].to_numpy(float) for k in ("predicted", "lower", "upper"))
    ok = np.isfinite(est)
    assert ok.sum() >= 30
    assert np.all(lo[ok] < est[ok]) and np.all(est[ok] < hi[ok])
    fit = result.summary["proxy_fits"]["hh_fit"]
    assert fit["n"] >= 10 and 0 <= fit["r2"] <= 1
    # Reference: scipy.stats.linregress on the same log points gives the same slope
    from scipy import stats

    light = (
        run(_recipe(demo_dir, [{"layer": "lights", "stats": ["density_total"]}]), write=False)
        .table["lights_density_total"]
        .to_numpy(float)
    )
    known = pd.to_numeric(t["households"]).to_numpy(float)
    use = (light > 0) & (known > 0)
    ref = stats.linregress(np.log(light[use]), np.log(known[use]))
    assert_allclose(fit["b"], ref.slope, rtol=1e-10)
    assert_allclose(fit["a"], ref.intercept, rtol=1e-10)


def test_few_known_counts_warn(demo_dir):
    import csv

    path = demo_dir / "villages.csv"
    rows = list(csv.reader(path.open()))
    col = rows[0].index("households")
    for r in rows[9:]:
        r[col] = ""
    with path.open("w", newline="") as fh:
        csv.writer(fh).writerows(rows)
    cov = {
        "layer": "lights",
        "name": "hh_fit",
        "stats": ["predicted"],
        "calibrate": {"known": "households"},
    }
    with pytest.warns(CalibrationWarning):
        run(_recipe(demo_dir, [cov]), write=False)


def test_proxy_input_problems_are_explained(demo_dir):
    (demo_dir / "bad_totals.csv").write_text("district_id,population\n01,100\n02,-5\n03,7\n04,1\n")
    bad = {
        **REALLOCATE,
        "reallocate": {
            **REALLOCATE["reallocate"],
            "totals": {"file": "bad_totals.csv", "id": "district_id", "column": "population"},
        },
    }
    problems = check_recipe(_recipe(demo_dir, [bad]))
    assert any("negative totals for zones 02" in str(p) for p in problems)
    (demo_dir / "short_totals.csv").write_text("district_id,population\n01,100\n02,5\n")
    short = {
        **REALLOCATE,
        "reallocate": {
            **REALLOCATE["reallocate"],
            "totals": {"file": "short_totals.csv", "id": "district_id", "column": "population"},
        },
    }
    problems = check_recipe(_recipe(demo_dir, [short]))
    assert any("zones without a usable total" in str(p) and "03" in str(p) for p in problems)
    with pytest.raises(RecipeError, match="gives stats"):
        _recipe(demo_dir, [{**REALLOCATE, "stats": ["mean"]}])
    with pytest.raises(TableError, match="not a number|not numbers"):
        path = demo_dir / "villages.csv"
        text = path.read_text().splitlines()
        head = text[0].split(",")
        cells = text[1].split(",")
        cells[head.index("households")] = "many"
        text[1] = ",".join(cells)
        path.write_text("\n".join(text) + "\n")
        run(
            _recipe(
                demo_dir,
                [
                    {
                        "layer": "lights",
                        "name": "hh",
                        "stats": ["predicted"],
                        "calibrate": {"known": "households"},
                    }
                ],
            ),
            write=False,
        )


def test_unit_outside_every_zone_is_missing_with_a_reason(demo_dir):
    # a village moved into the raster's margin, outside all four districts
    path = demo_dir / "villages.csv"
    text = path.read_text().splitlines()
    head = text[0].split(",")
    cells = text[1].split(",")
    cells[head.index("lon")], cells[head.index("lat")] = "5.56", "-12.0"
    text[1] = ",".join(cells)
    path.write_text("\n".join(text) + "\n")
    result = run(_recipe(demo_dir, [REALLOCATE]), write=False)
    assert np.isnan(float(result.table["pop_alloc_allocated"][0]))
    assert "outside_zones" in result.table["pop_alloc_qa"][0]
    assert np.isfinite(result.table["pop_alloc_allocated"][1:].astype(float)).all()
