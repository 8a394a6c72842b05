"""Covariates that use time, computed on per-unit, per-period values.

Every function here takes a *long panel*: a :class:`pandas.DataFrame` with one
row per (unit, period) and the columns

==========  ===================================================================
``unit``    integer unit index (the engine's unit order; one unit per record)
``start``   first day of the period (datetime64, ``datetime.date`` or ISO text)
``end``     last day of the period, inclusive
``value``   float; NaN where the period's value is missing (another column can
            be named with ``column=``)
==========  ===================================================================

The periods are shared by all units: a (unit, period) pair without a row
counts as missing. Periods must not overlap, but may have any length (days,
16-day composites, calendar months, years) and the series may have gaps.
Times of day are dropped: all arithmetic is on whole calendar days.

Results are DataFrames too; every row has a ``qa`` column holding a tuple of
reason codes (keys of :data:`QA_CODES`), the empty tuple when all is well.
Rows with the same codes share one tuple, so a long panel's QA column costs
one pointer per row. A missing result always comes with a code that says why.

- :func:`window_values`: one value per record over a window before its date;
- :func:`collapse`: a finer series to calendar months or years;
- :func:`trend`: OLS and Theil–Sen slopes and the Mann–Kendall p-value on
  annual values;
- :func:`anomalies`: difference, percent of normal and z-score per calendar
  month against a baseline.

The standardized precipitation index lives in :mod:`covextract.derive.spi`.
Change between two periods is computed per pixel by the engine, not here.

Bad data (unknown columns, unreadable dates, overlapping periods, a baseline
outside the series) raise :class:`~covextract.errors.TableError`; bad
arguments (an unknown ``combine``, a negative lag) raise :class:`ValueError`,
since the recipe schema checks them before any data is read.
"""

from __future__ import annotations

import datetime as _dt
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.special import ndtr

from covextract.errors import TableError

__all__ = [
    "COMBINES",
    "COLLAPSE_HOWS",
    "QA_CODES",
    "window_values",
    "collapse",
    "trend",
    "anomalies",
]

#: How the periods of a window are combined into one value.
COMBINES = ("sum", "mean", "min", "max", "count_above")

#: How a finer series is collapsed into coarser periods.
COLLAPSE_HOWS = ("mean", "sum", "max")

#: Reason codes written by this module and :mod:`covextract.derive.spi`, with
#: their codebook text.
QA_CODES: dict[str, str] = {
    "no_date": "the record's date is missing or cannot be read; no window, value missing",
    "window_outside_series": "the window reaches before the first or after the last period "
    "of the series; value missing",
    "window_gap": "a day of the window has no valid value (a period is missing or NaN); "
    "sums and counts are then missing, means, minima and maxima use the valid rest",
    "after_visit": "the window, or a period overlapping it, ends after the record's date "
    "(exposure after the outcome)",
    "low_coverage": "valid values cover less of the period than the minimum coverage; "
    "value missing",
    "too_few_years": "fewer valid years than the minimum for a trend; trend missing",
    "all_tied": "every annual value is equal; the Mann-Kendall test is undefined",
    "no_value": "the period's value is missing",
    "short_baseline": "fewer valid baseline values for this calendar month than the minimum; "
    "value missing",
    "zero_normal": "the baseline mean is 0; percent of normal missing",
    "zero_spread": "the baseline values are all equal (standard deviation 0); z-score missing",
    "no_fit": "no gamma distribution can be fitted to the baseline totals of this calendar "
    "month (fewer than 3 totals above 0, or all equal); SPI missing",
    "beyond_fit": "the total lies where the fitted distribution gives probability 0 or 1 "
    "(SPI is infinite); SPI missing, the category is still given",
}

# Bounded memory for the pairwise (Theil–Sen, Mann–Kendall) arrays.
_UNIT_CHUNK = 4096


# --------------------------------------------------------------------------- panel


@dataclass
class _Wide:
    """A panel as a (units × periods) array; periods sorted and disjoint."""

    values: np.ndarray  # float64 (n_units, n_periods), NaN = missing
    units: np.ndarray  # int64 (n_units,), sorted
    start: np.ndarray  # datetime64[D] (n_periods,)
    end: np.ndarray  # datetime64[D] (n_periods,), inclusive

    @property
    def length(self) -> np.ndarray:
        """Days in each period."""
        return _days(self.end - self.start) + 1


def _days(delta) -> np.ndarray:
    return np.asarray(delta).astype("timedelta64[D]").astype(np.int64)


def _to_days(col, name: str) -> np.ndarray:
    """Read a column of dates as datetime64[D]; a bad cell is a TableError naming its rows."""
    try:
        parsed = pd.to_datetime(pd.Series(col), errors="coerce", format="ISO8601")
    except (TypeError, ValueError) as exc:  # mixed time zones and the like
        raise TableError(
            f"the panel's {name!r} column cannot be read as dates ({exc}); give datetime64 "
            "values or ISO 8601 text (2021-05-01)"
        ) from exc
    if getattr(parsed.dt, "tz", None) is not None:
        parsed = parsed.dt.tz_localize(None)
    bad = np.flatnonzero(parsed.isna().to_numpy())
    if bad.size:
        raise TableError(
            f"the panel's {name!r} column has missing or unreadable dates in rows "
            f"{_rows(bad)} (counted from 0), e.g. {col.iloc[bad[0]]!r}; every period needs a "
            "start and an end date"
        )
    return parsed.to_numpy().astype("datetime64[D]")


def _rows(idx, limit: int = 5) -> str:
    shown = ", ".join(str(int(i)) for i in idx[:limit])
    return shown + (f" and {len(idx) - limit} more" if len(idx) > limit else "")


def _read_panel(panel, column: str = "value") -> _Wide:
    """Check a long panel and turn it into a (units × periods) array."""
    if not isinstance(panel, pd.DataFrame):
        raise TableError(
            f"expected a pandas DataFrame with columns unit, start, end, {column}; "
            f"got {type(panel).__name__}"
        )
    need = ["unit", "start", "end", column]
    missing = [c for c in need if c not in panel.columns]
    if missing:
        raise TableError(
            f"the panel has no column {', '.join(map(repr, missing))}; it needs "
            f"{', '.join(need)} (found: {', '.join(map(str, panel.columns))})"
        )
    if len(panel) == 0:
        raise TableError("the panel has no rows; there are no periods to work with")
    frame = panel.reset_index(drop=True)
    units_raw = pd.to_numeric(frame["unit"], errors="coerce").to_numpy(dtype=np.float64)
    bad = np.flatnonzero(~np.isfinite(units_raw) | (units_raw != np.round(units_raw)))
    if bad.size:
        raise TableError(
            f"the panel's 'unit' column must hold integer unit indices; rows {_rows(bad)} "
            f"(counted from 0) do not, e.g. {frame['unit'].iloc[bad[0]]!r}"
        )
    unit = units_raw.astype(np.int64)
    start = _to_days(frame["start"], "start")
    end = _to_days(frame["end"], "end")
    bad = np.flatnonzero(end < start)
    if bad.size:
        raise TableError(
            f"rows {_rows(bad)} of the panel (counted from 0) end before they start, e.g. "
            f"{start[bad[0]]} to {end[bad[0]]}; 'end' is the period's last day"
        )
    try:
        values = pd.to_numeric(frame[column], errors="raise").to_numpy(dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise TableError(
            f"the panel's {column!r} column must be numeric (NaN for missing): {exc}"
        ) from exc
    bad = np.flatnonzero(np.isinf(values))
    if bad.size:
        raise TableError(
            f"the panel's {column!r} column holds infinite values in rows {_rows(bad)} "
            "(counted from 0); use NaN for a missing value"
        )

    periods = pd.DataFrame({"start": start, "end": end}).drop_duplicates()
    periods = periods.sort_values(["start", "end"]).reset_index(drop=True)
    p_start = periods["start"].to_numpy().astype("datetime64[D]")
    p_end = periods["end"].to_numpy().astype("datetime64[D]")
    clash = np.flatnonzero(p_start[1:] <= p_end[:-1])
    if clash.size:
        i = clash[0]
        raise TableError(
            f"periods {p_start[i]}..{p_end[i]} and {p_start[i + 1]}..{p_end[i + 1]} overlap; "
            "the periods of a series must be disjoint (check the 'start' and 'end' columns)"
        )
    units = np.unique(unit)
    ui = np.searchsorted(units, unit)
    pi = np.searchsorted(p_start, start)
    key = ui * len(p_start) + pi
    dup = np.flatnonzero(pd.Series(key).duplicated().to_numpy())
    if dup.size:
        r = dup[0]
        raise TableError(
            f"unit {unit[r]} has more than one row for the period {start[r]}..{end[r]} "
            f"(rows {_rows(dup)}, counted from 0); give one value per unit and period"
        )
    wide = np.full((len(units), len(p_start)), np.nan)
    wide[ui, pi] = values
    return _Wide(wide, units, p_start, p_end)


def _frame(units, start, end, **columns) -> pd.DataFrame:
    """Build a long panel from (units × periods) arrays, sorted by unit then period."""
    nu, npd = len(units), len(start)
    out = {
        "unit": np.repeat(np.asarray(units, dtype=np.int64), npd),
        "start": np.tile(np.asarray(start).astype("datetime64[ns]"), nu),
        "end": np.tile(np.asarray(end).astype("datetime64[ns]"), nu),
    }
    for name, arr in columns.items():
        if isinstance(arr, list):
            out[name] = arr
        else:
            out[name] = np.asarray(arr).reshape(-1)
    return pd.DataFrame(out)


def _qa_column(flags: dict) -> list:
    """One tuple of codes per element from ``{code: boolean array}`` (in the dict's order)."""
    names = list(flags)
    arrays = [np.asarray(flags[c], dtype=bool).reshape(-1) for c in names]
    mask = np.zeros(arrays[0].shape, dtype=np.int64)
    for bit, arr in enumerate(arrays):
        mask |= arr.astype(np.int64) << bit
    uniq, inverse = np.unique(mask, return_inverse=True)
    tuples = [tuple(c for bit, c in enumerate(names) if (m >> bit) & 1) for m in uniq]
    return [tuples[i] for i in inverse.reshape(-1)]


def _calendar_kind(start: np.ndarray, end: np.ndarray) -> str | None:
    """``"month"`` or ``"year"`` when every period is one whole calendar month or year."""
    m = start.astype("datetime64[M]")
    if np.all(start == m.astype("datetime64[D]")) and np.all(
        end == (m + 1).astype("datetime64[D]") - 1
    ):
        return "month"
    y = start.astype("datetime64[Y]")
    if np.all(start == y.astype("datetime64[D]")) and np.all(
        end == (y + 1).astype("datetime64[D]") - 1
    ):
        return "year"
    return None


def _year(days: np.ndarray) -> np.ndarray:
    return days.astype("datetime64[Y]").astype(np.int64) + 1970


def _month_index(days: np.ndarray) -> np.ndarray:
    """Calendar month 0..11."""
    return days.astype("datetime64[M]").astype(np.int64) % 12


def _check_baseline(baseline) -> tuple[int, int]:
    try:
        first, last = baseline
        first, last = int(first), int(last)
    except (TypeError, ValueError) as exc:
        raise ValueError(
            f"baseline must be (first_year, last_year), both included; got {baseline!r}"
        ) from exc
    if first > last:
        raise ValueError(f"baseline {first}..{last} ends before it starts")
    return first, last


def _check_positive_int(name: str, value, minimum: int = 1) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < minimum:
        raise ValueError(f"{name} must be an integer ≥ {minimum}; got {value!r}")
    return int(value)


# --------------------------------------------------------------------------- windows


def _parse_dates(dates) -> np.ndarray:
    """Record dates as datetime64[D]; NaT where missing or unreadable.

    Accepted: datetime64 values, ``datetime.date``/``datetime``, pandas
    ``Timestamp`` and ISO 8601 text. Numbers are not dates (a bare 20210517
    is ambiguous) and give NaT, as does text in other formats: the table
    reader parses those with the recipe's date format.
    """
    if isinstance(dates, (pd.Series, pd.Index, np.ndarray)) and np.issubdtype(
        np.asarray(dates).dtype, np.datetime64
    ):
        return np.asarray(dates).astype("datetime64[D]")
    items = list(dates)
    cleaned = []
    for x in items:
        if isinstance(x, (str, _dt.date, np.datetime64, pd.Timestamp)):
            cleaned.append(x)
        else:  # None, NaN, numbers, anything else
            cleaned.append(None)
    out = np.full(len(cleaned), np.datetime64("NaT"), dtype="datetime64[D]")
    for i, x in enumerate(cleaned):
        if x is None:
            continue
        try:
            ts = pd.to_datetime(x, format="ISO8601") if isinstance(x, str) else pd.Timestamp(x)
        except (TypeError, ValueError, OverflowError):
            continue
        if ts is pd.NaT or pd.isna(ts):
            continue
        if ts.tzinfo is not None:
            ts = ts.tz_localize(None)
        out[i] = np.datetime64(ts.date(), "D")
    return out


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


# --------------------------------------------------------------------------- trend


def trend(
    panel: pd.DataFrame,
    *,
    how: str = "mean",
    min_years: int = 5,
    min_coverage: float = 1.0,
    continuity: bool = True,
    column: str = "value",
) -> pd.DataFrame:
    """Linear trend per unit on annual values: OLS, Theil–Sen and Mann–Kendall.

    Parameters
    ----------
    panel : pandas.DataFrame
        Long panel (``unit``, ``start``, ``end``, ``value``). A series of
        calendar years is used as it is; a finer one is first collapsed per
        calendar year with :func:`collapse` (``how``, ``min_coverage``).
        Seasonality and the autocorrelation of consecutive months make the
        monthly values far from independent, so a test on them gives p-values
        far too small; one value per year removes the seasonal cycle and most
        of the dependence.
    how : {"mean", "sum", "max"}
        How a finer series is collapsed per year.
    min_years : int
        Minimum number of valid years (default 5); fewer give missing
        results and QA ``too_few_years``. The Mann–Kendall p-value uses the
        normal approximation, which is rough for fewer than about 10 years
        (from memory: exact tables exist for small n, Kendall 1975).
    min_coverage : float
        Passed to :func:`collapse` for a finer series.
    continuity : bool
        Apply the continuity correction to the Mann–Kendall statistic,
        ``Z = (S − sign S) / √Var(S)`` (default; common practice). Without it
        ``Z = S / √Var(S)``, as scipy's asymptotic Kendall tau test does.
    column : str
        The panel column holding the values.

    Returns
    -------
    pandas.DataFrame
        One row per unit: ``unit``, ``n_years`` (valid years), ``first_year``,
        ``last_year`` (of the valid years), ``ols_slope`` and ``sen_slope``
        (value units per year), ``mk_s``, ``mk_z``, ``mk_p`` (two-sided) and
        ``qa`` (``too_few_years``; ``all_tied`` when every value is equal and
        the test is undefined: slopes 0, ``mk_z`` and ``mk_p`` missing).

    Notes
    -----
    Years are the calendar years, x = year. OLS: ``Σ(x−x̄)(y−ȳ) / Σ(x−x̄)²``.
    Theil–Sen (Sen 1968): the median of the pairwise slopes
    ``(y_j − y_i)/(x_j − x_i)``, i < j. Mann–Kendall (Mann 1945; Kendall
    1975): ``S = Σ_{i<j} sign(y_j − y_i)`` in time order,
    ``Var(S) = [n(n−1)(2n+5) − Σ_t t(t−1)(2t+5)] / 18`` with ``t`` the sizes
    of the groups of exactly equal values (tie correction), p = 2·(1 − Φ(|Z|)).
    """
    min_years = _check_positive_int("min_years", min_years, 2)
    w = _read_panel(panel, column)
    if _calendar_kind(w.start, w.end) == "year":
        Y, years = w.values, _year(w.start)
    else:
        Y, _cov, ts, _te, _low = _collapse_wide(w, "year", how, min_coverage)
        years = _year(ts)
    x = years.astype(np.float64)
    nu = Y.shape[0]
    valid = np.isfinite(Y)
    n = valid.sum(axis=1)
    enough = n >= min_years

    ols = np.full(nu, np.nan)
    sen = np.full(nu, np.nan)
    mk_s = np.full(nu, np.nan)
    mk_z = np.full(nu, np.nan)
    mk_p = np.full(nu, np.nan)
    tied = np.zeros(nu, dtype=bool)
    first = np.where(n > 0, np.where(valid, years[None, :], np.iinfo(np.int64).max).min(1), -1)
    last = np.where(n > 0, np.where(valid, years[None, :], np.iinfo(np.int64).min).max(1), -1)

    iu, ju = np.triu_indices(len(x), 1)
    dx = x[ju] - x[iu]
    for lo in range(0, nu, _UNIT_CHUNK):
        sel = np.arange(lo, min(lo + _UNIT_CHUNK, nu))
        sel = sel[enough[sel]]
        if not sel.size:
            continue
        y, v, k = Y[sel], valid[sel], n[sel].astype(np.float64)
        yz = np.where(v, y, 0.0)
        xbar = (v * x).sum(1) / k
        ybar = yz.sum(1) / k
        xc = np.where(v, x - xbar[:, None], 0.0)
        ols[sel] = (xc * (yz - ybar[:, None])).sum(1) / (xc * xc).sum(1)

        pv = v[:, iu] & v[:, ju]
        dy = yz[:, ju] - yz[:, iu]
        sen[sel] = np.nanmedian(np.where(pv, dy / dx, np.nan), axis=1)
        s = np.where(pv, np.sign(dy), 0.0).sum(1)
        # Σ over tie groups of t(t−1)(2t+5) = Σ over values of (c−1)(2c+5),
        # c = how many valid values equal this one (itself included).
        eq = (y[:, :, None] == y[:, None, :]) & v[:, :, None] & v[:, None, :]
        c = eq.sum(2).astype(np.float64)
        ties = np.where(v, (c - 1.0) * (2.0 * c + 5.0), 0.0).sum(1)
        var = (k * (k - 1.0) * (2.0 * k + 5.0) - ties) / 18.0
        degenerate = var <= 0
        num = s - np.sign(s) if continuity else s
        with np.errstate(invalid="ignore", divide="ignore"):
            z = np.where(degenerate, np.nan, num / np.sqrt(np.where(degenerate, 1.0, var)))
        mk_s[sel] = s
        mk_z[sel] = z
        mk_p[sel] = 2.0 * ndtr(-np.abs(z))
        tied[sel] = degenerate

    qa = _qa_column({"too_few_years": ~enough, "all_tied": tied})
    return pd.DataFrame(
        {
            "unit": w.units,
            "n_years": n.astype(np.int64),
            "first_year": pd.array(
                [int(f) if k else None for f, k in zip(first, n > 0, strict=True)], dtype="Int64"
            ),
            "last_year": pd.array(
                [int(f) if k else None for f, k in zip(last, n > 0, strict=True)], dtype="Int64"
            ),
            "ols_slope": ols,
            "sen_slope": sen,
            "mk_s": mk_s,
            "mk_z": mk_z,
            "mk_p": mk_p,
            "qa": qa,
        }
    )


# --------------------------------------------------------------------------- anomalies


def _baseline_columns(w: _Wide, first: int, last: int, what: str) -> np.ndarray:
    years = _year(w.start)
    inside = (years >= first) & (years <= last)
    if not inside.any():
        raise TableError(
            f"the {what} baseline {first}..{last} lies outside the series, which runs from "
            f"{w.start[0]} to {w.end[-1]}; choose baseline years the series covers"
        )
    return inside


def anomalies(
    panel: pd.DataFrame,
    *,
    baseline,
    min_years: int = 5,
    column: str = "value",
) -> pd.DataFrame:
    """Anomalies per unit and calendar month against a baseline period.

    Parameters
    ----------
    panel : pandas.DataFrame
        Long panel of calendar months (or of calendar years: then one normal
        per unit). A daily or composite series must be collapsed first
        (:func:`collapse` with ``into="month"``).
    baseline : (int, int)
        First and last baseline year, both included (``(1991, 2020)``).
    min_years : int
        Minimum number of valid baseline values per unit and calendar month
        (default 5, a choice of ours: a normal from fewer years is mostly
        noise); fewer give missing results and QA ``short_baseline``.
    column : str
        The panel column holding the values.

    Returns
    -------
    pandas.DataFrame
        Long panel with every period of the input: ``unit``, ``start``,
        ``end``, ``value`` (the input value), ``normal`` (baseline mean of
        the unit's same calendar month), ``anomaly`` = value − normal,
        ``percent_of_normal`` = 100·value / normal, ``zscore`` =
        (value − normal) / sd, and ``qa``.

    Notes
    -----
    ``sd`` is the sample standard deviation of the baseline values (ddof = 1).
    Codes: ``short_baseline`` (all missing), ``no_value`` (the period's value
    is missing), ``zero_normal`` (normal = 0: percent of normal missing),
    ``zero_spread`` (sd = 0, e.g. a constant series: z-score missing).
    Percent of normal is meant for quantities with a natural zero (rainfall,
    radiance); for temperatures in °C it is not meaningful. The baseline
    statistics are computed about the smallest baseline value, so a constant
    series gives an exactly zero anomaly and spread.
    """
    first, last = _check_baseline(baseline)
    min_years = _check_positive_int("min_years", min_years, 2)
    w = _read_panel(panel, column)
    kind = _calendar_kind(w.start, w.end)
    if kind is None:
        raise TableError(
            "anomalies need a series of calendar months (or years); this one has periods of "
            f"{int(w.length.min())} to {int(w.length.max())} days. Collapse it first: "
            "collapse(panel, into='month', how='mean' or 'sum')"
        )
    inside = _baseline_columns(w, first, last, "anomaly")
    key = _month_index(w.start) if kind == "month" else np.zeros(len(w.start), dtype=np.int64)
    V = w.values
    normal = np.full(V.shape, np.nan)
    sd = np.full(V.shape, np.nan)
    count = np.zeros(V.shape, dtype=np.int64)
    for k in np.unique(key):
        cols = key == k
        B = V[:, cols & inside]
        valid = np.isfinite(B)
        cnt = valid.sum(1)
        has = cnt > 0
        shift = np.where(has, np.where(valid, B, np.inf).min(1), 0.0)
        dev = np.where(valid, B - shift[:, None], 0.0)
        with np.errstate(invalid="ignore", divide="ignore"):
            mdev = dev.sum(1) / cnt
            ss = np.where(valid, (dev - mdev[:, None]) ** 2, 0.0).sum(1)
            s = np.sqrt(ss / (cnt - 1))
        normal[:, cols] = np.where(has, shift + mdev, np.nan)[:, None]
        sd[:, cols] = np.where(cnt >= 2, s, np.nan)[:, None]
        count[:, cols] = cnt[:, None]
    short = count < min_years
    normal = np.where(short, np.nan, normal)
    sd = np.where(short, np.nan, sd)
    anomaly = V - normal
    zero_normal = ~short & (normal == 0)
    zero_spread = ~short & (sd == 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        pct = np.where(zero_normal, np.nan, 100.0 * V / np.where(zero_normal, 1.0, normal))
        z = np.where(zero_spread, np.nan, anomaly / np.where(zero_spread, 1.0, sd))
    qa = _qa_column(
        {
            "short_baseline": short,
            "no_value": np.isnan(V),
            "zero_normal": zero_normal,
            "zero_spread": zero_spread,
        }
    )
    return _frame(
        w.units,
        w.start,
        w.end,
        value=V,
        normal=normal,
        anomaly=anomaly,
        percent_of_normal=pct,
        zscore=z,
        qa=qa,
    )
