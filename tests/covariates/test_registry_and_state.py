"""The statistics registry, the naming rule, and one state shared by run and refresh."""

import shutil

import numpy as np
import pytest

from covextract.covariates.naming import LEGAL, MAX_LENGTH
from covextract.demo import lay_out_demo
from covextract.ops.refresh import refresh
from covextract.run import run
from covextract.stats import registry
from covextract.stats.names import parse_stat


def test_every_registered_statistic_declares_its_unit():
    for stat in registry.registered():
        unit = stat.unit("mm")
        assert isinstance(unit, str) and unit, stat


@pytest.mark.parametrize(
    ("name", "family", "unit"),
    [
        # expected units written here, not read from the registry's own tables
        ("mean", "continuous", "mm"),
        ("std", "continuous", "mm"),
        ("count", "continuous", "pixels"),
        ("sum", "continuous", "mm x pixels"),
        ("density_total", "continuous", "mm x km2"),
        ("area_km2", "continuous", "km2"),
        ("area_above", "continuous", "km2"),
        ("share_above", "continuous", "fraction (0-1)"),
        ("valid_share", "continuous", "fraction (0-1)"),
        ("shannon", "categorical", "nats (natural logarithm)"),
        ("dominant", "categorical", "none (a label)"),
        ("category", "anomaly", "none (a label)"),
        ("spi", "anomaly", "none (standard normal deviate)"),
        ("pct", "anomaly", "percent of normal"),
        ("z", "anomaly", "none (standard deviations from the baseline mean)"),
        ("ols", "trend", "mm per year"),
        ("allocated", "proxy", "mm"),
    ],
)
def test_unit_rules(name, family, unit):
    assert registry.get(name, family).unit("mm") == unit


def test_percentile_spelling_is_a_legal_identifier():
    stat = parse_stat("q2.5")
    assert stat.q == 2.5 and stat.column == "q2p5"
    assert parse_stat("q2p5").q == 2.5
    assert LEGAL.match(f"ndvi_{stat.column}")


def test_cv_is_one_registry_entry_and_computes_std_over_mean(demo_dir):
    # coefficient of variation = std / |mean| (common practice)
    recipe = demo_dir / "recipe.yaml"
    text = recipe.read_text(encoding="utf-8").replace(
        "stats: [mean, std, q90, valid_share]", "stats: [mean, std, cv, q90, valid_share]"
    )
    recipe.write_text(text, encoding="utf-8")
    result = run(recipe, write=False)
    t = result.table
    expected = t["ndvi_std"].to_numpy(float) / np.abs(t["ndvi_mean"].to_numpy(float))
    np.testing.assert_allclose(t["ndvi_cv"].to_numpy(float), expected, rtol=1e-12)
    row = {r["column"]: r for r in result.codebook}["ndvi_cv"]
    assert row["unit_of_measure"] == "none (ratio std / |mean|, may exceed 1)"


def test_every_demo_column_is_legal_and_short(demo_dir):
    result = run(demo_dir / "recipe.yaml", write=False)
    for col in result.columns:
        assert LEGAL.match(col) and len(col) <= MAX_LENGTH, col


def test_a_run_leaves_the_state_a_refresh_reads(demo_dir):
    # after run, refresh with nothing new computes nothing (exit 3)
    from covextract.ops.refresh import refresh_status

    recipe = demo_dir / "recipe.yaml"
    run(recipe)
    status = refresh_status(recipe)
    assert status.layers and all(
        state == "computed" for periods in status.layers.values() for _, state in periods
    )
    again = refresh(recipe)
    assert again.status == "nothing_to_do" and again.exit_code == 3
    assert again.computed == {}


def test_a_state_folder_of_the_first_version_is_refused_with_a_way_forward(demo_dir):
    import sqlite3

    from covextract.state.ledger import LedgerVersionError

    state = demo_dir / ".covextract-state"
    state.mkdir(exist_ok=True)
    with sqlite3.connect(state / "ledger.sqlite") as conn:
        conn.execute("PRAGMA user_version = 2")
    with pytest.raises(LedgerVersionError, match="rename that folder") as info:
        refresh(demo_dir / "recipe.yaml")
    assert "ledger schema 2" in str(info.value)
    shutil.rmtree(state)


@pytest.fixture
def demo_dir(tmp_path):
    return lay_out_demo(tmp_path / "demo")
