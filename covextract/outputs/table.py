"""The study table with covariates appended, written to a new file.

The user's rows, row order, columns and cell text are never changed: CSV
tables are read as text and written back verbatim, and new columns are
appended at the right. Numbers are written in Python's shortest round-trip
form (``repr``), missing values as empty cells, so two runs of the same
recipe give byte-identical files.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from covextract.errors import OutputError
from covextract.io.writers import atomic_write

__all__ = ["TABLE_FORMATS", "table_format", "augment_table", "write_table", "format_number"]

TABLE_FORMATS = {".csv": "csv", ".parquet": "parquet", ".gpkg": "gpkg"}


def table_format(path) -> str:
    """Output format from the file extension; raises :class:`OutputError`."""
    ext = Path(path).suffix.lower()
    if ext not in TABLE_FORMATS:
        raise OutputError(
            f"output table {path} has extension {ext or '(none)'!r}; use one of "
            f"{', '.join(TABLE_FORMATS)}"
        )
    return TABLE_FORMATS[ext]


def format_number(x) -> str:
    """Shortest round-trip text of a number; empty for missing."""
    if x is None:
        return ""
    if isinstance(x, int | np.integer):
        return str(int(x))
    x = float(x)
    if not np.isfinite(x):
        return ""
    if x == 0:
        return "0.0"
    return repr(x)


def augment_table(frame: pd.DataFrame, columns: dict, *, as_text: bool) -> pd.DataFrame:
    """Append new columns to a copy of the study table.

    Parameters
    ----------
    frame : DataFrame
        The study table as read (CSV: all text).
    columns : dict
        ``name -> array`` in row order: float arrays (NaN missing), int arrays,
        or sequences of text.
    as_text : bool
        Write numbers as text (for CSV) so the file is exact and reproducible.
    """
    out = frame.copy()
    new = {}
    for name, values in columns.items():
        arr = np.asarray(values) if not isinstance(values, list) else values
        if isinstance(arr, np.ndarray) and arr.dtype.kind in "fiu":
            if as_text:
                new[name] = pd.Series(
                    [format_number(v) for v in arr], index=out.index, dtype=object
                )
            elif arr.dtype.kind in "iu":
                new[name] = pd.Series(arr, index=out.index, dtype="Int64")
            else:
                new[name] = pd.Series(arr.astype(np.float64), index=out.index)
        else:
            new[name] = pd.Series(list(arr), index=out.index, dtype=object)
    return pd.concat([out, pd.DataFrame(new, index=out.index)], axis=1)


def write_table(frame: pd.DataFrame, path, *, geometry=None, crs=None) -> Path:
    """Write the augmented table atomically; format from the extension.

    ``geometry`` (a sequence of shapely geometries) and ``crs`` are needed for
    GeoPackage output.
    """
    fmt = table_format(path)
    path = Path(path)

    if fmt == "csv":
        text = _csv_text(frame)

        def write(tmp: Path) -> None:
            text.to_csv(tmp, index=False, lineterminator="\n", encoding="utf-8")

    elif fmt == "parquet":

        def write(tmp: Path) -> None:
            frame.to_parquet(tmp, index=False, engine="pyarrow")

    else:
        if geometry is None:
            raise OutputError(
                f"a GeoPackage output ({path}) needs a geometry for each record; this study "
                "table has none to give. Write .csv or .parquet instead."
            )
        import geopandas as gpd

        gdf = gpd.GeoDataFrame(frame.copy(), geometry=list(geometry), crs=crs)

        def write(tmp: Path) -> None:
            # The layer is named after the final file: GDAL would derive it from the
            # temporary name, whose dots it refuses in a layer name.
            gdf.to_file(tmp, driver="GPKG", engine="pyogrio", layer=path.stem)

    return atomic_write(path, write)


def _csv_text(frame: pd.DataFrame) -> pd.DataFrame:
    """Numeric columns as shortest round-trip text (:func:`format_number`), others as they are.

    Text columns (every column of a CSV study table) pass through untouched, so
    the user's cells are written back verbatim.
    """
    out = {}
    for name in frame.columns:
        col = frame[name]
        if pd.api.types.is_bool_dtype(col.dtype):
            out[name] = col
        elif pd.api.types.is_float_dtype(col.dtype) or pd.api.types.is_integer_dtype(col.dtype):
            values = col.astype(object).where(col.notna(), None)
            out[name] = pd.Series([format_number(v) for v in values], index=col.index, dtype=object)
        else:
            out[name] = col
    return pd.DataFrame(out, index=frame.index, columns=frame.columns)
