"""The weights cache: reuse, invalidation and corrupt files."""

import numpy as np
import pytest
from affine import Affine
from pyproj import CRS
from shapely.geometry import box

from covextract.core.grid import Grid
from covextract.engine.zonal import build_weights
from covextract.errors import CacheWarning
from covextract.state.cache import WeightCache, weights_key


@pytest.fixture
def grid():
    return Grid(Affine(1.0, 0, 0, 0, -1.0, 20.0), 20, 20, CRS.from_epsg(32631), (8, 8))


def test_round_trip_is_exact(tmp_path, grid):
    ws = build_weights(
        np.array([box(1.3, 1.2, 9.7, 14.1), box(5, 5, 19.5, 7.25)], dtype=object), grid, "overlap"
    )
    cache = WeightCache(tmp_path)
    key = weights_key(grid.fingerprint, "units-a", "overlap")
    assert cache.get(key) is None
    cache.put(key, ws)
    back = cache.get(key)
    assert cache.hits == 1
    assert back.windows == ws.windows and back.rule == "overlap" and back.n_units == 2
    for name in ("starts", "unit", "pix", "cov", "offgrid"):
        np.testing.assert_array_equal(getattr(back, name), getattr(ws, name))
    # stored without pickles
    with np.load(cache.path(key), allow_pickle=False) as data:
        assert all(data[k].dtype != object for k in data.files)


def test_key_changes_with_grid_units_and_rule(grid):
    other = Grid(Affine(1.0, 0, 0.5, 0, -1.0, 20.0), 20, 20, CRS.from_epsg(32631), (8, 8))
    base = weights_key(grid.fingerprint, "u", "overlap")
    assert base == weights_key(grid.fingerprint, "u", "overlap")
    assert base != weights_key(other.fingerprint, "u", "overlap")
    assert base != weights_key(grid.fingerprint, "v", "overlap")
    assert base != weights_key(grid.fingerprint, "u", "center")


def test_corrupt_file_warns_and_is_ignored(tmp_path, grid):
    cache = WeightCache(tmp_path)
    key = weights_key(grid.fingerprint, "u", "overlap")
    cache.path(key).parent.mkdir(parents=True)
    cache.path(key).write_bytes(b"not a zip archive")
    with pytest.warns(CacheWarning, match="unreadable"):
        assert cache.get(key) is None


def test_pipeline_second_run_builds_no_weights_and_unit_change_rebuilds(tmp_path):
    from covextract.demo import lay_out_demo
    from covextract.run import run

    folder = lay_out_demo(tmp_path / "demo")
    first = run(folder / "recipe.yaml")
    # four grids; covariates on a grid already seen in the run reuse its weights
    assert first.summary["weights_built"] == 4 and first.summary["weights_from_cache"] == 4
    second = run(folder / "recipe.yaml")
    assert second.summary["weights_built"] == 0 and second.summary["weights_from_cache"] == 8
    # move one village by a few hundred metres: its unit set changes, weights are rebuilt
    csv = folder / "villages.csv"
    lines = csv.read_text().splitlines()
    header = lines[0].split(",")
    i_lon = header.index("lon")
    cells = lines[1].split(",")
    cells[i_lon] = f"{float(cells[i_lon]) + 0.004:.6f}"
    lines[1] = ",".join(cells)
    csv.write_text("\n".join(lines) + "\n")
    third = run(folder / "recipe.yaml")
    assert third.summary["weights_built"] == 4
    # corrupt every cached file: the next run warns and rebuilds
    for f in (folder / ".covextract-state" / "weights").glob("*.npz"):
        f.write_bytes(b"broken")
    with pytest.warns(CacheWarning):
        fourth = run(folder / "recipe.yaml")
    assert fourth.summary["weights_built"] == 4
    assert fourth.table.equals(third.table)


def _weights(grid, x0=1.3):
    return build_weights(np.array([box(x0, 1.2, 9.7, 14.1)], dtype=object), grid, "overlap")


def test_counters_tell_built_loaded_and_reused_apart(tmp_path, grid):
    # a brand-new state folder: one set built, then reused from memory; nothing loaded
    first = WeightCache(tmp_path)
    key = weights_key(grid.fingerprint, "units-a", "overlap")
    assert first.get(key) is None
    first.put(key, _weights(grid))
    for _ in range(107):
        assert first.get(key) is not None
    assert (first.builds, first.loaded, first.reused) == (1, 0, 107)
    assert first.hits == 107  # hits keeps its meaning: loaded + reused
    # the next run: the set is read from the state folder once, then reused from memory
    second = WeightCache(tmp_path)
    for _ in range(3):
        assert second.get(key) is not None
    assert (second.builds, second.loaded, second.reused) == (0, 1, 2)
    assert second.hits == 3


def test_counters_without_a_folder_and_after_the_memory_forgets(tmp_path, grid):
    memory_only = WeightCache(None)
    key = weights_key(grid.fingerprint, "u", "overlap")
    memory_only.put(key, _weights(grid))
    assert memory_only.get(key) is not None
    assert (memory_only.builds, memory_only.loaded, memory_only.reused) == (1, 0, 1)
    # the memory holds the last four sets; a fifth pushes the first out, which is then
    # read back from the folder (a load, not a reuse)
    cache = WeightCache(tmp_path)
    keys = [weights_key(grid.fingerprint, f"u{i}", "overlap") for i in range(5)]
    for i, k in enumerate(keys):
        cache.put(k, _weights(grid, x0=1.3 + i / 10))
    assert cache.get(keys[0]) is not None
    assert cache.get(keys[4]) is not None
    assert (cache.builds, cache.loaded, cache.reused) == (5, 1, 1)


def test_a_missing_or_corrupt_file_counts_nothing(tmp_path, grid):
    cache = WeightCache(tmp_path)
    key = weights_key(grid.fingerprint, "u", "overlap")
    assert cache.get(key) is None
    cache.path(key).parent.mkdir(parents=True)
    cache.path(key).write_bytes(b"not a zip archive")
    with pytest.warns(CacheWarning):
        assert cache.get(key) is None
    assert (cache.builds, cache.loaded, cache.reused, cache.hits) == (0, 0, 0, 0)
