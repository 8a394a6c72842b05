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
    "open_series",
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


def open_series(recipe, name, layer):
    """The :class:`~covextract.io.series.SeriesIndex` of a series layer."""
    from covextract.io.series import discover_series, open_cube

    options = {
        "nodata": layer.nodata,
        "scale": layer.scale,
        "offset": layer.offset,
        "valid_range": layer.valid_range,
        "ceiling": layer.ceiling,
        "name": name,
    }
    if layer.variable is not None:
        return open_cube(
            recipe.resolve(layer.file),
            variable=layer.variable,
            crs=layer.crs,
            every=layer.every,
            **options,
        )
    options.update({"band": layer.band, "crs": layer.crs})
    return discover_series(layer.file, layer.every, base_dir=recipe.base_dir, open_options=options)


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


class CollapsedSource:
    """Several periods of a series on one grid, collapsed per pixel (mean, sum or max).

    A pixel is valid only where every period is valid, so a collapsed value
    never silently mixes fewer periods in.
    """

    def __init__(self, sources, how: str = "mean") -> None:
        from covextract.errors import RasterError

        if not sources:
            raise ValueError("no periods to collapse")
        first = sources[0]
        for other in sources[1:]:
            if not other.grid.same_lattice(first.grid):
                raise RasterError(
                    f"{first.path} and {other.path} are periods of one series on different "
                    "grids; a per-pixel change needs one grid: warp them onto one first."
                )
        self.sources = list(sources)
        self.how = how
        self.grid = first.grid
        self.path = first.path

    def read_block(self, window):
        """Stored values of every period."""
        return [s.read_block(window) for s in self.sources]

    def to_values(self, stored):
        """Collapsed values and the pixels valid in every period."""
        vals, valid = [], None
        for s, block in zip(self.sources, stored, strict=True):
            v, m = s.to_values(block)
            vals.append(v)
            valid = m if valid is None else valid & m
        stack = np.stack(vals)
        with np.errstate(invalid="ignore"):
            if self.how == "sum":
                out = stack.sum(axis=0)
            elif self.how == "max":
                out = stack.max(axis=0)
            else:
                out = stack.mean(axis=0)
        return out, valid


class ChangeSource:
    """Later minus earlier, per pixel, on pixels valid in both (``part="change"``).

    ``part="earlier"`` gives the earlier values on the same pixels, the
    denominator of the relative change.
    """

    def __init__(self, later, earlier, part: str = "change") -> None:
        from covextract.errors import RasterError

        if not later.grid.same_lattice(earlier.grid):
            raise RasterError(
                f"{later.path} and {earlier.path} are on different grids; a per-pixel change "
                "needs one grid: warp them onto one first."
            )
        self.later, self.earlier, self.part = later, earlier, part
        self.grid = later.grid
        self.path = later.path

    def read_block(self, window):
        """Stored values of both sides."""
        return (self.later.read_block(window), self.earlier.read_block(window))

    def to_values(self, stored):
        """The change (or the earlier values) where both sides are valid."""
        v1, m1 = self.later.to_values(stored[0])
        v0, m0 = self.earlier.to_values(stored[1])
        ok = m1 & m0
        return (v1 - v0 if self.part == "change" else v0), ok
