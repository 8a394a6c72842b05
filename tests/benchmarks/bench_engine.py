"""Benchmark of the engine at scale: equality with rasterstats first, then timings as ratios.

Run from the repository root::

    python -m tests.benchmarks.bench_engine             # full scene (several minutes)
    python -m tests.benchmarks.bench_engine --quick     # small scene (the pytest wrapper runs this)
    python -m tests.benchmarks.bench_engine --memory    # add the peak-memory run on a >6 GB mosaic
    python -m tests.benchmarks.bench_engine --profile   # add cProfile summaries of the engine calls

The scene comes from :mod:`tests.benchmarks.scene` (generated once, cached in
``$COVEXTRACT_BENCH_DIR``). Every ratio is printed in one table next to its
target, and the figures are written to a JSON file (``--json``; default
``<scene folder>/results.json``). The run stops with exit status 2, before any
timing, when covextract's ``center`` results differ from rasterstats'.

What "first run" means here: ``build_weights`` followed by ``zonal(weights=...)``,
the two steps the engine takes when no cached weights exist; each is timed, and
the first-run figure is their sum. Each pass opens the raster afresh, so no
pass reuses blocks another pass left in GDAL's block cache.
"""

from __future__ import annotations

import argparse
import cProfile
import gc
import hashlib
import inspect
import io
import json
import math
import os
import platform
import pstats
import re
import resource
import subprocess
import sys
import tempfile
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

from tests.benchmarks.scene import (
    FULL,
    QUICK,
    Mosaic,
    Scene,
    ensure_scene,
    mosaic_buffer_centres,
    step_scaling,
)

REPO_ROOT = Path(__file__).resolve().parents[2]

#: The statistics rasterstats computes too (its names are the same words).
STATS = ("count", "sum", "mean", "min", "max")

#: rasterstats sums float32 rasters in float32 (numpy's default accumulator
#: for the dtype, rasterstats/main.py ``masked.sum(dtype=None)``); covextract
#: sums in float64. Pairwise float32 summation of ~10^4 values is good to a
#: few 1e-7 relative, so sums and means are compared to 1e-5; count, min and
#: max are compared exactly.
SUM_RTOL = 1e-5

#: GDAL block cache used for the floor (covextract sets the same size).
GDAL_CACHE_BYTES = 256 * 1024 * 1024

GIB = 1024**3

#: Buffers that rasterstats is timed on (its time is scaled linearly to all).
RS_BUFFER_SUBSET = {"full": 500, "quick": 200}

#: Targets of the scale issue: (comparison, bound).
TARGETS = {
    "polygons_vs_rasterstats": (">=", 10.0),
    "polygons_vs_floor": ("<=", 1.3),
    "buffers_vs_rasterstats": (">=", 25.0),
    "overlap_vs_center_polygons": ("<=", 1.5),
    "overlap_vs_center_buffers": ("<=", 1.5),
    "series_vs_floor": ("<=", 1.3),
    "peak_memory": ("<", 2.0),
}


class BenchmarkAbort(Exception):
    """An equality check failed; timings of wrong results mean nothing."""


# ------------------------------------------------------------------ report
@dataclass
class Row:
    """One line of the results table."""

    key: str
    label: str
    value: float | None
    unit: str = "x"
    target: str = ""
    status: str = ""
    note: str = ""
    cpu_value: float | None = None


@dataclass
class Report:
    """Everything measured in one run, printed as a table and saved as JSON."""

    mode: str
    info: dict = field(default_factory=dict)
    equality: dict = field(default_factory=dict)
    timings: dict = field(default_factory=dict)
    cpu: dict = field(default_factory=dict)
    rows: list = field(default_factory=list)
    notes: list = field(default_factory=list)
    aborted: str | None = None

    def record(self, name: str, seconds) -> None:
        """Store a wall time, and its process CPU time when it carries one."""
        self.timings[name] = float(seconds)
        cpu = getattr(seconds, "cpu", None)
        if cpu is not None:
            self.cpu[name] = float(cpu)

    def add(self, key, label, value, unit="x", note="", cpu=None) -> Row:
        """Add a row; rows whose key is in :data:`TARGETS` get PASS or MISS."""
        target = status = ""
        if key in TARGETS:
            op, bound = TARGETS[key]
            target = f"{op} {bound:g}{' GiB' if unit == 'GiB' else 'x'}"
            if value is None or not math.isfinite(value):
                status = "MISS"
            else:
                ok = {">=": value >= bound, "<=": value <= bound, "<": value < bound}[op]
                status = "PASS" if ok else "MISS"
        row = Row(
            key,
            label,
            None if value is None else float(value),
            unit,
            target,
            status,
            note,
            None if cpu is None else float(cpu),
        )
        self.rows.append(row)
        return row

    def to_json(self) -> dict:
        """Plain data for ``json.dump``."""
        return {
            "mode": self.mode,
            "info": self.info,
            "equality": self.equality,
            "timings_s": self.timings,
            "cpu_s": self.cpu,
            "rows": [asdict(r) for r in self.rows],
            "notes": self.notes,
            "aborted": self.aborted,
        }


def _fmt(value, unit) -> str:
    if value is None or not math.isfinite(value):
        return "n/a"
    if unit == "x":
        return f"{value:.2f}x"
    if unit == "s":
        return f"{value:.2f} s"
    if unit == "GiB":
        return f"{value:.2f} GiB"
    return f"{value:.3g} {unit}"


def format_report(report: Report) -> str:
    """The printed table: scene, equality, timings, ratios with targets, notes."""
    out = io.StringIO()
    p = lambda *a: print(*a, file=out)  # noqa: E731
    info = report.info
    p(f"== covextract engine benchmark: {report.mode} scene ==")
    for key in ("scene", "machine", "engine"):
        if key in info:
            p(f"{key}: {info[key]}")
    p("")
    p("equality with rasterstats (center rule, area weighting off) and internal checks")
    for name, eq in report.equality.items():
        p(f"  {name:<40} {eq.get('summary', '')}")
    p("")
    p(f"  {'timing':<84} {'wall s':>9} {'cpu s':>9}")
    for name, sec in report.timings.items():
        cpu = report.cpu.get(name)
        p(f"  {name:<84} {sec:9.3f} {'' if cpu is None else f'{cpu:9.3f}':>9}")
    p("")
    width = max([len(r.label) for r in report.rows] + [20])
    p(
        f"{'ratio (wall time; cpu: the same ratio of CPU times)':<{width}}  {'value':>10}  "
        f"{'cpu':>8}  {'target':>10}  status"
    )
    for r in report.rows:
        cpu = "" if r.cpu_value is None or r.unit != "x" else _fmt(r.cpu_value, r.unit)
        p(f"{r.label:<{width}}  {_fmt(r.value, r.unit):>10}  {cpu:>8}  {r.target:>10}  {r.status}")
        if r.note:
            p(f"{'':<{width}}    ({r.note})")
    if report.notes:
        p("")
        p("notes")
        for n in report.notes:
            p(f"  - {n}")
    if report.aborted:
        p("")
        p(f"ABORTED: {report.aborted}")
    return out.getvalue()


# ----------------------------------------------------------------- helpers
class Seconds(float):
    """Wall-clock seconds carrying the process CPU seconds (all threads) of the same span.

    CPU time moves less than wall time when other work shares the machine;
    a 2-thread run that uses more CPU than the 1-thread run for the same
    work spends the difference on overhead.
    """

    cpu: float

    def __new__(cls, wall: float, cpu: float):
        obj = super().__new__(cls, wall)
        obj.cpu = float(cpu)
        return obj


class Clock:
    """Start on creation; :meth:`stop` returns :class:`Seconds`."""

    def __init__(self) -> None:
        self.t0 = time.perf_counter()
        self.c0 = time.process_time()

    def stop(self) -> Seconds:
        """Wall and CPU seconds since creation."""
        return Seconds(time.perf_counter() - self.t0, time.process_time() - self.c0)


def _timed(fn, *args, **kwargs):
    clock = Clock()
    out = fn(*args, **kwargs)
    return clock.stop(), out


def _cpu(x) -> float:
    return x.cpu


def _log(msg: str) -> None:
    print(f"[{time.strftime('%H:%M:%S')}] {msg}", flush=True)


def zonal_supports(keyword: str) -> bool:
    """True when :func:`covextract.engine.zonal.zonal` takes ``keyword``."""
    from covextract.engine.zonal import zonal

    return keyword in inspect.signature(zonal).parameters


def _threads_kw(threads: int | None) -> dict:
    return {"threads": threads} if threads is not None and zonal_supports("threads") else {}


def units_fingerprint(geoms, tag: str) -> str:
    """A hash of the units' WKB and of how they were made (for the cache key)."""
    import shapely

    h = hashlib.sha256(tag.encode())
    for wkb in shapely.to_wkb(np.asarray(geoms, dtype=object)):
        h.update(wkb)
    return h.hexdigest()[:32]


def warm_page_cache(paths) -> None:
    """Read the files' bytes once, so no timed pass pays for the disk."""
    for path in paths:
        with open(path, "rb") as f:
            while f.read(1 << 24):
                pass


def floor_pass(path, threads: int = 1) -> Seconds:
    """Seconds to read every block of ``path`` once and ``nansum`` it.

    After one warm-up read (the first block, from a handle closed before the
    clock starts, so GDAL's block cache cannot serve the timed pass), the
    file's blocks are read in row-major order with ``read(window=block)``.
    With ``threads > 1`` each thread opens its own handle and takes a
    contiguous share of the blocks.
    """
    import rasterio

    env = dict(GDAL_CACHEMAX=GDAL_CACHE_BYTES, GDAL_NUM_THREADS=1)
    with rasterio.Env(**env), rasterio.open(path) as ds:
        windows = [w for _, w in ds.block_windows(1)]
        ds.read(1, window=windows[0])

    def work(share) -> float:
        total = 0.0
        with rasterio.Env(**env), rasterio.open(path) as ds:
            for w in share:
                total += float(np.nansum(ds.read(1, window=w)))
        return total

    clock = Clock()
    if threads == 1:
        work(windows)
    else:
        bounds = np.linspace(0, len(windows), threads + 1).astype(int)
        shares = [windows[a:b] for a, b in zip(bounds[:-1], bounds[1:], strict=True)]
        with ThreadPoolExecutor(threads) as pool:
            list(pool.map(work, shares))
    return clock.stop()


def _open(path):
    from covextract.io.rasters import open_layer

    return open_layer(path)


def _release(src, collect: bool = True) -> None:
    close = getattr(src, "close", None)
    if close is not None:
        close()
    del src
    if collect:
        # about 40 ms with the scene's geometries alive: never inside a clock
        # that spans several steps (series, first/second run)
        gc.collect()


def cx_build(path, geoms, rule: str, collect: bool = True):
    """``(seconds, WeightSet)`` of ``build_weights`` on the grid of ``path``."""
    from covextract.engine.zonal import build_weights

    src = _open(path)
    try:
        return _timed(build_weights, geoms, src.grid, rule)
    finally:
        _release(src, collect)


def cx_pass(
    path, geoms, stats, *, rule, weighting, weights, threads=None, source=None, collect=True
):
    """``(seconds, ZonalResult)`` of one ``zonal`` pass with prebuilt weights.

    The raster is opened inside the timed region (as a run does), unless an
    in-memory ``source`` is given.
    """
    from covextract.engine.zonal import zonal

    clock = Clock()
    src = source if source is not None else _open(path)
    res = zonal(
        src,
        geoms,
        stats,
        rule=rule,
        area_weighting=weighting,
        weights=weights,
        **_threads_kw(threads),
    )
    dt = clock.stop()
    if source is None:
        _release(src, collect)
    return dt, res


def _pass_split(report: Report, name: str, res) -> None:
    """Record the engine's own read / reduce split of a pass when it reports one."""
    for attr in ("read_seconds", "reduce_seconds"):
        v = getattr(res, attr, None)
        if isinstance(v, int | float) and v > 0:
            report.record(f"{name} [engine {attr}, summed over threads]", float(v))


def _stat_names():
    from covextract.stats.names import parse_stat

    return [parse_stat(s) for s in STATS]


def rasterstats_run(path, geoms, nodata):
    """``(seconds, list of dict)`` of rasterstats ``zonal_stats`` (center rule)."""
    from rasterstats import zonal_stats

    return _timed(
        zonal_stats, list(geoms), str(path), stats=list(STATS), nodata=nodata, all_touched=False
    )


def compare_with_rasterstats(values: dict, ref: list, index: np.ndarray) -> dict:
    """Compare covextract ``values[stat][index]`` with rasterstats' per-unit dicts.

    Reference: rasterstats ``zonal_stats`` with ``all_touched=False`` on the
    same polygons and raster (the reference named in REFERENCES.md for the
    ``center`` rule). count, min and max must be equal; sum and mean within
    :data:`SUM_RTOL`; a statistic missing in one must be missing in both.
    """
    out = {"units": int(len(index)), "stats": {}}
    bad_total = 0
    for s in STATS:
        ours = np.asarray(values[s], dtype=np.float64)[index]
        theirs = np.array([np.nan if r[s] is None else float(r[s]) for r in ref])
        miss_o, miss_t = np.isnan(ours), np.isnan(theirs)
        both = ~miss_o & ~miss_t
        rel = np.zeros(ours.size)
        with np.errstate(invalid="ignore", divide="ignore"):
            rel[both] = np.abs(ours[both] - theirs[both]) / np.maximum(np.abs(theirs[both]), 1e-300)
        tol = 0.0 if s in ("count", "min", "max") else SUM_RTOL
        bad = (miss_o != miss_t) | (both & (rel > tol))
        bad_total += int(bad.sum())
        out["stats"][s] = {
            "mismatches": int(bad.sum()),
            "max_rel_diff": float(rel.max()) if rel.size else 0.0,
            "tolerance": tol,
            "first_bad_units": [int(index[i]) for i in np.flatnonzero(bad)[:5]],
        }
    out["mismatches"] = bad_total
    worst = max(out["stats"][s]["max_rel_diff"] for s in ("sum", "mean"))
    empty = int(np.sum(np.asarray(values["count"])[index] == 0))
    out["summary"] = (
        f"{out['units']} units ({empty} without valid pixels): count/min/max "
        f"{sum(out['stats'][s]['mismatches'] for s in ('count', 'min', 'max'))} mismatches; "
        f"sum/mean max rel diff {worst:.1e} (tol {SUM_RTOL:g}): "
        + ("OK" if bad_total == 0 else f"{bad_total} MISMATCHES")
    )
    return out


def _values_equal(a: dict, b: dict, names) -> bool:
    return all(np.array_equal(np.asarray(a[s]), np.asarray(b[s]), equal_nan=True) for s in names)


def check_series(base: dict, steps: list) -> dict:
    """Each step's statistics follow from the first step's by its scale and offset.

    Step ``k`` stores the same numbers with scale ``s`` and offset ``o``, so
    its physical values are ``v·s + o`` (computed in that order, in float64,
    by the reader): counts are equal, min and max are exactly ``min·s + o``
    (rounding is monotonic), and the weighted mean is ``mean·s + o`` up to
    float64 rounding (checked to 1e-12 relative). Worked out by hand.
    """
    bad = []
    for k, vals in enumerate(steps):
        s, o = step_scaling(k)
        ok = np.array_equal(vals["count"], base["count"])
        for stat in ("min", "max"):
            ok &= np.array_equal(vals[stat], np.asarray(base[stat]) * s + o, equal_nan=True)
        exp = np.asarray(base["mean"]) * s + o
        fin = np.isfinite(exp)
        ok &= np.array_equal(np.isfinite(vals["mean"]), fin)
        ok &= bool(np.allclose(vals["mean"][fin], exp[fin], rtol=1e-12, atol=0))
        if not ok:
            bad.append(k)
    return {
        "steps": len(steps),
        "mismatches": len(bad),
        "bad_steps": bad,
        "summary": f"{len(steps)} steps vs step 0 rescaled (count, min, max exact; mean 1e-12): "
        + ("OK" if not bad else f"steps {bad} differ"),
    }


class InMemorySource:
    """The scene raster held decoded in memory, for timing the per-block CPU work alone.

    ``read_block`` is a slice, so a pass over it costs the masking, the
    conversion to physical values and the accumulation, without decoding.
    """

    def __init__(self, source, array: np.ndarray) -> None:
        self.grid = source.grid
        self._source = source
        self._array = array

    def read_block(self, window):
        """Stored values of ``(row_off, col_off, rows, cols)`` (a view)."""
        r0, c0, h, w = window
        return self._array[r0 : r0 + h, c0 : c0 + w]

    def to_values(self, stored):
        """Physical values and valid mask, as the file's source computes them."""
        return self._source.to_values(stored)


# ------------------------------------------------------------------ phases
def warm_up_engine(scene: Scene, polys, report: Report | None = None) -> None:
    """Untimed passes that pay the process's once-only costs before any timing.

    Weights of a few polygons under both rules and a pass over them (imports,
    loading the compiled kernels, or compiling them in a fresh environment,
    thread pool, driver start-up), then one read of every block of the raster
    through the engine's source: the first full read in a process grows
    GDAL's block cache from nothing (page faults; 0.05-0.25 s of system time
    on the quick scene, measured), which later passes and the floor, measured
    after it, do not pay. Its time is recorded (not used in any ratio).
    """
    from covextract.engine.zonal import build_weights

    few = polys[:5]
    src = _open(scene.raster)
    build_weights(few, src.grid, "center")  # loads (or first compiles) its kernel
    ws = build_weights(few, src.grid, "overlap")
    _release(src)
    cx_pass(scene.raster, few, _stat_names(), rule="overlap", weighting="auto", weights=ws)
    src = _open(scene.raster)
    clock = Clock()
    for window in src.grid.block_windows():
        src.read_block(window)
    t = clock.stop()
    _release(src)
    if report is not None:
        report.record("warm-up: first read of every block in the process (no ratio)", t)


def run_equality(scene: Scene, report: Report, polys, bufs, state: dict) -> None:
    """Center rule vs rasterstats on all polygons and a subset of buffers; timings kept."""
    spec = scene.spec
    stats = _stat_names()
    path = scene.raster

    _log("polygons, center rule: covextract")
    t_b, ws = cx_build(path, polys, "center")
    t_p, res = cx_pass(path, polys, stats, rule="center", weighting="off", weights=ws)
    report.record("polygons center: build_weights", t_b)
    report.record("polygons center: zonal pass", t_p)
    _pass_split(report, "polygons center: zonal pass", res)
    state["poly_center"] = (t_b, t_p, ws)
    _log(f"  build {t_b:.2f} s, pass {t_p:.2f} s; rasterstats on {len(polys)} polygons")
    t_rs, ref = rasterstats_run(path, polys, spec.nodata)
    report.record(f"polygons: rasterstats zonal_stats ({len(polys)} polygons)", t_rs)
    state["rs_poly"] = t_rs
    report.equality["polygons (center)"] = compare_with_rasterstats(
        res.values, ref, np.arange(len(polys))
    )
    _log(f"  rasterstats {t_rs:.2f} s; {report.equality['polygons (center)']['summary']}")
    _abort_on_mismatch(report)

    _log(f"buffers, center rule: covextract on {len(bufs)} buffers")
    t_b, ws = cx_build(path, bufs, "center")
    t_p, res = cx_pass(path, bufs, stats, rule="center", weighting="off", weights=ws)
    report.record("buffers center: build_weights", t_b)
    report.record("buffers center: zonal pass", t_p)
    _pass_split(report, "buffers center: zonal pass", res)
    state["buf_center"] = (t_b, t_p, ws)
    state["buf_center_values"] = res.values
    n_sub = min(len(bufs), RS_BUFFER_SUBSET.get(spec.name, 200))
    sub = np.unique(np.linspace(0, len(bufs) - 1, n_sub).astype(int))
    _log(f"  build {t_b:.2f} s, pass {t_p:.2f} s; rasterstats on {sub.size} buffers")
    t_rs, ref = rasterstats_run(path, bufs[sub], spec.nodata)
    report.record(f"buffers: rasterstats zonal_stats ({sub.size} of {len(bufs)} buffers)", t_rs)
    state["rs_buf"] = Seconds(t_rs * len(bufs) / sub.size, t_rs.cpu * len(bufs) / sub.size)
    state["rs_buf_subset"] = int(sub.size)
    report.equality["buffers (center, subset)"] = compare_with_rasterstats(res.values, ref, sub)
    _log(f"  rasterstats {t_rs:.2f} s; {report.equality['buffers (center, subset)']['summary']}")
    _abort_on_mismatch(report)


def _abort_on_mismatch(report: Report) -> None:
    bad = [k for k, eq in report.equality.items() if eq["mismatches"]]
    if bad:
        raise BenchmarkAbort(
            f"covextract center results differ from rasterstats for {', '.join(bad)}; "
            "see the equality section (first_bad_units in the JSON). Fix the engine "
            "before timing it."
        )


def run_floor(scene: Scene, report: Report, state: dict) -> None:
    """Read-and-nansum floor of the main raster, 1 and 2 threads."""
    _log("floor: every block read once and nansum-ed")
    f1 = floor_pass(scene.raster, threads=1)
    f2 = floor_pass(scene.raster, threads=2)
    report.record("floor: read + nansum, 1 thread", f1)
    report.record("floor: read + nansum, 2 threads", f2)
    state["floor"] = f1
    state["floor2"] = f2
    _log(f"  1 thread {f1:.2f} s, 2 threads {f2:.2f} s")


def run_overlap(scene: Scene, report: Report, polys, bufs, state: dict) -> None:
    """Overlap rule, same statistics and weighting as the center runs."""
    stats = _stat_names()
    path = scene.raster
    for name, geoms in (("polygons", polys), ("buffers", bufs)):
        _log(f"{name}, overlap rule")
        t_b, ws = cx_build(path, geoms, "overlap")
        t_p, res = cx_pass(path, geoms, stats, rule="overlap", weighting="off", weights=ws)
        report.record(f"{name} overlap: build_weights", t_b)
        report.record(f"{name} overlap: zonal pass", t_p)
        _pass_split(report, f"{name} overlap: zonal pass", res)
        state[f"{name}_overlap"] = (t_b, t_p, ws.n_entries)
        _log(f"  build {t_b:.2f} s, pass {t_p:.2f} s, {ws.n_entries} entries")
        del ws, res
        gc.collect()


def run_cache_and_series(scene: Scene, report: Report, polys, state: dict, tmp: Path) -> None:
    """First run (weights built, stored) vs second run (weights from the cache); the series."""
    from covextract.state.cache import WeightCache, weights_key

    stats = _stat_names()
    path = scene.raster
    src = _open(path)
    grid = src.grid
    _release(src)
    key = weights_key(grid.fingerprint, units_fingerprint(polys, "villages"), "overlap")

    _log("first run (weights built and stored) and second run (weights from the cache)")
    cache = WeightCache(tmp / "state-first")
    clock = Clock()
    ws = cache.get(key)
    if ws is not None:
        raise RuntimeError("the benchmark's fresh weights cache already holds this key")
    t_b, ws = cx_build(path, polys, "overlap", collect=False)
    cache.put(key, ws)
    t_p, first = cx_pass(
        path, polys, stats, rule="overlap", weighting="auto", weights=ws, collect=False
    )
    t_first = clock.stop()
    del ws
    gc.collect()
    cache2 = WeightCache(tmp / "state-first")
    clock = Clock()
    ws2 = cache2.get(key)
    if ws2 is None:
        raise RuntimeError("the weights stored by the first run were not found by the second")
    t_get = clock.stop()
    _, second = cx_pass(
        path, polys, stats, rule="overlap", weighting="auto", weights=ws2, collect=False
    )
    t_second = clock.stop()
    gc.collect()
    report.record("cache: first run (build + store + pass)", t_first)
    report.record("cache: second run (load + pass)", t_second)
    report.record("cache: second run, load only", t_get)
    state["first"] = t_first
    state["second"] = t_second
    same = _values_equal(first.values, second.values, STATS)
    report.equality["cache (first vs second run)"] = {
        "mismatches": 0 if same else 1,
        "summary": "second run's values bit-identical to the first: "
        + ("OK" if same else "DIFFER"),
    }
    _log(f"  first {t_first:.2f} s, second {t_second:.2f} s (load {t_get:.2f} s)")

    n = len(scene.series)
    _log(f"series: {n} rasters, weights built once (overlap, area weighting auto)")
    clock = Clock()
    t_sb, ws3 = cx_build(scene.series[0], polys, "overlap", collect=False)
    steps = []
    for p in scene.series:
        _, res = cx_pass(
            p, polys, stats, rule="overlap", weighting="auto", weights=ws3, collect=False
        )
        steps.append(res.values)
    t_series = clock.stop()
    gc.collect()
    report.record(f"series: build once + {n} zonal passes", t_series)
    report.record("series: of which build_weights", t_sb)
    report.equality["series (rescaled steps)"] = check_series(steps[0], steps)
    same0 = _values_equal(steps[0], first.values, STATS)
    report.equality["series step 0 vs main raster"] = {
        "mismatches": 0 if same0 else 1,
        "summary": "step 0 (a byte copy) gives the main raster's values: "
        + ("OK" if same0 else "DIFFER"),
    }
    _log(f"  {t_series:.2f} s; floor of the {n} rasters")
    floors = [floor_pass(p, threads=1) for p in scene.series]
    t_floor = Seconds(sum(floors), sum(f.cpu for f in floors))
    report.record(f"series: floor of the {n} rasters, 1 thread", t_floor)
    state["series"] = (t_series, t_sb, t_floor, n)
    _log(f"  floor {t_floor:.2f} s")


def run_threads(scene: Scene, report: Report, polys, bufs, state: dict) -> None:
    """1 vs 2 threads: the read (floor), the per-block work alone, and whole passes."""
    import rasterio

    if not zonal_supports("threads"):
        report.notes.append(
            "zonal() has no threads= keyword: only the read (floor) could be timed at "
            "1 vs 2 threads"
        )
        return
    stats = _stat_names()
    path = scene.raster
    _, _, ws_b = state["buf_center"]
    _, _, ws_p = state["poly_center"]
    _log("threads: per-block work on the decoded raster held in memory (buffers, center)")
    src = _open(path)
    with rasterio.Env(GDAL_CACHEMAX=GDAL_CACHE_BYTES), rasterio.open(path) as ds:
        array = ds.read(1)
    mem = InMemorySource(src, array)
    runs = {}
    for t in (1, 2):
        dt, res = cx_pass(
            None, bufs, stats, rule="center", weighting="off", weights=ws_b, threads=t, source=mem
        )
        report.record(f"threads: buffers pass, blocks from memory, {t} thread(s)", dt)
        runs[t] = (dt, res.values)
    state["accum"] = (runs[1][0], runs[2][0])
    same = _values_equal(runs[1][1], runs[2][1], STATS)
    same &= _values_equal(runs[1][1], state["buf_center_values"], STATS)
    report.equality["threads (1 vs 2, bit-identical)"] = {
        "mismatches": 0 if same else 1,
        "summary": "buffers: 1-thread, 2-thread and file-read values bit-identical: "
        + ("OK" if same else "DIFFER"),
    }
    del mem, array, runs
    _release(src)

    for name, geoms, ws in (("buffers", bufs, ws_b), ("polygons", polys, ws_p)):
        _log(f"threads: whole {name} pass (center) from the file, 1 and 2 threads")
        times = []
        for t in (1, 2):
            dt, res = cx_pass(
                path, geoms, stats, rule="center", weighting="off", weights=ws, threads=t
            )
            report.record(f"threads: {name} pass from the file, {t} thread(s)", dt)
            _pass_split(report, f"threads: {name} pass from the file, {t} thread(s)", res)
            times.append(dt)
        state[f"pass_threads_{name}"] = tuple(times)


def add_ratios(report: Report, state: dict) -> None:
    """Turn the timings into the ratios of the issue, with targets.

    Each ratio is computed twice, from wall times (judged against the
    target) and from process CPU times (the ``cpu`` column).
    """

    def add(key, label, formula, note=""):
        wall = formula(float)
        try:
            cpu = formula(_cpu)
        except (AttributeError, ZeroDivisionError):
            cpu = None
        report.add(key, label, wall, note=note, cpu=cpu)

    fl = state["floor"]
    pb, pp, _ = state["poly_center"]
    bb, bp, _ = state["buf_center"]
    add(
        "polygons_vs_rasterstats",
        "polygons: rasterstats / covextract (center, first run)",
        lambda g: g(state["rs_poly"]) / (g(pb) + g(pp)),
    )
    add(
        "polygons_vs_floor",
        "polygons: covextract (center, first run) / floor",
        lambda g: (g(pb) + g(pp)) / g(fl),
    )
    add(
        "polygons_cached_vs_floor",
        "polygons: covextract pass only (weights given) / floor",
        lambda g: g(pp) / g(fl),
    )
    add(
        "buffers_vs_rasterstats",
        "buffers: rasterstats (scaled) / covextract (center, first run)",
        lambda g: g(state["rs_buf"]) / (g(bb) + g(bp)),
        note=f"rasterstats timed on {state['rs_buf_subset']} buffers and scaled linearly",
    )
    add(
        "buffers_vs_floor",
        "buffers: covextract (center, first run) / floor",
        lambda g: (g(bb) + g(bp)) / g(fl),
    )
    for name, (cb, cp) in (("polygons", (pb, pp)), ("buffers", (bb, bp))):
        if f"{name}_overlap" in state:
            ob, op, _ = state[f"{name}_overlap"]
            add(
                f"overlap_vs_center_{name}",
                f"{name}: overlap / center (first runs)",
                lambda g, ob=ob, op=op, cb=cb, cp=cp: (g(ob) + g(op)) / (g(cb) + g(cp)),
            )
            add(
                f"overlap_vs_center_build_{name}",
                f"{name}: overlap / center (build_weights only)",
                lambda g, ob=ob, cb=cb: g(ob) / g(cb),
            )
    if "first" in state:
        add(
            "second_vs_first",
            "polygons: second run (cached weights) / first run",
            lambda g: g(state["second"]) / g(state["first"]),
        )
    if "series" in state:
        ts, tsb, tf, n = state["series"]
        add(
            "series_vs_floor",
            f"series: {n} steps (one build + {n} passes) / floor of the {n}",
            lambda g: g(ts) / g(tf),
        )
        add(
            "series_passes_vs_floor",
            f"series: {n} passes only / floor of the {n}",
            lambda g: (g(ts) - g(tsb)) / g(tf),
        )
        add(
            "series_floor_vs_24_floor",
            f"series: floor of the {n} / ({n} x main floor)",
            lambda g: g(tf) / (n * g(fl)),
        )
    add(
        "floor_speedup_2_threads",
        "read floor: 1-thread / 2-thread time (speed-up)",
        lambda g: g(fl) / g(state["floor2"]),
    )
    if "accum" in state:
        a1, a2 = state["accum"]
        add(
            "accumulation_speedup_2_threads",
            "per-block work (blocks from memory): 1-thread / 2-thread time",
            lambda g: g(a1) / g(a2),
        )
    for name in ("buffers", "polygons"):
        if f"pass_threads_{name}" in state:
            t1, t2 = state[f"pass_threads_{name}"]
            add(
                f"pass_speedup_2_threads_{name}",
                f"{name} pass from the file: 1-thread / 2-thread time",
                lambda g, t1=t1, t2=t2: g(t1) / g(t2),
            )


# ------------------------------------------------------------------ memory
def _memory_entries() -> list[str]:
    import covextract.engine.zonal as zmod

    entries = ["zonal"]
    if hasattr(zmod, "zonal_units"):
        entries.append("zonal_units")
    return entries


def run_memory(scene: Scene, report: Report, cap_gib: float) -> None:
    """Peak RSS of a subprocess running the buffers with q90 on a > 6 GB mosaic."""
    mosaic = scene.mosaic()
    time_bin = "/usr/bin/time" if Path("/usr/bin/time").exists() else None
    spec = scene.spec
    report.info["memory"] = (
        f"mosaic {mosaic.side} x {mosaic.side} px ({mosaic.repeat}x{mosaic.repeat} copies of the "
        f"scene raster), {mosaic.pixels / 1e9:.2f}e9 pixels (2^31 = 2.15e9), "
        f"{mosaic.uncompressed_bytes / 1e9:.1f} GB uncompressed; {spec.n_buffers} buffers of "
        f"{spec.buffer_m:g} m, stats count/mean/q90, overlap rule, area weighting auto; "
        f"address space capped at {cap_gib:g} GiB"
    )
    if time_bin is None:
        report.notes.append(
            "/usr/bin/time is missing: peak memory is "
            "resource.getrusage(RUSAGE_CHILDREN).ru_maxrss, the largest of all children so far"
        )
    for entry in _memory_entries():
        with tempfile.TemporaryDirectory(prefix="covextract-mem-") as tmp:
            out = Path(tmp) / "child.json"
            params = {
                "vrt": str(mosaic.path),
                "repeat": mosaic.repeat,
                "side": mosaic.side,
                "tile": spec.size,
                "pixel_deg": spec.pixel_deg,
                "west": spec.west,
                "north": spec.north,
                "n": spec.n_buffers,
                "buffer_m": spec.buffer_m,
                "seed": spec.seed,
                "entry": entry,
                "out": str(out),
            }
            cmd = [
                sys.executable,
                "-m",
                "tests.benchmarks.bench_engine",
                "--memory-child",
                json.dumps(params),
            ]
            if time_bin:
                cmd = [time_bin, "-v", *cmd]
            env = dict(os.environ)
            env["PYTHONPATH"] = os.pathsep.join(
                [str(REPO_ROOT)] + ([env["PYTHONPATH"]] if env.get("PYTHONPATH") else [])
            )
            cap = int(cap_gib * GIB)

            def limit(cap=cap):
                resource.setrlimit(resource.RLIMIT_AS, (cap, cap))

            _log(
                f"memory: {entry} on the mosaic in a subprocess"
                + (" under /usr/bin/time -v" if time_bin else "")
            )
            t0 = time.perf_counter()
            proc = subprocess.run(
                cmd,
                cwd=REPO_ROOT,
                env=env,
                capture_output=True,
                text=True,
                preexec_fn=limit,
                check=False,
            )
            wall = time.perf_counter() - t0
            if time_bin:
                m = re.search(r"Maximum resident set size \(kbytes\): (\d+)", proc.stderr)
                peak = int(m.group(1)) * 1024 if m else None
            else:
                peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024
            child = json.loads(out.read_text()) if out.exists() else {}
        report.record(f"memory: {entry} subprocess wall time", wall)
        ok = proc.returncode == 0 and child.get("ok", False)
        note = ""
        if proc.returncode != 0:
            tail = proc.stderr.strip().splitlines()
            err = next((ln for ln in reversed(tail) if "Error" in ln), tail[-1] if tail else "")
            note = f"child failed (exit {proc.returncode}): {err.strip()[:160]}"
        elif child:
            parts = [f"{child['entries']:,} weight entries"] if child.get("entries") else []
            parts.append(f"{child['blocks_read']} blocks read in {child['seconds']:.1f} s")
            parts.append(f"beyond-2^31 check: {child['check']}")
            note = "; ".join(parts)
        gib = peak / GIB if peak is not None else None
        row = report.add(
            "peak_memory", f"peak RSS, {entry}() on the mosaic (q90 on)", gib, unit="GiB", note=note
        )
        if not ok:
            row.status = "MISS"
        report.equality[f"mosaic beyond 2^31 pixels ({entry})"] = {
            "mismatches": 0 if child.get("check") == "OK" else 1,
            "summary": f"{child.get('check', 'not run')}",
        }
        shown = "n/a" if gib is None else f"{gib:.2f}"
        _log(f"  peak {shown} GiB, {wall:.1f} s, exit {proc.returncode}")


def memory_child(params: dict) -> int:
    """The measured subprocess: buffers with q90 on the mosaic, then a >2^31-pixel check."""
    import shapely

    from covextract.engine import zonal as zmod
    from covextract.io.rasters import open_layer
    from covextract.stats.names import parse_stat
    from covextract.units.buffers import geodesic_buffers

    mosaic = Mosaic(
        Path(params["vrt"]),
        params["repeat"],
        params["side"],
        params["pixel_deg"],
        params["west"],
        params["north"],
    )
    lon, lat = mosaic_buffer_centres(mosaic, params["n"], params["buffer_m"], params["seed"])
    bufs = geodesic_buffers(lon, lat, params["buffer_m"])
    src = open_layer(mosaic.path)
    stats = [parse_stat(s) for s in ("count", "mean", "q90")]
    result = {"ok": False, "entry": params["entry"]}
    t0 = time.perf_counter()
    if params["entry"] == "zonal_units":
        res = zmod.zonal_units(src, bufs, stats, rule="overlap")
        result["entries"] = None
    else:
        ws = zmod.build_weights(bufs, src.grid, "overlap")
        result["entries"] = ws.n_entries
        res = zmod.zonal(src, bufs, stats, rule="overlap", weights=ws)
        del ws
    result["seconds"] = time.perf_counter() - t0
    result["blocks_read"] = int(res.blocks_read)
    result["units_with_values"] = int(np.sum(np.asarray(res.values["count"]) > 0))
    del res
    gc.collect()

    # Polygons in the last copy, at pixel indices beyond 2^31, against the same
    # shapes moved into the first copy: the mosaic repeats the data, so the
    # values must agree (count, min, max exactly; sum, mean to float64 rounding).
    k, tile, px = mosaic.repeat, params["tile"], mosaic.pixel_deg
    rng = np.random.default_rng([params["seed"], 4])
    row0 = max((2**31) // mosaic.side + 50, (k - 1) * tile + 50)
    rows = rng.uniform(row0, mosaic.side - 50, 40)
    cols = rng.uniform((k - 1) * tile + 50, mosaic.side - 50, 40)
    polys = []
    for r, c in zip(rows, cols, strict=True):
        ang = (np.arange(9) + rng.uniform(0.05, 0.95, 9)) * (2 * np.pi / 9)
        rad = rng.uniform(5.0, 15.0, 9)
        polys.append(
            shapely.Polygon(
                np.c_[
                    mosaic.west + (c + rad * np.cos(ang)) * px,
                    mosaic.north - (r + rad * np.sin(ang)) * px,
                ]
            )
        )
    far = np.array(polys, dtype=object)
    shift = (k - 1) * tile * px
    near = np.array(
        [shapely.transform(p, lambda xy: xy - np.array([shift, -shift])) for p in far], dtype=object
    )
    names = [parse_stat(s) for s in STATS]
    a = zmod.zonal(src, far, names, rule="center", area_weighting="off")
    b = zmod.zonal(src, near, names, rule="center", area_weighting="off")
    exact = all(
        np.array_equal(a.values[s], b.values[s], equal_nan=True) for s in ("count", "min", "max")
    )
    close = all(
        np.allclose(a.values[s], b.values[s], rtol=1e-12, atol=0, equal_nan=True)
        for s in ("sum", "mean")
    )
    filled = int(np.sum(np.asarray(a.values["count"]) > 0))
    result["check"] = (
        f"OK ({filled}/40 polygons at pixel rows >= {int(row0)} equal their copies)"
        if exact and close and filled > 30
        else f"DIFFER (exact {exact}, close {close}, {filled} with pixels)"
    )
    result["ok"] = True
    Path(params["out"]).write_text(json.dumps(result))
    return 0


# ----------------------------------------------------------------- profile
def run_profile(scene: Scene, report: Report, polys, bufs, folder: Path) -> None:
    """cProfile of the engine calls (one thread, so the profile sees all the work)."""
    from covextract.engine.zonal import build_weights, zonal

    stats = _stat_names()
    folder.mkdir(parents=True, exist_ok=True)
    src = _open(scene.raster)
    cases = [
        ("build_polygons_center", lambda: build_weights(polys, src.grid, "center")),
        ("build_polygons_overlap", lambda: build_weights(polys, src.grid, "overlap")),
        ("build_buffers_center", lambda: build_weights(bufs, src.grid, "center")),
        ("build_buffers_overlap", lambda: build_weights(bufs, src.grid, "overlap")),
    ]
    ws_b = build_weights(bufs, src.grid, "center")
    cases.append(
        (
            "pass_buffers_center_1thread",
            lambda: zonal(
                _open(scene.raster),
                bufs,
                stats,
                rule="center",
                area_weighting="off",
                weights=ws_b,
                **_threads_kw(1),
            ),
        )
    )
    ws_p = build_weights(polys, src.grid, "overlap")
    cases.append(
        (
            "pass_polygons_overlap_1thread",
            lambda: zonal(
                _open(scene.raster), polys, stats, rule="overlap", weights=ws_p, **_threads_kw(1)
            ),
        )
    )
    for name, fn in cases:
        _log(f"profile: {name}")
        prof = cProfile.Profile()
        prof.runcall(fn)
        path = folder / f"{name}.prof"
        prof.dump_stats(str(path))
        buf = io.StringIO()
        pstats.Stats(prof, stream=buf).sort_stats("tottime").print_stats(12)
        text = buf.getvalue()
        report.info.setdefault("profiles", {})[name] = str(path)
        print(f"\n---- profile {name} (top 12 by own time; full file {path}) ----")
        print(text[text.find("ncalls") - 1 :] if "ncalls" in text else text)
    _release(src)


# -------------------------------------------------------------------- main
def _versions() -> str:
    import rasterio
    import rasterstats
    import shapely

    return (
        f"python {platform.python_version()}, numpy {np.__version__}, "
        f"shapely {shapely.__version__}, "
        f"rasterio {rasterio.__version__} (GDAL {rasterio.__gdal_version__}), "
        f"rasterstats {rasterstats.__version__}"
    )


def run(args, report: Report) -> Report:
    """Run every phase of one benchmark, filling ``report``."""
    spec = QUICK if args.quick else FULL
    scene = ensure_scene(spec, log=_log)
    size_mb = scene.raster.stat().st_size / 1e6
    report.info["scene"] = (
        f"{spec.size} x {spec.size} px float32 ({spec.uncompressed_bytes / 1e6:.0f} MB "
        f"uncompressed, {size_mb:.0f} MB DEFLATE), EPSG:4326, {spec.pixel_deg} deg pixels, "
        f"tiles {spec.tile}; {spec.n_polygons} village polygons 1-3 km; {spec.n_buffers} buffers "
        f"of {spec.buffer_m:g} m; series of {spec.n_steps} rasters (byte copies with other "
        f"scale/offset tags); folder {scene.folder}"
    )
    report.info["machine"] = (
        f"{os.cpu_count()} cores, load average at start {os.getloadavg()[0]:.2f}; {_versions()}"
    )
    report.info["engine"] = "zonal(threads=) " + (
        "present: passes use the engine's default threads unless a thread count is stated"
        if zonal_supports("threads")
        else "absent"
    )
    polys = scene.polygons()
    bufs = scene.buffers()
    _log("warming the page cache with the scene's files")
    warm_page_cache([scene.raster, *scene.series])
    state: dict = {}
    with tempfile.TemporaryDirectory(prefix="covextract-bench-") as tmp:
        warm_up_engine(scene, polys, report)
        run_equality(scene, report, polys, bufs, state)
        run_floor(scene, report, state)
        run_threads(scene, report, polys, bufs, state)
        # the buffers' weights are large (12 bytes per entry); free them before
        # the overlap weights are built
        state.pop("buf_center_values", None)
        tb, tp, ws = state["buf_center"]
        state["buf_center"] = (tb, tp, None)
        del ws
        gc.collect()
        run_overlap(scene, report, polys, bufs, state)
        run_cache_and_series(scene, report, polys, state, Path(tmp))
    add_ratios(report, state)
    report.info["machine"] += f"; load average after the timed phases {os.getloadavg()[0]:.2f}"
    state.clear()
    gc.collect()
    if args.memory:
        run_memory(scene, report, args.memory_cap_gib)
    if args.profile:
        run_profile(scene, report, polys, bufs, scene.folder / "profiles")
    return report


def main(argv=None) -> int:
    """Command line entry point; returns the exit status."""
    parser = argparse.ArgumentParser(
        prog="python -m tests.benchmarks.bench_engine",
        description="Benchmark the covextract engine on a synthetic scene "
        "(see tests/benchmarks/README.md).",
    )
    parser.add_argument("--quick", action="store_true", help="the small scene (4000 x 4000 px)")
    parser.add_argument(
        "--memory",
        action="store_true",
        help="also measure peak memory on a >6 GB VRT mosaic (slow)",
    )
    parser.add_argument(
        "--memory-cap-gib",
        type=float,
        default=8.0,
        help="address-space limit of the memory subprocess, GiB (default 8), "
        "so a run that does not bound its memory fails instead of exhausting RAM",
    )
    parser.add_argument("--profile", action="store_true", help="also print cProfile summaries")
    parser.add_argument(
        "--json",
        type=Path,
        default=None,
        help="where to write the results (default <scene folder>/results.json)",
    )
    parser.add_argument("--memory-child", default=None, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.memory_child is not None:
        return memory_child(json.loads(args.memory_child))

    spec = QUICK if args.quick else FULL
    report = Report(mode=spec.name)
    try:
        run(args, report)
        status = 0
    except BenchmarkAbort as exc:
        report.aborted = str(exc)
        status = 2
    print()
    print(format_report(report))
    from tests.benchmarks.scene import scene_root

    out = args.json or (scene_root() / spec.name / "results.json")
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps(report.to_json(), indent=1))
    print(f"results written to {out}")
    return status


if __name__ == "__main__":
    sys.exit(main())
