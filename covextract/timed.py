"""Covariates on series layers: per-period statistics, the long panel, windows before dates.

The spatial statistics are computed per period with the ordinary engine (one
weight build per grid, reused by every period through the weights cache),
written to a long panel, and — for ``before:`` covariates — combined over each
record's own window with :func:`covextract.derive.time.window_values`.
"""

from __future__ import annotations

import re

import numpy as np
import pandas as pd

from covextract.errors import TableError

__all__ = [
    "parse_record_dates",
    "before_suffix",
    "series_statistics",
    "write_panel",
    "WINDOW_QA_CODES",
]

#: QA codes of windows before each record's date, for the codebook.
WINDOW_QA_CODES = {
    "no_date": "the record has no date, or one that cannot be read; no window",
    "window_outside_series": "the window reaches outside the series; value missing",
    "window_gap": "a period of the window is missing (a gap or nodata); sums and counts are "
    "missing, means, minima and maxima use the remaining periods",
    "after_visit": "the window includes days after the record's date (lag 0): exposure after "
    "the outcome",
}


def parse_record_dates(frame: pd.DataFrame, column: str, date_format: str | None):
    """Dates of the study records (NaT where missing or unreadable).

    Without ``date_format`` dates must be ISO 8601 (``2021-05-17``); a column
    that mixes ISO dates with other spellings is an error, since guessing
    day-first or month-first would silently move visits by months.
    """
    raw = frame[column]
    text = raw.astype(str).str.strip()
    empty = raw.isna() | text.isin(["", "NA", "nan", "NaT", "None"])
    if date_format:
        parsed = pd.to_datetime(text.where(~empty), format=date_format, errors="coerce")
        return parsed
    parsed = pd.to_datetime(text.where(~empty), format="ISO8601", errors="coerce")
    bad = text[~empty & parsed.isna()]
    if len(bad) and (~empty & parsed.notna()).any():
        rows = ", ".join(f"row {i + 1} ({v!r})" for i, v in bad.iloc[:5].items())
        raise TableError(
            f"study.date: column {column!r} mixes date formats: most cells are YYYY-MM-DD but "
            f"{rows}{' and more' if len(bad) > 5 else ''} are not. State the format with "
            "study: {date_format: '%d/%m/%Y'} (strftime codes), or fix those cells."
        )
    if len(bad) and not (~empty & parsed.notna()).any():
        raise TableError(
            f"study.date: column {column!r} holds no YYYY-MM-DD dates (first: {bad.iloc[0]!r}). "
            "State the format with study: {date_format: '%d/%m/%Y'} (strftime codes)."
        )
    return parsed


def before_suffix(before) -> str:
    """Column suffix of a window: ``sum_3m_lag1``, ``mean_10d_lag0``."""
    if before.months is not None:
        return f"{before.combine}_{before.months}m_lag{before.lag_months}"
    return f"{before.combine}_{before.days}d_lag{before.lag_days}"


def series_statistics(
    series,
    periods,
    geoms,
    stats,
    *,
    rule,
    area_weighting,
    threshold,
    cache,
    units_fingerprint,
    threads=None,
    client=None,
    progress=None,
):
    """Per-period statistics: ``{stat name: (n_units, n_periods) array}`` and QA per period.

    Weights are built once per grid and reused for every period (through
    ``cache``, which memoises the last weight sets even when nothing is
    written to disk).
    """
    from covextract.engine.zonal import zonal_units

    n = len(geoms)
    out = {s.name: np.full((n, len(periods)), np.nan) for s in stats}
    qa_per_period = []
    builds = 0
    for j, period in enumerate(periods):
        src = series.source(period)
        res = zonal_units(
            src,
            geoms,
            stats,
            rule=rule,
            area_weighting=area_weighting,
            threshold=threshold,
            cache=cache,
            units_fingerprint=units_fingerprint,
            threads=threads,
            client=client,
            progress=progress,
        )
        builds += res.weights_builds
        for s in stats:
            out[s.name][:, j] = res.values[s.name]
        qa_per_period.append(res.qa)
    return out, qa_per_period, builds


def long_panel(ids, column: str, periods, values: np.ndarray) -> pd.DataFrame:
    """Rows (unit_id, column, period_start, period_end, value) of one statistic."""
    n, m = values.shape
    return pd.DataFrame(
        {
            "unit_id": np.repeat(np.asarray(ids, dtype=object), m),
            "column": column,
            "period_start": np.tile(np.array([p.start for p in periods], dtype="datetime64[D]"), n),
            "period_end": np.tile(np.array([p.end for p in periods], dtype="datetime64[D]"), n),
            "value": values.reshape(-1),
        }
    )


_PANEL_FILE = re.compile(r"^\d{4}-\d{2}-\d{2}\.parquet$")


def write_panel(folder, panel: pd.DataFrame) -> list:
    """Write the long panel as one Parquet file per period (atomically), return the files.

    Files are named after the period's first day (``2021-03-01.parquet``), so a
    new period is a new file. A period file whose bytes would not change is
    left untouched (same content, same modification time), and period files of
    this naming pattern that the panel no longer holds are removed, so the
    folder always shows exactly the panel of the last run.
    """
    import io
    from pathlib import Path

    from covextract.io.writers import atomic_write_bytes

    folder = Path(folder)
    written = []
    if not panel.empty:
        panel = panel.sort_values(["period_start", "column", "unit_id"], kind="stable")
        for start, part in panel.groupby("period_start", sort=True):
            path = folder / f"{pd.Timestamp(start).date().isoformat()}.parquet"
            buffer = io.BytesIO()
            part.reset_index(drop=True).to_parquet(buffer, index=False, engine="pyarrow")
            data = buffer.getvalue()
            if not (path.is_file() and path.read_bytes() == data):
                atomic_write_bytes(path, data)
            written.append(path)
    if folder.is_dir():
        keep = {p.name for p in written}
        for old in folder.iterdir():
            if _PANEL_FILE.match(old.name) and old.name not in keep:
                old.unlink()
    return written
