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

__all__ = ["block_shift", "emit_cells", "overlap_cells", "reduce_runs_block"]


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


@njit(nogil=True, cache=True)
def _crossings(u0, u1):  # pragma: no cover - compiled
    """Integer values of ``u`` strictly inside ``[u0, u1]`` (their number)."""
    lo = min(u0, u1)
    hi = max(u0, u1)
    n = np.ceil(hi) - np.floor(lo) - 1.0
    return int(n) if n > 0 else 0


@njit(nogil=True, cache=True)
def _split_point(u0, v0, u1, v1, n, j):  # pragma: no cover - compiled
    """Piece ``j`` (of ``n + 1``) of the segment cut at integer ``u``: ``(ua, va, ub, vb)``.

    The same arithmetic for every piece, so neighbouring pieces share their
    crossing point exactly.
    """
    up = u1 > u0
    step = 1.0 if up else -1.0
    base = np.floor(u0) if up else np.ceil(u0)
    if j == 0:
        ua = u0
        va = v0
    else:
        ua = base + step * j
        va = v0 + (ua - u0) * ((v1 - v0) / (u1 - u0))
    if j == n:
        ub = u1
        vb = v1
    else:
        ub = base + step * (j + 1)
        vb = v0 + (ub - u0) * ((v1 - v0) / (u1 - u0))
    return ua, va, ub, vb


@njit(nogil=True, cache=True)
def _sort_bucket(col, area, cover, bnd, lo, hi):  # pragma: no cover - compiled
    """Stable sort of the events ``lo:hi`` by column, in place (insertion sort, short rows)."""
    for i in range(lo + 1, hi):
        c = col[i]
        a = area[i]
        v = cover[i]
        b = bnd[i]
        j = i - 1
        while j >= lo and col[j] > c:
            col[j + 1] = col[j]
            area[j + 1] = area[j]
            cover[j + 1] = cover[j]
            bnd[j + 1] = bnd[j]
            j -= 1
        col[j + 1] = c
        area[j + 1] = a
        cover[j + 1] = v
        bnd[j + 1] = b


@njit(nogil=True, cache=True)
def overlap_cells(unit, x0, y0, x1, y1, sign):  # pragma: no cover - compiled
    """Signed-area accumulation of polygon edges over the pixel lattice.

    Edges (sorted by unit) are in unit-local pixel coordinates. Each edge is
    cut at every integer column, each piece at every integer row; a piece in
    cell ``(r, c)`` adds ``dy·((c + 1) − x_mid)`` to the cell and its height
    ``dy`` to the running cover of the cells right of it (an event at
    ``c + 1``). Unit by unit, events are gathered by a counting sort on the
    row and sorted by column within the row; each distinct cell gets its
    area plus the running cover. Scratch space is one unit's pieces, reused.

    Returns ``(unit, row, col, value, run, run_len, boundary)`` of the cells,
    sorted by unit, row, column: ``run`` is the cover carried to the cells
    after the cell (``run_len`` of them, 0 for the last in its row), and
    ``boundary`` whether a piece of positive length crosses the cell's interior.
    """
    ne = unit.size
    # upper bounds of the pieces (one per edge plus one per integer
    # crossing): in all, and of the largest unit
    cap = 0
    unit_cap = 0
    acc = 0
    for i in range(ne):
        n = 1 + _crossings(x0[i], x1[i]) + _crossings(y0[i], y1[i])
        cap += n
        acc += n
        if i + 1 == ne or unit[i + 1] != unit[i]:
            unit_cap = max(unit_cap, acc)
            acc = 0
    p_row = np.empty(unit_cap, np.int64)
    p_col = np.empty(unit_cap, np.int64)
    p_area = np.empty(unit_cap)
    p_dy = np.empty(unit_cap)
    p_bnd = np.empty(unit_cap, np.bool_)
    e_col = np.empty(2 * unit_cap, np.int64)
    e_area = np.empty(2 * unit_cap)
    e_cover = np.empty(2 * unit_cap)
    e_bnd = np.empty(2 * unit_cap, np.bool_)
    # every piece gives at most two cells (np.empty: pages never written cost nothing)
    out_cap = 2 * cap
    c_unit = np.empty(out_cap, np.int32)
    c_row = np.empty(out_cap, np.int32)
    c_col = np.empty(out_cap, np.int32)
    c_value = np.empty(out_cap)
    c_run = np.empty(out_cap)
    c_len = np.empty(out_cap, np.int32)
    c_bnd = np.empty(out_cap, np.bool_)
    k = 0
    i = 0
    while i < ne:
        u = unit[i]
        # ---- the unit's pieces
        m = 0
        while i < ne and unit[i] == u:
            nx = _crossings(x0[i], x1[i])
            for jx in range(nx + 1):
                xa, ya, xb, yb = _split_point(x0[i], y0[i], x1[i], y1[i], nx, jx)
                ny = _crossings(ya, yb)
                for jy in range(ny + 1):
                    # split along y: the roles of x and y swap
                    qa, pa, qb, pb = _split_point(ya, xa, yb, xb, ny, jy)
                    xm = 0.5 * (pa + pb)
                    ym = 0.5 * (qa + qb)
                    c = np.floor(xm)
                    dy = (qb - qa) * sign[i]
                    on_line = (pa == pb and pa == np.floor(pa)) or (qa == qb and qa == np.floor(qa))
                    p_row[m] = int(np.floor(ym))
                    p_col[m] = int(c)
                    p_area[m] = dy * ((c + 1.0) - xm)
                    p_dy[m] = dy
                    p_bnd[m] = (pa != pb or qa != qb) and not on_line
                    m += 1
            i += 1
        if m == 0:
            continue
        # ---- events by row (counting sort), then by column within the row
        rmin = p_row[0]
        rmax = p_row[0]
        for q in range(m):
            rmin = min(rmin, p_row[q])
            rmax = max(rmax, p_row[q])
        nrow = rmax - rmin + 1
        offs = np.zeros(nrow + 1, np.int64)
        for q in range(m):
            offs[p_row[q] - rmin + 1] += 2
        for r in range(nrow):
            offs[r + 1] += offs[r]
        fill = offs[:-1].copy()
        for q in range(m):
            r = p_row[q] - rmin
            f = fill[r]
            # the piece's own cell, then the cover event in the next cell
            e_col[f] = p_col[q]
            e_area[f] = p_area[q]
            e_cover[f] = 0.0
            e_bnd[f] = p_bnd[q]
            e_col[f + 1] = p_col[q] + 1
            e_area[f + 1] = 0.0
            e_cover[f + 1] = p_dy[q]
            e_bnd[f + 1] = False
            fill[r] = f + 2
        for r in range(nrow):
            lo = offs[r]
            hi = offs[r + 1]
            if lo == hi:
                continue
            if hi - lo <= 64:
                _sort_bucket(e_col, e_area, e_cover, e_bnd, lo, hi)
            else:
                # long rows (long near-horizontal edges, jagged outlines): a merge sort
                order = np.argsort(e_col[lo:hi], kind="mergesort") + lo
                e_col[lo:hi] = e_col[order]
                e_area[lo:hi] = e_area[order]
                e_cover[lo:hi] = e_cover[order]
                e_bnd[lo:hi] = e_bnd[order]
            running = 0.0
            first = k
            e = lo
            while e < hi:
                col = e_col[e]
                a = 0.0
                cov = 0.0
                b = False
                while e < hi and e_col[e] == col:
                    a += e_area[e]
                    cov += e_cover[e]
                    b = b or e_bnd[e]
                    e += 1
                running += cov
                c_unit[k] = u
                c_row[k] = r + rmin
                c_col[k] = col
                c_value[k] = a + running
                c_run[k] = running
                c_bnd[k] = b
                c_len[k] = 0
                if k > first:
                    c_len[k - 1] = col - c_col[k - 1] - 1
                k += 1
    return (
        c_unit[:k],
        c_row[:k],
        c_col[:k],
        c_value[:k],
        c_run[:k],
        c_len[:k],
        c_bnd[:k],
    )


@njit(nogil=True, cache=True)
def _snap_one(v, tol):  # pragma: no cover - compiled
    """Weights within ``tol`` of 1 (accumulation noise) are 1; none above 1."""
    if abs(v - 1.0) <= tol:
        return 1.0
    return min(v, 1.0)


@njit(nogil=True, cache=True)
def _clip_cell(
    cu, cr, cc, value, run, run_len, bnd, ox, oy, width, height, floor, snap, touched, i
):  # pragma: no cover - compiled
    """Cell ``i`` on the grid: what :func:`emit_cells` keeps of it and of its run."""
    v = _snap_one(value[i], snap)
    rv = _snap_one(run[i], snap)
    u = cu[i]
    gr = cr[i] + oy[u]
    gc = cc[i] + ox[u]
    row_on = gr >= 0 and gr < height
    ck = (v >= floor and v > 0) or (touched and bnd[i])
    keep = ck and row_on and gc >= 0 and gc < width
    w_cell = 1.0 if touched else v
    w_run = 1.0 if touched else rv
    length = run_len[i] if (rv >= floor and rv > 0) else 0
    rs = max(gc + 1, 0)
    re = min(gc + length, width - 1)
    ro = max(re - rs + 1, 0) if row_on else 0
    return u, gr, gc, ck, keep, w_cell, w_run, length, rs, ro


@njit(nogil=True, cache=True)
def emit_cells(
    cu, cr, cc, value, run, run_len, bnd, ox, oy, width, height, floor, snap, touched, mode, offgrid
):  # pragma: no cover - compiled
    """Clip the cells of :func:`overlap_cells` to the grid and emit weights.

    ``ox``/``oy`` are the units' integer origins (cells are unit-local).
    Weights within ``snap`` of 1 are 1. A cell is kept when its weight is at
    least ``floor`` (and positive), or, with ``touched``, when the boundary
    crosses it; a run when the cover it carries is. With ``touched`` every
    kept pixel weighs 1. Weight falling off the grid is added to
    ``offgrid[unit]`` (in place) without enumerating off-grid pixels.

    ``mode`` 0: every pixel an entry. 1 (interior runs): runs of weight
    exactly 1 stay runs, every cell and every other run becomes entries, so a
    cell whose weight only rounds to 1 is never assumed interior. 2 (touched):
    cells become runs of one pixel, joined with the runs that touch them.

    Returns entries ``(unit, row, col, weight)`` and runs ``(unit, row,
    start, stop)``, each sorted by unit, row, column.
    """
    n = cu.size
    n_entries = 0
    n_runs = 0
    for i in range(n):
        u, gr, gc, ck, keep, w_cell, w_run, length, rs, ro = _clip_cell(
            cu, cr, cc, value, run, run_len, bnd, ox, oy, width, height, floor, snap, touched, i
        )
        offgrid[u] += (w_cell if (ck and not keep) else 0.0) + w_run * (length - ro)
        if mode == 0:
            n_entries += keep + ro
        elif mode == 1:
            n_entries += keep
            if ro > 0 and w_run == 1.0:
                n_runs += 1
            else:
                n_entries += ro
        else:
            n_runs += keep + (ro > 0)
    eu = np.empty(n_entries, np.int64)
    er = np.empty(n_entries, np.int64)
    ec = np.empty(n_entries, np.int64)
    ew = np.empty(n_entries)
    ru = np.empty(n_runs, np.int64)
    rr = np.empty(n_runs, np.int64)
    ra = np.empty(n_runs, np.int64)
    rb = np.empty(n_runs, np.int64)
    p = 0
    q = 0
    for i in range(n):
        u, gr, gc, ck, keep, w_cell, w_run, length, rs, ro = _clip_cell(
            cu, cr, cc, value, run, run_len, bnd, ox, oy, width, height, floor, snap, touched, i
        )
        if mode == 2:
            # disjoint segments in increasing column order: join those that touch
            for seg in range(2):
                if seg == 0:
                    if not keep:
                        continue
                    a = gc
                    b = gc + 1
                else:
                    if ro == 0:
                        continue
                    a = rs
                    b = rs + ro
                if q > 0 and ru[q - 1] == u and rr[q - 1] == gr and rb[q - 1] == a:
                    rb[q - 1] = b
                else:
                    ru[q] = u
                    rr[q] = gr
                    ra[q] = a
                    rb[q] = b
                    q += 1
            continue
        if keep:
            eu[p] = u
            er[p] = gr
            ec[p] = gc
            ew[p] = w_cell
            p += 1
        if ro == 0:
            continue
        if mode == 1 and w_run == 1.0:
            ru[q] = u
            rr[q] = gr
            ra[q] = rs
            rb[q] = rs + ro
            q += 1
        else:
            for j in range(ro):
                eu[p] = u
                er[p] = gr
                ec[p] = rs + j
                ew[p] = w_run
                p += 1
    return (eu[:p], er[:p], ec[:p], ew[:p]), (ru[:q], rr[:q], ra[:q], rb[:q])
