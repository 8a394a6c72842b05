"""Windows before each record's date, and collapsing a finer series to months or years.

Both take a long panel (see :mod:`covextract.derive.time`).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from covextract.derive.panel import (
    _check_positive_int,
    _days,
    _frame,
    _parse_dates,
    _qa_column,
    _read_panel,
    _Wide,
)
from covextract.errors import TableError

#: How the periods of a window are combined into one value.
COMBINES = ("sum", "mean", "min", "max", "count_above")

#: How a finer series is collapsed into coarser periods.
COLLAPSE_HOWS = ("mean", "sum", "max")


def _window_bounds(d, months, lag_months, days, lag_days):
    """First and last day (inclusive) of each record's window; NaT where ``d`` is NaT."""
    if months is not None:
        visit_month = d.astype("datetime64[M]")
        last_month = visit_month - lag_months
        first_month = last_month - (months - 1)
        ws = first_month.astype("datetime64[D]")
        we = (last_month + 1).astype("datetime64[D]") - 1
    else:
        we = d - lag_days
        ws = we - (days - 1)
    return ws, we


def window_values(
    panel: pd.DataFrame,
    dates,
    *,
    units=None,
    months: int | None = None,
    lag_months: int = 0,
    days: int | None = None,
    lag_days: int = 0,
    combine: str = "sum",
    threshold: float | None = None,
    column: str = "value",
) -> pd.DataFrame:
    """Combine each record's per-period values over a window before its date.

    Parameters
    ----------
    panel : pandas.DataFrame
        Long panel (``unit``, ``start``, ``end``, ``value``), see the module
        docstring.
    dates : sequence
        One date per record: datetime64, ``datetime.date``, ``Timestamp`` or
        ISO 8601 text; None, NaN, NaT, numbers and other text give the QA
        code ``no_date``.
    units : sequence of int, optional
        The unit of each record; by default record ``i`` is unit ``i`` (one
        unit per study record). A unit without rows in the panel has no valid
        value anywhere (``window_gap``).
    months, lag_months : int
        Window of ``months`` calendar months ending with the month
        ``lag_months`` before the record's month; ``lag_months=0`` ends with
        the record's own month. A record on 17 May 2021 with ``months=3,
        lag_months=1`` uses 1 February to 30 April 2021.
    days, lag_days : int
        Instead of months: the ``days`` days ending ``lag_days`` days before
        the record's date (``lag_days=0`` ends with the date itself). Give
        exactly one of ``months`` and ``days``.
    combine : {"sum", "mean", "min", "max", "count_above"}
        How the periods' values are combined (see Notes).
    threshold : float
        For ``count_above``: a period counts when its value is strictly
        greater than ``threshold`` (same unit as the values). Required for
        ``count_above`` only.
    column : str
        The panel column holding the values.

    Returns
    -------
    pandas.DataFrame
        One row per record, in the order of ``dates``: ``unit``, ``date``
        (the parsed date, NaT if none), ``window_start``, ``window_end`` (first
        and last day of the window, inclusive), ``value`` (float, NaN when
        missing) and ``qa`` (tuple of codes from :data:`QA_CODES`).

    Notes
    -----
    Each period counts by the fraction of its days inside the window,
    ``f = overlap days / period days``: a month inside a month window counts
    1; a 16-day composite with 4 of its days in the window counts 0.25. Then

    - ``sum`` = Σ f·v: a period's value is taken as a total spread evenly over
      its days (right for rainfall totals, meaningless for vegetation indices);
    - ``mean`` = Σ f·v / Σ f over valid periods (monthly values inside a month
      window: their plain mean);
    - ``min``, ``max``: over valid periods with any day in the window;
    - ``count_above`` = Σ f over valid periods with v > threshold (months with
      more than 200 mm; for "at least 20 mm", give a threshold just below 20).

    Missing values and QA codes:

    - ``no_date``: no window; value missing.
    - ``window_outside_series``: the window starts before the first period or
      ends after the last one; value missing whatever ``combine`` is.
    - ``window_gap``: some day of the window (inside the series) has no valid
      value, because a period is absent or NaN. ``sum`` and ``count_above``
      are then missing (a partial total would understate rainfall); ``mean``,
      ``min`` and ``max`` are computed from the valid rest (missing if none).
    - ``after_visit``: the window ends after the record's date
      (``lag_months=0`` with a date before the month's last day), or a
      period overlapping the window ends after it (a composite straddling
      the date: its value holds days after the visit). Only flagged; the
      value is computed as usual.

    Examples
    --------
    >>> panel = pd.DataFrame({
    ...     "unit": 0,
    ...     "start": pd.date_range("2021-01-01", periods=6, freq="MS"),
    ...     "end": pd.date_range("2021-01-31", periods=6, freq="ME"),
    ...     "value": [10.0, 20.0, 30.0, 40.0, 50.0, 60.0]})
    >>> window_values(panel, ["2021-05-17"], months=3, lag_months=1)["value"].tolist()
    [90.0]
    """
    if (months is None) == (days is None):
        raise ValueError("give exactly one of months= and days= for a window")
    if months is not None:
        months = _check_positive_int("months", months)
        lag_months = _check_positive_int("lag_months", lag_months, 0)
    else:
        days = _check_positive_int("days", days)
        lag_days = _check_positive_int("lag_days", lag_days, 0)
    if combine not in COMBINES:
        raise ValueError(f"unknown combine {combine!r}; use one of {', '.join(COMBINES)}")
    if combine == "count_above":
        if threshold is None or not np.isfinite(float(threshold)):
            raise ValueError("combine='count_above' needs a finite threshold=")
        threshold = float(threshold)

    if isinstance(dates, str):
        raise ValueError("dates must be a sequence with one date per record, not one string")
    w = _read_panel(panel, column)
    d = _parse_dates(dates)
    n = len(d)
    if units is None:
        rec_units = np.arange(n, dtype=np.int64)
    else:
        rec_units = np.asarray(units, dtype=np.int64).reshape(-1)
        if len(rec_units) != n:
            raise ValueError(f"units has {len(rec_units)} entries but dates has {n}")

    # Absent units point at an extra all-NaN row.
    pos = np.searchsorted(w.units, rec_units)
    pos_c = np.minimum(pos, len(w.units) - 1)
    present = w.units[pos_c] == rec_units
    rows = np.where(present, pos_c, len(w.units))
    values = np.vstack([w.values, np.full((1, w.values.shape[1]), np.nan)])

    ws, we = _window_bounds(d, months, lag_months, days, lag_days)
    length = w.length
    span0, span1 = w.start[0], w.end[-1]
    out = np.full(n, np.nan)
    has_date = ~np.isnat(d)
    outside = np.zeros(n, dtype=bool)
    gap = np.zeros(n, dtype=bool)
    after = np.zeros(n, dtype=bool)

    # Records sharing a window are computed together (many share a visit month).
    idx_dated = np.flatnonzero(has_date)
    if idx_dated.size:
        pairs = np.stack([ws[idx_dated].astype(np.int64), we[idx_dated].astype(np.int64)], 1)
        keys, inverse = np.unique(pairs, axis=0, return_inverse=True)
        inverse = inverse.reshape(-1)
        order = np.argsort(inverse, kind="stable")
        bounds = np.searchsorted(inverse[order], np.arange(len(keys) + 1))
        for k in range(len(keys)):
            recs = idx_dated[order[bounds[k] : bounds[k + 1]]]
            a, b = ws[recs[0]], we[recs[0]]
            i0 = np.searchsorted(w.end, a, side="left")  # first period ending on or after a
            i1 = np.searchsorted(w.start, b, side="right")  # periods starting on or before b
            out[recs], gap[recs] = _one_window(
                values[rows[recs], i0:i1],
                w.start[i0:i1],
                w.end[i0:i1],
                length[i0:i1],
                a,
                b,
                span0,
                span1,
                combine,
                threshold,
            )
            outside[recs] = a < span0 or b > span1
            last_end = w.end[i1 - 1] if i1 > i0 else b
            after[recs] = (b > d[recs]) | (last_end > d[recs])
    codes = _qa_column(
        {
            "no_date": ~has_date,
            "window_outside_series": outside,
            "window_gap": gap,
            "after_visit": after,
        }
    )

    return pd.DataFrame(
        {
            "unit": rec_units,
            "date": d.astype("datetime64[ns]"),
            "window_start": ws.astype("datetime64[ns]"),
            "window_end": we.astype("datetime64[ns]"),
            "value": out,
            "qa": codes,
        }
    )


def _one_window(X, start, end, length, a, b, span0, span1, combine, threshold):
    """Values and gap flags of one window [a, b] for records × the periods touching it."""
    nrec = X.shape[0]
    in_span = max(0, int(_days(min(b, span1) - max(a, span0))) + 1)
    if X.shape[1] == 0:  # no period touches the window
        return np.full(nrec, np.nan), np.full(nrec, in_span > 0)
    overlap = _days(np.minimum(end, b) - np.maximum(start, a)) + 1
    frac = overlap / length
    valid = np.isfinite(X)
    gap = (valid * overlap).sum(axis=1) < in_span
    if a < span0 or b > span1:  # reaches outside the series: missing whatever combine is
        return np.full(nrec, np.nan), gap
    Xz = np.where(valid, X, 0.0)
    if combine == "sum":
        res = Xz @ frac
    elif combine == "count_above":
        res = (valid & (Xz > threshold)) @ frac
    elif combine == "mean":
        with np.errstate(invalid="ignore", divide="ignore"):
            res = (Xz @ frac) / (valid @ frac)
    elif combine == "min":
        res = np.where(valid, X, np.inf).min(axis=1)
    else:
        res = np.where(valid, X, -np.inf).max(axis=1)
    res = np.where(valid.any(axis=1), res, np.nan)
    if combine in ("sum", "count_above"):
        res = np.where(gap, np.nan, res)
    return res.astype(np.float64), gap


# --------------------------------------------------------------------------- collapse


def _targets(w: _Wide, into: str):
    if into == "year":
        unit, dt = "datetime64[Y]", 366
    elif into == "month":
        unit, dt = "datetime64[M]", 31
    else:
        raise ValueError(f"unknown into={into!r}; use 'year' or 'month'")
    longest = int(w.length.max())
    if longest > dt:
        raise TableError(
            f"the series has periods of {longest} days, longer than a {into}; collapse makes a "
            f"finer series coarser and cannot split them"
        )
    first = w.start[0].astype(unit)
    last = w.end[-1].astype(unit)
    steps = np.arange(first, last + 1)
    ts = steps.astype("datetime64[D]")
    te = (steps + 1).astype("datetime64[D]") - 1
    return ts, te


def _collapse_wide(w: _Wide, into: str, how: str, min_coverage: float):
    """Collapsed values, coverage and the target periods (start, end)."""
    if how not in COLLAPSE_HOWS:
        raise ValueError(f"unknown how={how!r}; use one of {', '.join(COLLAPSE_HOWS)}")
    min_coverage = float(min_coverage)
    if not 0.0 < min_coverage <= 1.0:
        raise ValueError(f"min_coverage must be in (0, 1]; got {min_coverage}")
    ts, te = _targets(w, into)
    overlap = (
        _days(np.minimum(te[:, None], w.end[None, :]) - np.maximum(ts[:, None], w.start[None, :]))
        + 1
    )
    overlap = np.maximum(overlap, 0).astype(np.float64)  # (targets, periods) in days
    frac = overlap / w.length[None, :]
    tlen = (_days(te - ts) + 1).astype(np.float64)
    V = w.values
    valid = np.isfinite(V)
    Vz = np.where(valid, V, 0.0)
    coverage = (valid.astype(np.float64) @ overlap.T) / tlen[None, :]
    if how == "sum":
        res = Vz @ frac.T
    elif how == "mean":
        with np.errstate(invalid="ignore", divide="ignore"):
            res = (Vz @ frac.T) / (valid.astype(np.float64) @ frac.T)
    else:
        res = np.full((V.shape[0], len(ts)), np.nan)
        Vm = np.where(valid, V, -np.inf)
        for t in range(len(ts)):
            cols = overlap[t] > 0
            if cols.any():
                res[:, t] = Vm[:, cols].max(axis=1)
    # Coverage is a ratio of whole days; the tolerance only absorbs rounding.
    ok = coverage >= min_coverage - 1e-12
    any_valid = coverage > 0
    res = np.where(ok & any_valid, res, np.nan)
    return res, coverage, ts, te, ~(ok & any_valid)


def collapse(
    panel: pd.DataFrame,
    *,
    into: str = "year",
    how: str = "mean",
    min_coverage: float = 1.0,
    column: str = "value",
) -> pd.DataFrame:
    """Collapse a finer series into calendar years or months, per unit.

    Parameters
    ----------
    panel : pandas.DataFrame
        Long panel (``unit``, ``start``, ``end``, ``value``). Periods may be
        days, composites of several days or months; none may be longer than
        the target (``into``).
    into : {"year", "month"}
        Calendar periods to collapse into; every one from the first to the
        last period of the series is returned.
    how : {"mean", "sum", "max"}
        ``sum`` = Σ f·v and ``mean`` = Σ f·v / Σ f over valid periods, where
        ``f`` is the fraction of a period's days inside the target period (a
        16-day composite across New Year counts partly in each year; twelve
        months give their plain mean). ``max`` is over valid periods with any
        day in the target.
    min_coverage : float
        Minimum share (0–1] of the target period's days that must be covered
        by valid values; below it the value is missing with QA
        ``low_coverage``. The default 1.0 requires complete coverage: a sum
        over part of a year understates the total, and the mean of a seasonal
        variable over part of a year is biased toward the months present.
        Lower it knowingly: coverage counts days, so 0.9 allows one missing
        month in a year (a missing 31-day month leaves 334/365 ≈ 0.915).
    column : str
        The panel column holding the values.

    Returns
    -------
    pandas.DataFrame
        Long panel ``unit``, ``start``, ``end`` (the calendar periods),
        ``value``, ``coverage`` (share of the period's days with a valid
        value, 0–1) and ``qa``; sorted by unit, then period.
    """
    w = _read_panel(panel, column)
    res, coverage, ts, te, low = _collapse_wide(w, into, how, min_coverage)
    qa = _qa_column({"low_coverage": low})
    return _frame(w.units, ts, te, value=res, coverage=coverage, qa=qa)
