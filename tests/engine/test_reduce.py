"""Block reduction and merging: exact sums, stable variance, order-independent."""

import numpy as np
from numpy.testing import assert_allclose

from covextract.engine.finish import finalize
from covextract.engine.reduce import Accumulator, reduce_block
from covextract.stats.names import parse_stat

STATS = [
    parse_stat(s)
    for s in (
        "count",
        "sum",
        "mean",
        "std",
        "min",
        "max",
        "density_total",
        "area_km2",
        "area_above",
        "share_above",
    )
]


def _entries(rng, n_units, n_pix):
    unit = np.sort(rng.integers(0, n_units, size=n_pix * 2)).astype(np.int32)
    pix = rng.integers(0, n_pix, size=unit.size).astype(np.int32)
    cov = rng.uniform(0.05, 1.0, size=unit.size).astype(np.float32)
    return unit, pix, cov


def test_blocks_merged_equal_one_block_and_numpy():
    # Reference: numpy.average and the weighted population variance (ddof = 0).
    rng = np.random.default_rng(3)
    n_units, n_pix = 6, 400
    unit, pix, cov = _entries(rng, n_units, n_pix)
    values = 300.0 + rng.normal(
        0, 0.01, size=n_pix
    )  # kelvin-like: raw sums of squares would cancel
    valid = rng.uniform(size=n_pix) > 0.2
    areas = rng.uniform(0.9e4, 1.1e4, size=unit.size)

    whole = Accumulator(n_units, (300.0,))
    whole.merge(
        reduce_block(unit, pix, cov, values, valid, areas, weighting=True, thresholds=(300.0,))
    )

    split = Accumulator(n_units, (300.0,))
    cuts = [0, 100, 400, 650, unit.size]
    for s, e in zip(cuts[:-1], cuts[1:], strict=True):
        order = np.argsort(unit[s:e], kind="stable")
        split.merge(
            reduce_block(
                unit[s:e][order],
                pix[s:e][order],
                cov[s:e][order],
                values,
                valid,
                areas[s:e][order],
                weighting=True,
                thresholds=(300.0,),
            )
        )

    a = finalize(whole, STATS, offgrid_w=np.zeros(n_units), threshold=300.0)
    b = finalize(split, STATS, offgrid_w=np.zeros(n_units), threshold=300.0)
    for k in a:
        assert_allclose(a[k], b[k], rtol=1e-12, atol=1e-12)

    for u in range(n_units):
        sel = (unit == u) & valid[pix]
        w = cov[sel].astype(float) * areas[sel]
        v = values[pix[sel]]
        mean = np.average(v, weights=w)
        assert_allclose(a["mean"][u], mean, rtol=1e-14)
        assert_allclose(a["std"][u], np.sqrt(np.average((v - mean) ** 2, weights=w)), rtol=1e-9)
        assert a["count"][u] == sel.sum()
        assert_allclose(a["sum"][u], np.sum(cov[sel] * v), rtol=1e-12)
        assert_allclose(a["density_total"][u], np.sum(cov[sel] * v * areas[sel]) / 1e6, rtol=1e-12)
        assert a["min"][u] == v.min() and a["max"][u] == v.max()
        hit = v > 300.0
        assert_allclose(a["share_above"][u], w[hit].sum() / w.sum(), rtol=1e-12)
        allsel = unit == u
        assert_allclose(a["area_km2"][u], np.sum(cov[allsel] * areas[allsel]) / 1e6, rtol=1e-12)


def test_unit_without_valid_pixels_is_missing_not_zero():
    unit = np.array([0, 0, 1], dtype=np.int32)
    pix = np.array([0, 1, 2], dtype=np.int32)
    cov = np.ones(3, dtype=np.float32)
    values = np.array([1.0, 2.0, 3.0])
    valid = np.array([False, False, True])
    acc = Accumulator(3)
    acc.merge(reduce_block(unit, pix, cov, values, valid, np.ones(3), weighting=False))
    out = finalize(
        acc,
        [parse_stat(s) for s in ("count", "valid_share", "sum", "mean", "min")],
        offgrid_w=np.zeros(3),
    )
    assert out["count"].tolist() == [0, 1, 0]
    assert out["valid_share"].tolist() == [0.0, 1.0, 0.0]
    for k in ("sum", "mean", "min"):
        assert np.isnan(out[k][0]) and np.isnan(out[k][2])
        assert out[k][1] == 3.0


def test_offgrid_part_counts_as_invalid():
    unit = np.zeros(2, dtype=np.int32)
    acc = Accumulator(1)
    acc.merge(
        reduce_block(
            unit,
            np.array([0, 1], np.int32),
            np.ones(2, np.float32),
            np.array([5.0, 7.0]),
            np.ones(2, bool),
            np.ones(2),
            weighting=False,
        )
    )
    out = finalize(acc, [parse_stat("valid_share")], offgrid_w=np.array([2.0]))
    assert_allclose(out["valid_share"], [0.5])
