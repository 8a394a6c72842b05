"""The quick benchmark end to end (slow): its equality checks must hold.

Run with ``PYTHONPATH=. pytest -m slow tests/benchmarks`` (the default run
ignores this folder; naming it on the command line collects it). Timings are
machine-dependent and are not asserted here; the ratios must exist and be
finite.
"""

import json
import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

REPO = Path(__file__).resolve().parents[2]

RATIO_KEYS = {
    "polygons_vs_rasterstats",
    "polygons_vs_floor",
    "polygons_cached_vs_floor",
    "buffers_vs_rasterstats",
    "buffers_vs_floor",
    "overlap_vs_center_polygons",
    "overlap_vs_center_buffers",
    "second_vs_first",
    "series_vs_floor",
    "series_passes_vs_floor",
    "floor_speedup_2_threads",
}


@pytest.fixture(scope="module")
def quick_results(tmp_path_factory):
    out = tmp_path_factory.mktemp("bench") / "results.json"
    env = dict(os.environ)
    extra = [env["PYTHONPATH"]] if env.get("PYTHONPATH") else []
    env["PYTHONPATH"] = os.pathsep.join([str(REPO), *extra])
    proc = subprocess.run(
        [sys.executable, "-m", "tests.benchmarks.bench_engine", "--quick", "--json", str(out)],
        cwd=REPO,
        env=env,
        capture_output=True,
        text=True,
        timeout=1800,
        check=False,
    )
    assert proc.returncode == 0, proc.stdout[-4000:] + proc.stderr[-4000:]
    return json.loads(out.read_text()), proc.stdout


@pytest.mark.slow
def test_center_rule_equals_rasterstats_on_polygons_and_buffers(quick_results):
    # Reference: rasterstats zonal_stats (all_touched=False) on the same units and raster,
    # area weighting off. count/min/max exact; sum/mean within 1e-5 because rasterstats
    # accumulates float32 rasters in float32 (rasterstats/main.py, masked.sum(dtype=None)).
    res, _ = quick_results
    assert res["aborted"] is None
    cases = {"polygons (center)": 500, "buffers (center, subset)": 200}
    for name, units in cases.items():
        eq = res["equality"][name]
        assert eq["units"] == units
        assert eq["mismatches"] == 0, eq
        for s in ("count", "min", "max"):
            assert eq["stats"][s]["max_rel_diff"] == 0.0, (name, s)
        for s in ("sum", "mean"):
            assert eq["stats"][s]["max_rel_diff"] <= 1e-5, (name, s)


@pytest.mark.slow
def test_cache_series_and_threads_give_identical_values(quick_results):
    # Worked out by hand: the cached second run and the 2-thread pass repeat the same
    # arithmetic in the same block order (bit-identical); series step k stores step 0's
    # numbers with scale 1 + 0.002 k and offset -0.25 k, so its statistics are step 0's
    # rescaled (see check_series).
    res, _ = quick_results
    eq = res["equality"]
    for name in (
        "cache (first vs second run)",
        "series (rescaled steps)",
        "series step 0 vs main raster",
        "threads (1 vs 2, bit-identical)",
    ):
        assert eq[name]["mismatches"] == 0, (name, eq[name])
    assert eq["series (rescaled steps)"]["steps"] == 6


@pytest.mark.slow
def test_every_ratio_is_reported_with_its_target(quick_results):
    res, stdout = quick_results
    rows = {r["key"]: r for r in res["rows"]}
    assert RATIO_KEYS <= set(rows)
    for key in RATIO_KEYS:
        value = rows[key]["value"]
        assert value is not None and math.isfinite(value) and value > 0, key
        assert rows[key]["label"] in stdout
    assert "scaled linearly" in rows["buffers_vs_rasterstats"]["note"]
    for key in (
        "polygons_vs_rasterstats",
        "polygons_vs_floor",
        "buffers_vs_rasterstats",
        "overlap_vs_center_polygons",
        "series_vs_floor",
    ):
        assert rows[key]["status"] in ("PASS", "MISS")
        assert rows[key]["target"]
    t = res["timings_s"]
    assert all(np.isfinite(v) and v > 0 for v in t.values())
    # the first run is the weight build plus the pass, both timed
    build = t["polygons center: build_weights"]
    total = build + t["polygons center: zonal pass"]
    assert rows["polygons_vs_floor"]["value"] == pytest.approx(
        total / t["floor: read + nansum, 1 thread"], rel=1e-9
    )


@pytest.mark.slow
def test_comparison_flags_every_kind_of_difference():
    # Hand-made: unit 0 has 3 valid pixels 1, 2, 3; unit 1 has none. The reference rows
    # differ in the sum beyond 1e-5 (unit 0) and in having pixels at all (unit 1).
    from tests.benchmarks.bench_engine import compare_with_rasterstats

    ours = {
        "count": np.array([3, 0]),
        "sum": np.array([6.0, np.nan]),
        "mean": np.array([2.0, np.nan]),
        "min": np.array([1.0, np.nan]),
        "max": np.array([3.0, np.nan]),
    }
    same = [
        {"count": 3, "sum": 6.0 * (1 + 1e-7), "mean": 2.0, "min": 1.0, "max": 3.0},
        {"count": 0, "sum": None, "mean": None, "min": None, "max": None},
    ]
    other = [
        {"count": 3, "sum": 6.1, "mean": 2.0, "min": 1.0, "max": 3.0},
        {"count": 1, "sum": 2.0, "mean": 2.0, "min": 2.0, "max": 2.0},
    ]
    assert compare_with_rasterstats(ours, same, np.arange(2))["mismatches"] == 0
    res = compare_with_rasterstats(ours, other, np.arange(2))
    assert {s: v["first_bad_units"] for s, v in res["stats"].items()} == {
        "count": [1],
        "sum": [0, 1],
        "mean": [1],
        "min": [1],
        "max": [1],
    }
    assert res["mismatches"] == 6
