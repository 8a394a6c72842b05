"""The long panel shared by the time covariates: reading, shaping, QA codes.

A *long panel* is a :class:`pandas.DataFrame` with one row per (unit, period);
see :mod:`covextract.derive.time` for its columns and rules. This module reads
one into a units × periods array (:class:`_Wide`), writes results back as long
frames with a ``qa`` column, and holds the reason codes (:data:`QA_CODES`)
written by :mod:`~covextract.derive.windows`, :mod:`~covextract.derive.trend`
and :mod:`~covextract.derive.spi`.
"""

from __future__ import annotations

import datetime as _dt
from dataclasses import dataclass

import numpy as np
import pandas as pd

from covextract.errors import TableError

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
