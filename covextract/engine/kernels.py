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

__all__ = ["area_weights", "center_runs", "group_by_block", "reduce_runs_block"]


@njit(nogil=True, cache=True)
def _row_offsets(rows, m, per):
    """Counting-sort offsets of ``rows[:m]``: ``(first row, offsets)``, ``per`` slots per item.

    Items of row ``rmin + r`` go to slots ``offs[r]:offs[r + 1]``.
    """
    rmin = rows[0]
    rmax = rows[0]
    for q in range(m):
        rmin = min(rmin, rows[q])
        rmax = max(rmax, rows[q])
    nrow = rmax - rmin + 1
    offs = np.zeros(nrow + 1, np.int64)
    for q in range(m):
        offs[rows[q] - rmin + 1] += per
    for r in range(nrow):
        offs[r + 1] += offs[r]
    return rmin, offs


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
    thresholds,
):  # pragma: no cover - compiled
    """Per-unit sums of one block from its entries and runs (both sorted by unit).

    Entries ``(eu, ep, ec)`` with true areas ``ea``; runs ``(ru, rs, rl)`` of
    weight 1 with one area per run (``run_areas``) or, when
    ``per_pixel_area``, the area of every pixel of the block (``pixel_areas``).
    Each unit's deviations d = v − shift are summed around its own first
    valid value in the block (its entries first, then its runs) and turned
    into the mean (``shift + Σw·d/Σw``, kept within the unit's extremes) and
    Σw·(v − mean)² per unit at the end. Taken per unit, not per block, the
    shift lies within the unit's own values, so Σw·d² keeps its digits
    however far the block's other units are (0.3 next to 3e5), and a unit
    whose valid values are all equal gets deviations, and a spread, of
    exactly 0. Each unit's entries are summed first, in their order, then
    its runs, each run on its own first.

    Returns ``units`` (sorted) and per unit ``(w_all, area_all, count, w,
    mean, m2, csum, dens, vmin, vmax, above_area, above_w, shift, rel)``;
    ``above_area`` and ``above_w`` have one row per threshold, ``shift`` is
    the unit's value the deviations were taken around and ``rel`` = Σw·d/Σw
    (NaN where Σw = 0), so that ``mean`` ≈ ``shift + rel`` with ``rel`` not
    rounded to the magnitude of the values (for the merge across blocks).
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
    shifts = np.zeros(cap)
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
        # the shift is set at the unit's first valid pixel, in the loops
        # below: a scan ahead for it would read the invalid pixels before it
        # twice (6 % of the covered pixels in the benchmark's cloudy scene)
        shift = 0.0
        found = False
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
                if not found:
                    shift = v
                    found = True
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
            first = start
            if not found:
                # up to the unit's first valid pixel, which becomes its shift;
                # the invalid pixels before it add only their areas
                while first < start + n and not valid[first]:
                    if per_pixel_area:
                        r_a += pixel_areas[first]
                    first += 1
                if first < start + n:
                    shift = values[first]
                    found = True
            for p in range(first, start + n):
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
        shifts[k] = shift
        k += 1
    mean = np.empty(k)
    m2 = np.zeros(k)
    rels = np.full(k, np.nan)
    for q in range(k):
        if wsum[q] > 0:
            rel = s1[q] / wsum[q]
            rels[q] = rel
            # a unit of equal values has s1 = s2 = 0 exactly (its shift is
            # one of them), so its mean is that value and m2 is 0; otherwise
            # shift + rel could round past the unit's extremes (a mean of
            # non-negative values below 0): keep it within them
            mean[q] = min(max(shifts[q] + rel, vmin[q]), vmax[q])
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
        shifts[:k],
        rels,
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
def _snap_one(v, tol):  # pragma: no cover - compiled
    """Weights within ``tol`` of 1 (accumulation noise) are 1; none above 1."""
    if abs(v - 1.0) <= tol:
        return 1.0
    return min(v, 1.0)


@njit(nogil=True, cache=True)
def _grown(a, n):  # pragma: no cover - compiled
    """``a`` copied into an array of at least ``n`` items (doubling)."""
    b = np.empty(max(2 * a.size, n), a.dtype)
    b[: a.size] = a
    return b


@njit(nogil=True, cache=True)
def _trim(a, n):  # pragma: no cover - compiled
    """The first ``n`` items of ``a``; a copy when that frees more than half of it."""
    return a[:n].copy() if n < a.size // 2 else a[:n]


@njit(nogil=True, cache=True, inline="always")
def _clip(
    row, col, value, run, bnd, run_len, ox, oy, width, height, floor, snap, touched, mode
):  # pragma: no cover - compiled
    """One cell of :func:`area_weights` on the grid.

    Returns ``(keep, ro, as_run, gr, gc, rs, wc, wr, lost)``: whether the
    cell is an on-grid weight, how many pixels of its run are on the grid
    (from column ``rs``), whether that run stays a run, the cell's grid row
    and column, the weights of the cell and of its run, and the weight lost
    off the grid.
    """
    v = _snap_one(value, snap)
    rv = _snap_one(run, snap)
    gr = row + oy
    gc = col + ox
    row_on = gr >= 0 and gr < height
    ck = (v >= floor and v > 0) or (touched and bnd)
    keep = ck and row_on and gc >= 0 and gc < width
    wc = 1.0 if touched else v
    wr = 1.0 if touched else rv
    length = run_len if (rv >= floor and rv > 0) else 0
    rs = max(gc + 1, 0)
    re = min(gc + length, width - 1)
    ro = max(re - rs + 1, 0) if row_on else 0
    lost = (wc if (ck and not keep) else 0.0) + wr * (length - ro)
    as_run = mode == 2 or (mode == 1 and ro > 0 and wr == 1.0)
    return keep, ro, as_run, gr, gc, rs, wc, wr, lost


@njit(nogil=True, cache=True)
def area_weights(
    unit, x0, y0, x1, y1, sign, ox, oy, width, height, floor, snap, touched, mode, offgrid
):  # pragma: no cover - compiled
    """Coverage of polygons over the pixel lattice by signed-area accumulation.

    Edges (sorted by unit) are in unit-local pixel coordinates; ``ox``/``oy``
    are the units' integer origins on the grid. Each edge is cut at every
    integer column, each piece at every integer row; a piece in cell ``(r, c)``
    adds ``dy·((c + 1) − x_mid)`` to the cell and its height ``dy`` to the
    running cover of the cells right of it (an event at ``c + 1``). Unit by
    unit, events are gathered by a counting sort on the row and sorted by
    column within the row; each distinct cell gets its area plus the running
    cover, and the cover it carries is the weight of the cells after it up to
    the next cell (a run). Scratch space is one unit's pieces, reused.

    Cells and runs are then clipped to the ``width`` x ``height`` grid.
    Weights within ``snap`` of 1 are 1. A cell is kept when its weight is at
    least ``floor`` (and positive), or, with ``touched``, when a piece of
    positive length crosses its interior; a run when the cover it carries is.
    With ``touched`` every kept pixel weighs 1. Weight falling off the grid
    is added to ``offgrid[unit]`` (in place) without enumerating off-grid pixels.

    ``mode`` 0: every pixel an entry. 1 (interior runs): runs of weight
    exactly 1 stay runs, every cell and every other run becomes entries, so a
    cell whose weight only rounds to 1 is never assumed interior. 2 (touched):
    cells become runs of one pixel, joined with the runs that touch them.

    Returns entries ``(unit, row, col, weight)`` and runs ``(unit, row,
    start, stop)``, each sorted by unit, row, column.
    """
    ne = unit.size
    # upper bound of the pieces of the largest unit: one per edge plus one
    # per integer crossing
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
    # the unit's cells
    w_row = np.empty(2 * unit_cap, np.int64)
    w_col = np.empty(2 * unit_cap, np.int64)
    w_val = np.empty(2 * unit_cap)
    w_run = np.empty(2 * unit_cap)
    w_bnd = np.empty(2 * unit_cap, np.bool_)
    w_len = np.empty(2 * unit_cap, np.int64)
    eu = np.empty(cap + 16, np.int64)
    er = np.empty(cap + 16, np.int64)
    ec = np.empty(cap + 16, np.int64)
    ew = np.empty(cap + 16)
    ru = np.empty(cap // 4 + 16, np.int64)
    rr = np.empty(cap // 4 + 16, np.int64)
    ra = np.empty(cap // 4 + 16, np.int64)
    rb = np.empty(cap // 4 + 16, np.int64)
    ne_out = 0
    nr_out = 0
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
        rmin, offs = _row_offsets(p_row, m, 2)
        nrow = offs.size - 1
        fill = offs[:-1].copy()
        nc = 0
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
            # the row's cells: area plus the running cover
            running = 0.0
            first = nc
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
                w_row[nc] = r + rmin
                w_col[nc] = col
                w_val[nc] = a + running
                w_run[nc] = running
                w_bnd[nc] = b
                w_len[nc] = 0
                if nc > first:
                    w_len[nc - 1] = col - w_col[nc - 1] - 1
                nc += 1
        # ---- clip to the grid: count, make room once per unit, emit
        # (no array is rebound inside the loops over cells)
        n_e = 0
        n_r = 0
        for t in range(nc):
            keep, ro, as_run = _clip(
                w_row[t],
                w_col[t],
                w_val[t],
                w_run[t],
                w_bnd[t],
                w_len[t],
                ox[u],
                oy[u],
                width,
                height,
                floor,
                snap,
                touched,
                mode,
            )[:3]
            if mode == 2:
                n_r += keep + (ro > 0)
            else:
                n_e += keep + (0 if as_run else ro)
                n_r += as_run
        if ne_out + n_e > eu.size:
            eu = _grown(eu, ne_out + n_e)
            er = _grown(er, ne_out + n_e)
            ec = _grown(ec, ne_out + n_e)
            ew = _grown(ew, ne_out + n_e)
        if nr_out + n_r > ru.size:
            ru = _grown(ru, nr_out + n_r)
            rr = _grown(rr, nr_out + n_r)
            ra = _grown(ra, nr_out + n_r)
            rb = _grown(rb, nr_out + n_r)
        off = 0.0
        for t in range(nc):
            keep, ro, as_run, gr, gc, rs, wc, wr, lost = _clip(
                w_row[t],
                w_col[t],
                w_val[t],
                w_run[t],
                w_bnd[t],
                w_len[t],
                ox[u],
                oy[u],
                width,
                height,
                floor,
                snap,
                touched,
                mode,
            )
            off += lost
            if mode == 2:
                # disjoint segments in increasing column order: join those that touch
                for seg in range(2):
                    if seg == 0:
                        if not keep:
                            continue
                        sa = gc
                        sb = gc + 1
                    else:
                        if ro == 0:
                            continue
                        sa = rs
                        sb = rs + ro
                    if (
                        nr_out > 0
                        and ru[nr_out - 1] == u
                        and rr[nr_out - 1] == gr
                        and rb[nr_out - 1] == sa
                    ):
                        rb[nr_out - 1] = sb
                    else:
                        ru[nr_out] = u
                        rr[nr_out] = gr
                        ra[nr_out] = sa
                        rb[nr_out] = sb
                        nr_out += 1
                continue
            if keep:
                eu[ne_out] = u
                er[ne_out] = gr
                ec[ne_out] = gc
                ew[ne_out] = wc
                ne_out += 1
            if ro == 0:
                continue
            if as_run:
                ru[nr_out] = u
                rr[nr_out] = gr
                ra[nr_out] = rs
                rb[nr_out] = rs + ro
                nr_out += 1
            else:
                for j in range(ro):
                    eu[ne_out] = u
                    er[ne_out] = gr
                    ec[ne_out] = rs + j
                    ew[ne_out] = wr
                    ne_out += 1
        offgrid[u] += off
    return (
        (_trim(eu, ne_out), _trim(er, ne_out), _trim(ec, ne_out), _trim(ew, ne_out)),
        (_trim(ru, nr_out), _trim(rr, nr_out), _trim(ra, nr_out), _trim(rb, nr_out)),
    )


@njit(nogil=True, cache=True)
def center_runs(unit, x0, y0, x1, y1):  # pragma: no cover - compiled
    """Scanline crossings at pixel-centre heights, paired into runs, per unit.

    GDAL's filled-polygon rule in its own float operations (see
    ``coverage._center_pass``): an edge crosses row ``r`` when
    ``min(y) <= r + 0.5 < max(y)``, at ``x = (yc − y_lo)·(x_hi − x_lo) /
    (y_hi − y_lo) + x_lo`` (the ends ordered by ``y``), column
    ``floor(x + 0.5)``; a unit's crossings in a row, sorted by column, pair
    into runs ``[a, b)``, kept when ``b > a``. Edges are sorted by unit.

    Returns runs ``(unit, row, start, stop)`` sorted by unit, row, start.
    """
    ne = unit.size
    total = 0
    unit_cap = 0
    acc = 0
    for i in range(ne):
        lo_y = min(y0[i], y1[i])
        hi_y = max(y0[i], y1[i])
        if lo_y < hi_y:
            # candidate rows with one row of slack either side; the exact
            # test below decides
            n = int(np.ceil(hi_y - 0.5) + 1) - int(np.ceil(lo_y - 0.5) - 1)
            total += n
            acc += n
        if i + 1 == ne or unit[i + 1] != unit[i]:
            unit_cap = max(unit_cap, acc)
            acc = 0
    c_row = np.empty(unit_cap, np.int64)
    c_col = np.empty(unit_cap, np.int64)
    s_col = np.empty(unit_cap, np.int64)
    ru = np.empty(total // 2 + 1, np.int64)
    rr = np.empty(total // 2 + 1, np.int64)
    ra = np.empty(total // 2 + 1, np.int64)
    rb = np.empty(total // 2 + 1, np.int64)
    k = 0
    i = 0
    while i < ne:
        u = unit[i]
        m = 0
        while i < ne and unit[i] == u:
            if y0[i] < y1[i]:
                dy1, dy2, dx1, dx2 = y0[i], y1[i], x0[i], x1[i]
            else:
                dy1, dy2, dx1, dx2 = y1[i], y0[i], x1[i], x0[i]
            if dy1 < dy2:
                r_first = int(np.ceil(dy1 - 0.5) - 1)
                r_stop = int(np.ceil(dy2 - 0.5) + 1)
                for row in range(r_first, r_stop):
                    yc = row + 0.5
                    if yc >= dy1 and yc < dy2:
                        xi = (yc - dy1) * (dx2 - dx1) / (dy2 - dy1) + dx1
                        c_row[m] = row
                        c_col[m] = int(np.floor(xi + 0.5))
                        m += 1
            i += 1
        if m == 0:
            continue
        rmin, offs = _row_offsets(c_row, m, 1)
        nrow = offs.size - 1
        fill = offs[:-1].copy()
        for q in range(m):
            r = c_row[q] - rmin
            s_col[fill[r]] = c_col[q]
            fill[r] += 1
        for r in range(nrow):
            lo = offs[r]
            hi = offs[r + 1]
            if hi - lo <= 64:
                for a in range(lo + 1, hi):
                    v = s_col[a]
                    b = a - 1
                    while b >= lo and s_col[b] > v:
                        s_col[b + 1] = s_col[b]
                        b -= 1
                    s_col[b + 1] = v
            else:
                s_col[lo:hi] = np.sort(s_col[lo:hi])
            # every closed ring crosses each scanline an even number of times
            for a in range(lo, hi - 1, 2):
                if s_col[a + 1] > s_col[a]:
                    ru[k] = u
                    rr[k] = r + rmin
                    ra[k] = s_col[a]
                    rb[k] = s_col[a + 1]
                    k += 1
    return ru[:k], rr[:k], ra[:k], rb[:k]


@njit(nogil=True, cache=True)
def group_by_block(
    unit, row, col, weight, ru, rr, ra, rb, width, height, bh, bw
):  # pragma: no cover - compiled
    """Entries and runs of a coverage grouped by raster block (stable counting sort).

    Blocks are ``bh`` x ``bw`` pixels in row-major order over a ``width`` x
    ``height`` grid; runs ``[ra, rb)`` are cut at block columns. Within a
    block, items keep their order (by unit, row, column).

    Returns per block the entry and run counts, then the entries' unit,
    block-local pixel index and weight, and the runs' unit, block-local first
    pixel and length (``int32``, ``int32``, ``float64``).
    """
    n_bcols = (width + bw - 1) // bw
    n_blocks = n_bcols * ((height + bh - 1) // bh)
    counts = np.zeros(n_blocks, np.int64)
    run_counts = np.zeros(n_blocks, np.int64)
    for i in range(unit.size):
        counts[(row[i] // bh) * n_bcols + col[i] // bw] += 1
    n_pieces = 0
    for i in range(ru.size):
        base = (rr[i] // bh) * n_bcols
        for bc in range(ra[i] // bw, (rb[i] - 1) // bw + 1):
            run_counts[base + bc] += 1
            n_pieces += 1
    fill = np.zeros(n_blocks, np.int64)
    run_fill = np.zeros(n_blocks, np.int64)
    acc = 0
    racc = 0
    for b in range(n_blocks):
        fill[b] = acc
        run_fill[b] = racc
        acc += counts[b]
        racc += run_counts[b]
    e_unit = np.empty(unit.size, np.int32)
    e_pix = np.empty(unit.size, np.int32)
    e_cov = np.empty(unit.size)
    for i in range(unit.size):
        br = row[i] // bh
        bcol = col[i] // bw
        b = br * n_bcols + bcol
        w = min(bw, width - bcol * bw)
        f = fill[b]
        e_unit[f] = unit[i]
        e_pix[f] = (row[i] - br * bh) * w + (col[i] - bcol * bw)
        e_cov[f] = weight[i]
        fill[b] = f + 1
    r_unit = np.empty(n_pieces, np.int32)
    r_pix = np.empty(n_pieces, np.int32)
    r_len = np.empty(n_pieces, np.int32)
    for i in range(ru.size):
        br = rr[i] // bh
        for bcol in range(ra[i] // bw, (rb[i] - 1) // bw + 1):
            b = br * n_bcols + bcol
            w = min(bw, width - bcol * bw)
            a = max(ra[i], bcol * bw)
            e = min(rb[i], (bcol + 1) * bw)
            f = run_fill[b]
            r_unit[f] = ru[i]
            r_pix[f] = (rr[i] - br * bh) * w + (a - bcol * bw)
            r_len[f] = e - a
            run_fill[b] = f + 1
    return counts, run_counts, e_unit, e_pix, e_cov, r_unit, r_pix, r_len
