"""Compiled inner loops of the engine (numba, ``nogil``, cached on disk).

Each kernel is a plain loop over the items it is given (runs of a block,
polygon edge pieces) whose numpy formulation would need temporaries of the
size of the whole block or a sort of every piece. They hold no state, sum in
a fixed order and release the GIL, so results do not depend on the number of
threads that call them. The first call in a fresh environment compiles them
(a few seconds, once: ``cache=True`` keeps the machine code beside the module
or in numba's cache folder); later processes load them in milliseconds.
"""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = ["block_shift", "reduce_runs_block"]


@njit(nogil=True, cache=True)
def block_shift(values, valid):  # pragma: no cover - compiled
    """A valid value of the block near the mean of its valid values (0 without any).

    Deviations are summed around it so that Σw·(v−s)² keeps its digits for
    values like 300 K ± 0.01; taking an actual value of the block (not the
    mean itself) makes a constant field give deviations, and spreads, of
    exactly 0. A regular sample of the block is enough to find it: every 61st
    pixel, or every pixel when none of those is valid.
    """
    n = values.size
    for step in (61, 1):
        total = 0.0
        k = 0
        for p in range(0, n, step):
            if valid[p]:
                total += values[p]
                k += 1
        if k:
            mean = total / k
            best = 0.0
            gap = np.inf
            for p in range(0, n, step):
                if valid[p]:
                    g = abs(values[p] - mean)
                    if g < gap:
                        gap = g
                        best = values[p]
            return best
    return 0.0


@njit(nogil=True, cache=True)
def reduce_runs_block(
    values,
    valid,
    eu,
    ep,
    ec,
    ea,
    ru,
    rs,
    rl,
    run_areas,
    pixel_areas,
    per_pixel_area,
    weighting,
    shift,
    thresholds,
):  # pragma: no cover - compiled
    """Per-unit sums of one block from its entries and runs (both sorted by unit).

    Entries ``(eu, ep, ec)`` with true areas ``ea``; runs ``(ru, rs, rl)`` of
    weight 1 with one area per run (``run_areas``) or, when
    ``per_pixel_area``, the area of every pixel of the block (``pixel_areas``).
    Deviations are summed around ``shift`` (a valid value of the block) and
    turned into the mean (kept within the unit's extremes) and Σw·(v − mean)²
    per unit at the end. Each unit's entries are
    summed first, in their order, then its runs, each run on its own first.

    Returns ``units`` (sorted) and per unit ``(w_all, area_all, count, w,
    mean, m2, csum, dens, vmin, vmax, above_area, above_w)``; the last two
    have one row per threshold.
    """
    ne = eu.size
    nr = ru.size
    nt = thresholds.size
    cap = ne + nr
    units = np.empty(cap, np.int64)
    w_all = np.zeros(cap)
    area = np.zeros(cap)
    count = np.zeros(cap, np.int64)
    wsum = np.zeros(cap)
    s1 = np.zeros(cap)
    s2 = np.zeros(cap)
    csum = np.zeros(cap)
    dens = np.zeros(cap)
    vmin = np.full(cap, np.inf)
    vmax = np.full(cap, -np.inf)
    above_area = np.zeros((nt, cap))
    above_w = np.zeros((nt, cap))
    hits = np.zeros(nt)
    hits_a = np.zeros(nt)
    i = 0
    j = 0
    k = 0
    while i < ne or j < nr:
        if j >= nr or (i < ne and eu[i] <= ru[j]):
            u = eu[i]
        else:
            u = ru[j]
        units[k] = u
        while i < ne and eu[i] == u:
            c = ec[i]
            a = ea[i]
            w = c * a if weighting else c
            w_all[k] += w
            ca = c * a / 1e6
            area[k] += ca
            p = ep[i]
            if valid[p]:
                v = values[p]
                d = v - shift
                count[k] += 1
                wsum[k] += w
                s1[k] += w * d
                s2[k] += w * d * d
                cv = c * v
                csum[k] += cv
                dens[k] += cv * a / 1e6
                if v < vmin[k]:
                    vmin[k] = v
                if v > vmax[k]:
                    vmax[k] = v
                for t in range(nt):
                    if v > thresholds[t]:
                        above_area[t, k] += ca
                        above_w[t, k] += w
            i += 1
        while j < nr and ru[j] == u:
            start = rs[j]
            n = rl[j]
            rc = 0.0
            rv = 0.0
            rd = 0.0
            rd2 = 0.0
            r_a = 0.0
            r_oka = 0.0
            r_okad = 0.0
            r_okad2 = 0.0
            r_okav = 0.0
            lo = np.inf
            hi = -np.inf
            hits[:] = 0.0
            hits_a[:] = 0.0
            for p in range(start, start + n):
                if per_pixel_area:
                    pa = pixel_areas[p]
                    r_a += pa
                if valid[p]:
                    v = values[p]
                    d = v - shift
                    rc += 1.0
                    rv += v
                    rd += d
                    rd2 += d * d
                    if per_pixel_area:
                        r_oka += pa
                        r_okav += pa * v
                        r_okad += pa * d
                        r_okad2 += pa * (d * d)
                    if v < lo:
                        lo = v
                    if v > hi:
                        hi = v
                    for t in range(nt):
                        if v > thresholds[t]:
                            hits[t] += 1.0
                            if per_pixel_area:
                                hits_a[t] += pixel_areas[p]
            count[k] += np.int64(rc)
            # sums of values directly, not shift·n + Σ(v − shift): a field of
            # non-negative values keeps non-negative sums
            csum[k] += rv
            if lo < vmin[k]:
                vmin[k] = lo
            if hi > vmax[k]:
                vmax[k] = hi
            if per_pixel_area:
                area[k] += r_a / 1e6
                dens[k] += r_okav / 1e6
                if weighting:
                    w_all[k] += r_a
                    wsum[k] += r_oka
                    s1[k] += r_okad
                    s2[k] += r_okad2
                else:
                    w_all[k] += n
                    wsum[k] += rc
                    s1[k] += rd
                    s2[k] += rd2
                for t in range(nt):
                    above_area[t, k] += hits_a[t] / 1e6
                    above_w[t, k] += hits_a[t] if weighting else hits[t]
            else:
                a = run_areas[j]
                wf = a if weighting else 1.0
                w_all[k] += n * wf
                area[k] += n * a / 1e6
                wsum[k] += rc * wf
                s1[k] += rd * wf
                s2[k] += rd2 * wf
                dens[k] += rv * a / 1e6
                for t in range(nt):
                    above_area[t, k] += hits[t] * a / 1e6
                    above_w[t, k] += hits[t] * wf
            j += 1
        k += 1
    mean = np.empty(k)
    m2 = np.zeros(k)
    for q in range(k):
        if wsum[q] > 0:
            rel = s1[q] / wsum[q]
            # a mean lies within the unit's extremes: keeping it there makes a
            # constant field's mean exactly its value and a non-negative
            # field's mean non-negative, where shift + rel could round past them
            mean[q] = min(max(shift + rel, vmin[q]), vmax[q])
            m2[q] = max(s2[q] - s1[q] * rel, 0.0)
        else:
            mean[q] = np.nan
        if count[q] == 0:
            vmin[q] = np.nan
            vmax[q] = np.nan
    return (
        units[:k],
        w_all[:k],
        area[:k],
        count[:k],
        wsum[:k],
        mean,
        m2,
        csum[:k],
        dens[:k],
        vmin[:k],
        vmax[:k],
        above_area[:, :k],
        above_w[:, :k],
    )
