"""Reading study tables and boundary files.

This is the only place that opens a study table or a vector file. What comes
out is plain data: a :class:`StudyTable` (the user's rows exactly as stored)
or a GeoDataFrame of boundaries. Turning records into unit geometries is the
job of :mod:`covextract.units`.

CSV files are read with every cell as text, verbatim, so that the written
output can carry the user's cells back unchanged: ids with leading zeros
(``"007"``), missing-value markers (``"NA"``), dates and long decimals are
never parsed here. Parquet columns keep their stored types. Vector files
(GeoPackage, GeoJSON, shapefile, GeoParquet) are read through pyogrio (GDAL)
or pyarrow; their attributes go into ``frame`` and their geometries into
``geometry``.
"""

from __future__ import annotations

import csv
import difflib
from dataclasses import dataclass
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyproj

from covextract.errors import InputFileError, TableError
from covextract.io.paths import symlink_loop

__all__ = [
    "StudyTable",
    "SUPPORTED_TABLE_SUFFIXES",
    "read_study_table",
    "read_boundaries",
    "describe_vector",
    "ids_as_text",
    "column_hint",
]

#: File suffixes (lower case) and the reader each one gets.
SUPPORTED_TABLE_SUFFIXES: dict[str, str] = {
    ".csv": "csv",
    ".parquet": "parquet",
    ".gpkg": "vector",
    ".geojson": "vector",
    ".shp": "vector",
}


@dataclass
class StudyTable:
    """A study table as read from disk.

    Attributes
    ----------
    frame : pandas.DataFrame
        The user's rows and columns, untouched. From CSV every cell is the
        verbatim text of the file (object dtype, empty cells are ``""``);
        from Parquet the stored types; from a vector file the attributes
        without the geometry column.
    path : pathlib.Path
        The file read.
    format : str
        ``"csv"``, ``"parquet"`` or ``"vector"``.
    geometry : geopandas.GeoSeries or None
        The geometries of a vector table, index aligned with ``frame``;
        ``None`` for CSV and Parquet tables (and attribute-only layers).
    crs : pyproj.CRS or None
        The CRS of ``geometry``; ``None`` when there is no geometry.
    """

    frame: pd.DataFrame
    path: Path
    format: str
    geometry: gpd.GeoSeries | None = None
    crs: pyproj.CRS | None = None

    def __len__(self) -> int:
        return len(self.frame)


# ---------------------------------------------------------------------------
# helpers shared with covextract.units


def column_hint(wanted: str, available) -> str:
    """Text listing ``available`` columns with a "did you mean" for ``wanted``.

    Used by every message about a missing column, so the user sees the same
    shape of hint wherever a column name is wrong.
    """
    available = [str(c) for c in available]
    shown = ", ".join(repr(c) for c in available[:30])
    if len(available) > 30:
        shown += f", ... ({len(available)} columns)"
    text = f"Available columns: {shown}." if available else "The table has no columns."
    lower = {c.lower(): c for c in available}
    close = []
    if wanted.lower() in lower:
        close = [lower[wanted.lower()]]
    else:
        close = difflib.get_close_matches(wanted, available, n=1, cutoff=0.6)
    if close:
        text += f" Did you mean {close[0]!r}?"
    if len(available) == 1 and ";" in available[0]:
        text += (
            " The file looks semicolon-separated; covextract reads comma-separated CSV,"
            " so save it with commas."
        )
    return text


def ids_as_text(values) -> tuple[np.ndarray, np.ndarray]:
    """Convert identifiers to text and flag missing ones.

    Strings are kept exactly as they are (no stripping, leading zeros
    survive); integers become their decimal text; floats that hold whole
    numbers (integer ids read into a float column because of gaps) become
    integer text, so ``7.0`` matches ``"7"``; other floats their shortest
    ``repr``. ``None``, NaN, ``pd.NA`` and blank strings count as missing.

    Returns
    -------
    text : numpy.ndarray
        Object array of ``str`` (``""`` where missing).
    missing : numpy.ndarray
        Boolean array, True where the id is missing or blank.
    """
    values = list(values)
    out = np.empty(len(values), dtype=object)
    missing = np.zeros(len(values), dtype=bool)
    for i, v in enumerate(values):
        if v is None or v is pd.NA or v is pd.NaT:
            text = ""
        elif isinstance(v, str):
            text = v
        elif isinstance(v, (bool, np.bool_)):
            text = str(bool(v))
        elif isinstance(v, (int, np.integer)):
            text = str(int(v))
        elif isinstance(v, (float, np.floating)):
            f = float(v)
            if not np.isfinite(f):
                text = ""
            elif f.is_integer():
                text = str(int(f))
            else:
                text = repr(f)
        elif isinstance(v, bytes):
            text = v.decode("utf-8", errors="replace")
        else:
            text = str(v)
        out[i] = text
        missing[i] = text.strip() == ""
    return out, missing


# ---------------------------------------------------------------------------
# readers


def _check_file(path, what: str) -> tuple[Path, str]:
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in SUPPORTED_TABLE_SUFFIXES:
        supported = ", ".join(SUPPORTED_TABLE_SUFFIXES)
        raise InputFileError(
            f"{what} {str(path)!r} has an unsupported file type {suffix or '(no suffix)'!r}. "
            f"Supported: {supported}. Convert the file to one of these."
        )
    if path.is_symlink() and not path.exists() and symlink_loop(path):
        raise InputFileError(
            f"{what} {str(path)!r} is a symlink loop (the link leads back to itself). "
            "Point the link at the real file, or name the file itself in the recipe."
        )
    if not path.exists():
        raise InputFileError(
            f"{what} {str(path)!r} does not exist. Check the path (relative paths in a "
            "recipe are relative to the recipe's folder)."
        )
    if not path.is_file():
        raise InputFileError(f"{what} {str(path)!r} is not a file. Give the path of a file.")
    return path, SUPPORTED_TABLE_SUFFIXES[suffix]


def _read_csv(path: Path) -> pd.DataFrame:
    try:
        with open(path, encoding="utf-8-sig", newline="") as fh:
            header = next(csv.reader(fh), None)
        # dtype=object rather than dtype=str: pandas >= 3 maps str to its own
        # string dtype, while the contract is plain Python strings verbatim.
        frame = pd.read_csv(
            path,
            dtype=object,
            keep_default_na=False,
            na_filter=False,
            encoding="utf-8-sig",
        )
    except UnicodeDecodeError as exc:
        raise InputFileError(
            f"study table {str(path)!r} is not valid UTF-8 text (byte {exc.start}). "
            "Save it as CSV UTF-8."
        ) from exc
    except pd.errors.EmptyDataError as exc:
        raise TableError(
            f"study table {str(path)!r} is empty: it has no header row. "
            "Give a CSV with a header row and one row per record."
        ) from exc
    except pd.errors.ParserError as exc:
        raise InputFileError(
            f"study table {str(path)!r} cannot be parsed as CSV ({exc}). "
            "Check that every row has as many fields as the header and quotes are closed."
        ) from exc
    except OSError as exc:
        raise InputFileError(f"study table {str(path)!r} cannot be read: {exc}.") from exc
    if header is not None:
        seen, dups = set(), []
        for name in header:
            if name in seen and name not in dups:
                dups.append(name)
            seen.add(name)
        if dups:
            raise TableError(
                f"study table {str(path)!r} has duplicate column names: "
                + ", ".join(repr(d) for d in dups)
                + ". Rename them so each column name is unique."
            )
    return frame


def _is_geoparquet(path: Path) -> bool:
    import pyarrow.parquet as pq

    meta = pq.read_schema(path).metadata or {}
    return b"geo" in meta


def _read_parquet(path: Path) -> StudyTable:
    try:
        if _is_geoparquet(path):
            gdf = gpd.read_parquet(path)
            return _from_geodataframe(gdf, path)
        frame = pd.read_parquet(path)
    except (OSError, ValueError) as exc:
        # pyarrow raises ArrowInvalid (a ValueError) for files that are not Parquet.
        raise InputFileError(
            f"study table {str(path)!r} cannot be read as Parquet: {exc}. "
            "Check that the file is a complete Parquet file."
        ) from exc
    return StudyTable(frame=frame, path=path, format="parquet")


def _layer_names(path: Path) -> list[str]:
    import pyogrio

    try:
        return [str(name) for name in pyogrio.list_layers(path)[:, 0]]
    except Exception as exc:  # pyogrio raises its own DataSourceError (a RuntimeError)
        raise InputFileError(
            f"vector file {str(path)!r} cannot be opened: {exc}. "
            "Check that it is a complete GeoPackage, GeoJSON or shapefile "
            "(a shapefile needs its .shx and .dbf beside it)."
        ) from exc


def _pick_layer(path: Path, layer: str | None) -> str | None:
    names = _layer_names(path)
    if layer is not None:
        if layer not in names:
            raise InputFileError(
                f"vector file {str(path)!r} has no layer {layer!r}. Layers: "
                + ", ".join(repr(n) for n in names)
                + "."
            )
        return layer
    if len(names) > 1:
        raise TableError(
            f"vector file {str(path)!r} has {len(names)} layers ("
            + ", ".join(repr(n) for n in names)
            + "). Say which one to use with `layer:`."
        )
    return names[0] if names else None


def _read_vector(path: Path, layer: str | None) -> StudyTable:
    import pyogrio

    layer = _pick_layer(path, layer)
    try:
        data = pyogrio.read_dataframe(path, layer=layer)
    except Exception as exc:  # pyogrio/GDAL errors are RuntimeErrors of their own kinds
        raise InputFileError(
            f"vector file {str(path)!r} cannot be read: {exc}. "
            "Check that the file is complete and not open in another program."
        ) from exc
    if not isinstance(data, gpd.GeoDataFrame):
        # an attribute-only layer (a GeoPackage table without geometry)
        return StudyTable(frame=pd.DataFrame(data), path=path, format="vector")
    return _from_geodataframe(data, path)


def _from_geodataframe(gdf: gpd.GeoDataFrame, path: Path) -> StudyTable:
    if gdf.crs is None:
        raise TableError(
            f"vector file {str(path)!r} has no CRS, so its coordinates cannot be placed "
            "on a raster. Assign the CRS the coordinates are in (for example with "
            "geopandas `set_crs` or ogr2ogr `-a_srs`) and save the file again."
        )
    geom_name = gdf.geometry.name
    frame = pd.DataFrame(gdf.drop(columns=[geom_name]))
    return StudyTable(
        frame=frame,
        path=path,
        format="vector",
        geometry=gdf.geometry,
        crs=pyproj.CRS.from_user_input(gdf.crs),
    )


def read_study_table(path, *, layer: str | None = None, what: str = "study table") -> StudyTable:
    """Read a study table (CSV, Parquet, GeoPackage, GeoJSON or shapefile).

    Parameters
    ----------
    path : str or os.PathLike
        The file. The suffix picks the reader: ``.csv``, ``.parquet``,
        ``.gpkg``, ``.geojson``, ``.shp``. A Parquet file carrying GeoParquet
        metadata is read as a vector table.
    layer : str, optional
        Layer of a multi-layer vector file (GeoPackage). Required when the
        file has more than one layer.
    what : str
        How messages name the file (``"boundary file"``, ``"totals table"``).

    Returns
    -------
    StudyTable

    Raises
    ------
    InputFileError
        The file is missing, unreadable or of an unsupported type.
    TableError
        A vector file has no CRS; a CSV has duplicate column names or no
        header; the table has no rows; a multi-layer file was given without
        ``layer``.

    Examples
    --------
    A CSV keeps its cells as text::

        table = read_study_table("clusters.csv")
        table.frame.loc[0, "cluster_id"]   # '007', not 7
    """
    path, kind = _check_file(path, what)
    if kind == "csv":
        table = StudyTable(frame=_read_csv(path), path=path, format="csv")
    elif kind == "parquet":
        table = _read_parquet(path)
    else:
        table = _read_vector(path, layer)
    if len(table.frame) == 0:
        # An empty table would run to an empty output and exit 0: say so instead.
        if kind == "csv":
            raise TableError(
                f"the {what} {path.name} has a header but no rows; nothing to compute. "
                "Add one row per record (or check that the right file is named)."
            )
        raise TableError(
            f"the {what} {path.name} has no records (no rows or features); "
            + ("nothing to compute. " if what == "study table" else "nothing to use. ")
            + "Check that the right file (and layer) is named."
        )
    return table


def read_boundaries(path, *, id_column: str, layer: str | None = None) -> gpd.GeoDataFrame:
    """Read a boundary file: one polygon per unit, keyed by an id column.

    Parameters
    ----------
    path : str or os.PathLike
        A vector file (``.gpkg``, ``.geojson``, ``.shp``, or GeoParquet).
    id_column : str
        The attribute that holds the unit id; it is matched as text to the
        study table's id column.
    layer : str, optional
        Layer of a multi-layer file.

    Returns
    -------
    geopandas.GeoDataFrame
        Columns ``id`` (text, see :func:`ids_as_text`) and ``geometry``, in
        the file's order, CRS set. Features with an empty id are dropped,
        since they cannot be matched to any record. ``attrs["source"]`` holds
        the file name (for the codebook).

    Raises
    ------
    InputFileError
        Missing, unreadable or unsupported file.
    TableError
        No CRS, the id column is missing, the file holds no geometry, or an
        id occurs more than once.
    """
    table = read_study_table(path, layer=layer, what="boundary file")
    if table.geometry is None:
        raise TableError(
            f"boundary file {str(table.path)!r} holds no geometries. "
            "Give a GeoPackage, GeoJSON or shapefile of polygons."
        )
    if id_column not in table.frame.columns:
        raise TableError(
            f"boundary file {str(table.path)!r} has no id column {id_column!r}. "
            + column_hint(id_column, table.frame.columns)
        )
    ids, missing = ids_as_text(table.frame[id_column].to_numpy())
    keep = ~missing
    gdf = gpd.GeoDataFrame(
        {"id": pd.array(ids[keep], dtype=object)},
        geometry=np.asarray(table.geometry.to_numpy(), dtype=object)[keep],
        crs=table.crs,
    )
    dup = pd.Series(gdf["id"]).duplicated(keep=False).to_numpy()
    if dup.any():
        names = list(dict.fromkeys(gdf["id"][dup]))
        raise TableError(
            f"boundary file {str(table.path)!r}: {len(names)} id(s) in column {id_column!r} "
            "occur more than once: "
            + ", ".join(repr(n) for n in names[:5])
            + (" ..." if len(names) > 5 else "")
            + ". Each unit needs one feature: dissolve the parts into one "
            "(multi)polygon per id (geopandas `dissolve(by=...)`)."
        )
    gdf.attrs["source"] = table.path.name
    return gdf


def describe_vector(path, *, layer: str | None = None) -> dict:
    """Summarise a vector file without building units.

    Parameters
    ----------
    path : str or os.PathLike
        ``.gpkg``, ``.geojson`` or ``.shp``.
    layer : str, optional
        Layer to describe; the first (only) layer when omitted.

    Returns
    -------
    dict
        ``path`` (str), ``layer`` (str), ``layers`` (list of layer names),
        ``feature_count`` (int), ``columns`` (dict name -> dtype text),
        ``geometry_types`` (dict type name -> count; ``"None"`` counts
        missing geometries, ``"Empty"`` empty ones), ``crs`` (short text
        such as ``"EPSG:4326"`` or the CRS name, ``None`` when absent),
        ``bounds`` (``(xmin, ymin, xmax, ymax)`` in that CRS, or ``None``
        for a layer without geometries).
    """
    import pyogrio
    import shapely

    path, kind = _check_file(path, "vector file")
    if kind != "vector":
        raise InputFileError(
            f"{str(path)!r} is not a vector file. describe reads .gpkg, .geojson and .shp."
        )
    names = _layer_names(path)
    if layer is None:
        layer = names[0] if names else None
    elif layer not in names:
        raise InputFileError(
            f"vector file {str(path)!r} has no layer {layer!r}. Layers: "
            + ", ".join(repr(n) for n in names)
            + "."
        )
    try:
        info = pyogrio.read_info(path, layer=layer, force_feature_count=True)
        geoms = pyogrio.read_dataframe(path, layer=layer, columns=[])
    except Exception as exc:  # pyogrio/GDAL errors
        raise InputFileError(f"vector file {str(path)!r} cannot be read: {exc}.") from exc
    types: dict[str, int] = {}
    bounds = None
    if isinstance(geoms, gpd.GeoDataFrame):
        arr = np.asarray(geoms.geometry.to_numpy(), dtype=object)
        is_none = shapely.is_missing(arr)
        is_empty = ~is_none & shapely.is_empty(arr)
        if is_none.any():
            types["None"] = int(is_none.sum())
        if is_empty.any():
            types["Empty"] = int(is_empty.sum())
        present = arr[~is_none & ~is_empty]
        for name, count in pd.Series(shapely.get_type_id(present)).value_counts().items():
            types[_GEOM_TYPE_NAMES.get(int(name), str(name))] = int(count)
        if present.size:
            b = shapely.total_bounds(present)
            bounds = tuple(float(v) for v in b)
    crs_text = None
    if info.get("crs"):
        crs = pyproj.CRS.from_user_input(info["crs"])
        auth = crs.to_authority()
        crs_text = f"{auth[0]}:{auth[1]}" if auth else crs.name
    return {
        "path": str(path),
        "layer": layer,
        "layers": names,
        "feature_count": int(info["features"]),
        "columns": {str(n): str(t) for n, t in zip(info["fields"], info["dtypes"], strict=True)},
        "geometry_types": types,
        "crs": crs_text,
        "bounds": bounds,
    }


_GEOM_TYPE_NAMES = {
    0: "Point",
    1: "LineString",
    2: "LinearRing",
    3: "Polygon",
    4: "MultiPoint",
    5: "MultiLineString",
    6: "MultiPolygon",
    7: "GeometryCollection",
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
