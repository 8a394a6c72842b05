"""Streaming a raster through a weight set: each block read once per pass."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from covextract.engine.grid import Grid
from covextract.engine.reduce import Accumulator, reduce_block
from covextract.engine.weights import WeightSet

__all__ = ["stream_pass", "entry_areas"]


def entry_areas(grid: Grid, window, pix: np.ndarray) -> np.ndarray:
    """True ground area (m²) of the pixels ``pix`` of block ``window``."""
    r0, c0, _, w = window
    rows = r0 + pix // w
    if grid.is_geographic or not grid.area_varies:
        return grid.pixel_areas(rows)
    return grid.pixel_areas(rows, c0 + pix % w)


def stream_pass(
    weights: WeightSet,
    grid: Grid,
    read_block: Callable,
    to_values: Callable,
    *,
    weighting: bool,
    thresholds=(),
    keep_distribution: bool = False,
    progress: Callable | None = None,
) -> Accumulator:
    """Read every block that holds weights once and accumulate per-unit sums.

    Parameters
    ----------
    weights : WeightSet
        Weights on ``grid``.
    grid : Grid
        The raster's grid.
    read_block : callable
        ``window -> stored array`` (one band).
    to_values : callable
        ``stored array -> (float64 values, valid mask)``.
    weighting : bool
        Weight means, spreads and percentiles by true pixel area.
    thresholds : tuple of float
        For ``area_above`` / ``share_above``.
    keep_distribution : bool
        Keep valid (unit, value, weight) triples for percentiles.
    progress : callable, optional
        Called with the number of blocks done after each block.

    Notes
    -----
    Partials are merged in the fixed order of ``weights.windows``, so the
    result does not depend on how blocks are scheduled.
    """
    if weights.grid_fingerprint != grid.fingerprint:
        raise ValueError("weights were built for another grid")
    acc = Accumulator(weights.n_units, tuple(thresholds), keep_distribution)
    for b in range(len(weights.windows)):
        window, unit, pix, cov = weights.block(b)
        stored = read_block(window)
        values, valid = to_values(stored)
        part = reduce_block(
            unit,
            pix,
            cov,
            values.ravel(),
            valid.ravel(),
            entry_areas(grid, window, pix),
            weighting=weighting,
            thresholds=thresholds,
            keep_distribution=keep_distribution,
        )
        acc.merge(part)
        if progress is not None:
            progress(1)
    return acc
