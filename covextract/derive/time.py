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

from covextract.derive.panel import QA_CODES
from covextract.derive.trend import anomalies, trend
from covextract.derive.windows import COLLAPSE_HOWS, COMBINES, collapse, window_values

__all__ = [
    "COMBINES",
    "COLLAPSE_HOWS",
    "QA_CODES",
    "window_values",
    "collapse",
    "trend",
    "anomalies",
]
