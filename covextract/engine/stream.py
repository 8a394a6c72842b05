"""Streaming a raster through a weight set: each block read once per pass.

Blocks are independent tasks: read the block, mask it, reduce it to a
:class:`~covextract.engine.reduce.BlockPartial`. They run as dask tasks on
local threads (by default one per core: GeoTIFF decoding and the compiled
reduction release the GIL; each local task takes a few consecutive blocks so
dask's per-task cost is paid once for them), inline with one thread, or one
block per task on a dask.distributed cluster. Tasks are submitted in
bounded batches and their partials merged in the fixed order of the weight
set, so memory stays bounded and the result is bit-identical whatever the
number of threads or workers.
"""

from __future__ import annotations

import os
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from covextract.core.grid import Grid
from covextract.engine.reduce import Accumulator, reduce_block, reduce_block_runs
from covextract.engine.weights import WeightSet, expand_runs, merge_parts

__all__ = ["PassStats", "stream_pass", "entry_areas", "default_threads"]


def default_threads() -> int:
    """Threads used when none are asked for: one per usable core.

    GeoTIFF decoding and the compiled block reduction release the GIL, and
    the local pool costs about 20 µs per block, so a second thread pays: on
    the scale benchmark (2 cores) a buffers pass took 0.64x the time of one
    thread. Values are bit-identical whatever the count (partials are merged
    in block order); ``threads=`` / ``--threads`` overrides it.
    """
    try:
        n = len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - platforms without affinity
        n = os.cpu_count() or 1
    return max(1, n)


def entry_areas(grid: Grid, window, pix: np.ndarray) -> np.ndarray:
    """True ground area (m²) of the pixels ``pix`` of block ``window``."""
    r0, c0, _, w = window
    rows = r0 + pix // w
    if grid.is_geographic or not grid.area_varies:
        return grid.pixel_areas(rows)
    return grid.pixel_areas(rows, c0 + pix % w)


@dataclass
class PassStats:
    """What one pass did: blocks read, seconds spent reading and reducing, workers."""

    blocks: int = 0
    read_seconds: float = 0.0
    reduce_seconds: float = 0.0
    workers: set = field(default_factory=set)


def _worker_name() -> str:
    # a dask.distributed worker has imported distributed; looking the module up
    # costs nothing elsewhere (an import attempt per block cost 70 µs)
    dist = sys.modules.get("distributed")
    if dist is not None:
        try:
            return dist.get_worker().address
        except ValueError:
            pass
    return f"local:{os.getpid()}"


_LOCAL = np.arange(1 << 20, dtype=np.int64)


def _continuous_reducer(weighting, thresholds, keep):
    def reduce(unit, pix, cov, values, valid, areas, factor=None):
        return reduce_block(
            unit,
            pix,
            cov,
            values.ravel(),
            valid.ravel(),
            areas,
            weighting=weighting,
            thresholds=thresholds,
            keep_distribution=keep,
            factor=None if factor is None else factor.ravel()[pix],
        )

    def reduce_runs(entries, runs, values, valid, grid, window):
        r0, c0, h, w = window
        if grid.is_geographic or not grid.area_varies:
            # one area per row: the runs take it as a scalar each
            run_areas, pixel_areas = grid.pixel_areas(r0 + runs[1] // w), None
        else:
            # projected areas cost a coordinate transformation per pixel: only
            # at the runs' pixels (the kernel reads no other) unless they fill the block
            if int(runs[2].sum(dtype=np.int64)) >= h * w // 2:
                pix = np.arange(h * w, dtype=np.int64)
            else:
                pix = expand_runs(*runs)[1]
            pixel_areas = np.zeros(h * w)
            rows, cols = np.divmod(pix, w)
            pixel_areas[pix] = grid.pixel_areas(r0 + rows, c0 + cols)
            run_areas = None
        values, valid = values.ravel(), valid.ravel()
        part = reduce_block_runs(
            entries,
            runs,
            values,
            valid,
            entry_areas(grid, window, entries[1]),
            run_areas=run_areas,
            pixel_areas=pixel_areas,
            weighting=weighting,
            thresholds=thresholds,
        )
        if keep:
            # percentiles: the (unit, value, weight) triples of valid pixels as
            # well; the moments stay the run reduction's, so asking for a
            # percentile never changes a unit's mean
            unit, pix, cov = merge_parts(window, *entries, *runs)
            ok = valid[pix]
            wt = cov * entry_areas(grid, window, pix) if weighting else cov
            part.dist = (unit[ok].astype(np.int32), values[pix][ok], wt[ok])
        return part

    reduce.gathers = True  # accepts values already gathered at the weights' pixels
    # every block goes to the run reduction except when a per-pixel weight
    # factor (known only once the block is read) sends it to the per-pixel path
    reduce.runs = reduce_runs
    return reduce


#: Most consecutive blocks in one local dask task, and the tasks each thread
#: should get at least (load balance); a task of several blocks pays dask's
#: per-task cost once.
GROUP_BLOCKS = 16
TASKS_PER_THREAD = 8


def _group_task(source, grid, items, reducer):
    """Several blocks in one task: their results in block order."""
    return [_block_task(source, grid, window, parts, reducer) for window, parts in items]


def _block_task(source, grid, window, parts, reducer):
    entries, runs = parts
    t0 = time.perf_counter()
    stored = source.read_block(window)
    t1 = time.perf_counter()
    # the compiled run reduction costs per covered pixel whatever share of the
    # block the weights use, so it takes every block it can (no percentiles,
    # no per-pixel weight factor)
    reduce_runs = getattr(reducer, "runs", None)
    if reduce_runs is None:
        unit, pix, cov = merge_parts(window, *entries, *runs)
        if getattr(source, "elementwise", False) and getattr(reducer, "gathers", False):
            # The source converts pixel by pixel: convert only the pixels the weights use
            # (a few hundred of a tile's 65 536 for village polygons), not the whole block.
            areas = entry_areas(grid, window, pix)
            values, valid = source.to_values(np.asarray(stored).ravel()[pix])
            part = reducer(
                unit,
                _LOCAL[: pix.size] if pix.size <= _LOCAL.size else np.arange(pix.size),
                cov,
                values,
                valid,
                areas,
            )
            t2 = time.perf_counter()
            return part, t1 - t0, t2 - t1, _worker_name()
    out = source.to_values(stored)
    if reduce_runs is not None:
        if len(out) == 2:
            part = reduce_runs(entries, runs, out[0], out[1], grid, window)
            t2 = time.perf_counter()
            return part, t1 - t0, t2 - t1, _worker_name()
        # a per-pixel weight factor: the per-pixel path
        unit, pix, cov = merge_parts(window, *entries, *runs)
    areas = entry_areas(grid, window, pix)
    if len(out) == 3:  # a weighted source: (values, valid, per-pixel weight factor)
        part = reducer(unit, pix, cov, out[0], out[1], areas, factor=out[2])
    else:
        part = reducer(unit, pix, cov, out[0], out[1], areas)
    t2 = time.perf_counter()
    return part, t1 - t0, t2 - t1, _worker_name()


def stream_pass(
    weights: WeightSet,
    grid: Grid,
    source,
    *,
    weighting: bool,
    thresholds=(),
    keep_distribution: bool = False,
    progress: Callable | None = None,
    threads: int | None = None,
    client=None,
    batch: int | None = None,
    reducer: Callable | None = None,
    accumulator=None,
) -> tuple[Accumulator, PassStats]:
    """Read every block that holds weights once and accumulate per-unit sums.

    Parameters
    ----------
    weights : WeightSet
        Weights on ``grid``.
    grid : Grid
        The raster's grid.
    source : object
        ``read_block(window) -> stored array`` and ``to_values(stored) ->
        (float64 values, valid mask)``; must be picklable for a cluster.
    weighting : bool
        Weight means, spreads and percentiles by true pixel area.
    thresholds : tuple of float
        For ``area_above`` / ``share_above``.
    keep_distribution : bool
        Keep valid (unit, value, weight) triples for percentiles.
    progress : callable, optional
        Called with the number of blocks finished.
    threads : int, optional
        Local threads (default: :func:`default_threads`); 1 runs inline.
    client : distributed.Client, optional
        Run the block tasks on this cluster instead of local threads.
    batch : int, optional
        Tasks in flight at once (default 4 per thread or worker thread).
    reducer, accumulator : optional
        Another reduction: ``reducer(unit, pix, cov, values, valid, areas) ->
        partial`` (a picklable callable) and an object whose ``merge(partial)``
        adds it; ``values``/``valid`` are what ``source.to_values`` returns.
        Default: the continuous statistics of :mod:`covextract.engine.reduce`.

    Notes
    -----
    Partials are merged in the fixed order of ``weights.windows``, so the
    result does not depend on how blocks are scheduled.
    """
    if weights.grid_fingerprint != grid.fingerprint:
        raise ValueError("weights were built for another grid")
    thresholds = tuple(thresholds)
    if reducer is None:
        acc = Accumulator(weights.n_units, thresholds, keep_distribution)
        reducer = _continuous_reducer(weighting, thresholds, keep_distribution)
    else:
        acc = accumulator
    stats = PassStats()
    n = len(weights.windows)
    threads = default_threads() if threads is None else max(1, int(threads))
    args = (reducer,)

    def merge(result) -> None:
        part, t_read, t_reduce, worker = result
        acc.merge(part)
        stats.blocks += 1
        stats.read_seconds += t_read
        stats.reduce_seconds += t_reduce
        stats.workers.add(worker)

    if client is None and threads == 1:
        for b in range(n):
            window, *parts = weights.block_parts(b)
            merge(_block_task(source, grid, window, parts, *args))
            if progress is not None:
                progress(1)
        return acc, stats

    if client is not None:
        nthreads = sum(client.nthreads().values()) or 1
        batch = batch or 4 * nthreads
        for start in range(0, n, batch):
            futures = []
            for b in range(start, min(n, start + batch)):
                window, *parts = weights.block_parts(b)
                futures.append(
                    client.submit(_block_task, source, grid, window, parts, *args, pure=False)
                )
            for result in client.gather(futures):
                merge(result)
            if progress is not None:
                progress(len(futures))
        return acc, stats

    # local threads: dask tasks of several consecutive blocks each (dask's threaded
    # scheduler costs about 1 ms per task here, a block about as much), a bounded
    # number of tasks per compute call, partials merged in block order
    import dask

    group = max(1, min(GROUP_BLOCKS, n // (threads * TASKS_PER_THREAD)))
    per_call = batch or 4 * threads
    task = dask.delayed(_group_task, pure=False)
    step = group * per_call
    for start in range(0, n, step):
        jobs = []
        for g0 in range(start, min(n, start + step), group):
            items = []
            for b in range(g0, min(n, g0 + group)):
                window, *parts = weights.block_parts(b)
                items.append((window, parts))
            jobs.append(task(source, grid, items, *args))
        done = 0
        for results in dask.compute(*jobs, scheduler="threads", num_workers=threads):
            for result in results:
                merge(result)
                done += 1
        if progress is not None:
            progress(done)
    return acc, stats
