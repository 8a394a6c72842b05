"""Study records to unit geometries.

:func:`build_units` turns the rows of a :class:`~covextract.io.tables.StudyTable`
into one unit per row, in the table's order: a boundary polygon joined by id,
the record's own polygon, a geodesic buffer around its point, or the point
itself. Records without a usable location keep their place with geometry
``None`` and a reason code in ``qa`` (see :data:`QA_CODES`), so the output
table always has the input's rows.

Problems the user must fix (missing or duplicate ids, unreadable
coordinates, coordinates outside the CRS's range, bad radii) raise
:class:`~covextract.errors.TableError` naming the rows. Rows are counted
from 1 at the first record (the line after a CSV's header is row 1).
"""

from __future__ import annotations

import hashlib
import json
import re
import warnings
from dataclasses import dataclass, field
from functools import lru_cache

import numpy as np
import pandas as pd
import pyproj
import shapely

from covextract.core.options import POINT_METHOD_NAMES, OptionError, parse_buffer
from covextract.errors import (
    GeometryError,
    GeometryRepairedWarning,
    SuspectLocationWarning,
    TableError,
)
from covextract.io.tables import StudyTable, column_hint, ids_as_text
from covextract.units.buffers import (
    MAX_RADIUS_M,
    MIN_VERTICES,
    buffer_input_problems,
    geodesic_buffers,
)

__all__ = [
    "AT_POINT_METHODS",
    "QA_CODES",
    "SENTINEL_VALUES",
    "UnitSet",
    "build_units",
]

#: Reason codes that may appear in :attr:`UnitSet.qa`, with their codebook text.
QA_CODES: dict[str, str] = {
    "no_location": "the record has no location (empty coordinate cells or no geometry); "
    "no unit was built",
    "suspect_location": "the coordinates are (0, 0) or a sentinel value such as -999 or 9999; "
    "treated as missing",
    "no_boundary": "the boundary file has no feature with this record's id",
    "empty_geometry": "the record's geometry is empty, or nothing polygonal was left after repair",
    "geometry_repaired": "the polygon was invalid and was repaired (shapely make_valid, "
    "polygonal parts kept)",
}

#: Absolute coordinate values taken for missing-value markers rather than
#: places (common practice in survey data entry: 99, 999, 9999 and their
#: decimal variants stand for "unknown"; no citable source).
SENTINEL_VALUES = (99.0, 999.0, 9999.0, 99999.0, 99.99, 999.9)

#: How a point unit takes the value of a layer.
AT_POINT_METHODS = POINT_METHOD_NAMES

_MAX_EXAMPLES = 5
_NUMBER = re.compile(r"[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?")


# ---------------------------------------------------------------------------
# the unit set


@lru_cache(maxsize=64)
def _transformer(src_wkt: str, dst_wkt: str) -> pyproj.Transformer:
    # One Transformer per CRS pair: building one costs milliseconds (PROJ
    # database look-ups), far more than transforming thousands of vertices.
    return pyproj.Transformer.from_crs(
        pyproj.CRS.from_wkt(src_wkt), pyproj.CRS.from_wkt(dst_wkt), always_xy=True
    )


@dataclass
class UnitSet:
    """One unit per study record, in the table's order.

    Attributes
    ----------
    ids : numpy.ndarray
        Object array of ``str``, the record ids as text.
    geometry : numpy.ndarray
        Object array of shapely geometries in :attr:`crs`: Polygon or
        MultiPolygon for area units, Point for point units, ``None`` where
        the record has no usable location (see :attr:`qa`).
    crs : pyproj.CRS
        CRS of :attr:`geometry`. Buffers are in the geographic CRS of the
        points (lon/lat degrees, x = longitude).
    kind : str
        ``"area"`` or ``"point"``.
    qa : list of list of str
        Reason codes per unit (keys of :data:`QA_CODES`); empty when all is well.
    description : str
        The unit shape in words, for the codebook.
    params : dict
        The parameters that define the shape (JSON-serialisable).
    """

    ids: np.ndarray
    geometry: np.ndarray
    crs: pyproj.CRS
    kind: str
    qa: list[list[str]]
    description: str
    params: dict = field(default_factory=dict)

    def __len__(self) -> int:
        return len(self.ids)

    def fingerprint(self) -> str:
        """SHA-256 (hex) of ids, geometries, CRS and shape parameters.

        Geometries enter as 2-D little-endian ISO WKB (``shapely.to_wkb``),
        every item length-prefixed, so two unit sets share a fingerprint
        exactly when they would give the same coverage weights.
        """
        cached = self.__dict__.get("_fingerprint")
        if cached is not None:  # every covariate and period asks; hash the WKB once
            return cached
        h = hashlib.sha256(b"covextract-units-1\0")

        def put(data: bytes | None) -> None:
            if data is None:
                h.update(b"\xff" * 8)
            else:
                h.update(len(data).to_bytes(8, "little"))
                h.update(data)

        put(self.kind.encode())
        put(len(self.ids).to_bytes(8, "little"))
        for uid in self.ids:
            put(str(uid).encode("utf-8"))
        wkb = shapely.to_wkb(
            np.asarray(self.geometry, dtype=object),
            hex=False,
            output_dimension=2,
            byte_order=1,
            include_srid=False,
            flavor="iso",
        )
        for item in np.atleast_1d(wkb):
            put(item)
        put(self.crs.to_wkt().encode())
        put(json.dumps(self.params, sort_keys=True, default=str).encode())
        digest = h.hexdigest()
        self.__dict__["_fingerprint"] = digest
        return digest

    def to_crs(self, crs) -> np.ndarray:
        """Reproject the geometries to ``crs``.

        Parameters
        ----------
        crs : anything ``pyproj.CRS.from_user_input`` accepts
            Target CRS (usually a raster's).

        Returns
        -------
        numpy.ndarray
            Object array, same order; ``None`` stays ``None``. Coordinates
            are transformed vertex by vertex (x = easting/longitude,
            ``always_xy``) with one cached Transformer per CRS pair; edges
            are not densified. A geometry whose transformed coordinates are
            not finite (outside the target projection's domain) becomes
            ``None``, so it falls outside every layer.
        """
        target = pyproj.CRS.from_user_input(crs)
        geoms = np.asarray(self.geometry, dtype=object).copy()
        if target == self.crs:
            return geoms
        present = np.flatnonzero(~shapely.is_missing(geoms))
        if present.size == 0:
            return geoms
        tr = _transformer(self.crs.to_wkt(), target.to_wkt())

        def move(coords: np.ndarray) -> np.ndarray:
            x, y = tr.transform(coords[:, 0], coords[:, 1])
            return np.column_stack([x, y])

        moved = shapely.transform(geoms[present], move)
        bounds = shapely.bounds(moved)
        moved = np.asarray(moved, dtype=object)
        moved[~np.isfinite(bounds).all(axis=1) & ~shapely.is_empty(moved)] = None
        geoms[present] = moved
        return geoms


# ---------------------------------------------------------------------------
# messages


def _examples(rows: np.ndarray, ids: np.ndarray | None, values=None, *, quote=True) -> str:
    """``row 3 (id '007'): 'abc'; row 9 ...; and 4 more`` for the first rows."""
    rows = np.asarray(rows)
    parts = []
    for i in rows[:_MAX_EXAMPLES]:
        text = f"row {int(i) + 1}"
        if ids is not None:
            text += f" (id {ids[int(i)]!r})"
        if values is not None:
            value = values[int(i)]
            text += f": {value!r}" if quote else f": {value}"
        parts.append(text)
    out = "; ".join(parts)
    if rows.size > _MAX_EXAMPLES:
        out += f"; and {rows.size - _MAX_EXAMPLES} more"
    return out


def _name(table: StudyTable) -> str:
    return table.path.name if table.path is not None else "the study table"


# ---------------------------------------------------------------------------
# reading ids and coordinates


def _table_ids(table: StudyTable, id_column: str) -> np.ndarray:
    frame = table.frame
    if id_column not in frame.columns:
        raise TableError(
            f"id column {id_column!r} (study.id) is not in {_name(table)}. "
            + column_hint(id_column, frame.columns)
        )
    ids, missing = ids_as_text(frame[id_column].to_numpy())
    if missing.any():
        rows = np.flatnonzero(missing)
        raise TableError(
            f"{rows.size} record(s) of {_name(table)} have no id in column {id_column!r}: "
            f"{_examples(rows, None)}. Every record needs a unique id: fill them in "
            "or remove those rows."
        )
    dup = pd.Series(ids).duplicated(keep=False).to_numpy()
    if dup.any():
        values = list(dict.fromkeys(ids[dup]))
        shown = []
        for v in values[:_MAX_EXAMPLES]:
            rows = np.flatnonzero(ids == v) + 1
            shown.append(f"{v!r} (rows {', '.join(str(int(r)) for r in rows[:5])})")
        more = f"; and {len(values) - _MAX_EXAMPLES} more" if len(values) > _MAX_EXAMPLES else ""
        raise TableError(
            f"{len(values)} id(s) in column {id_column!r} of {_name(table)} occur more than "
            f"once: {'; '.join(shown)}{more}. Ids must be unique: one record per unit."
        )
    return ids


def _parse_numbers(series: pd.Series, column: str, ids: np.ndarray, what: str, table):
    """Values of ``series`` as float64 and a mask of empty cells.

    Empty cells (``""``, blanks, None, NaN) are missing; anything else that
    is not a plain decimal number raises TableError naming the rows.
    """
    values = series.to_numpy()
    n = len(values)
    out = np.full(n, np.nan)
    missing = np.zeros(n, dtype=bool)
    bad = np.zeros(n, dtype=bool)
    if pd.api.types.is_numeric_dtype(series.dtype) and not pd.api.types.is_bool_dtype(series.dtype):
        out = series.to_numpy(dtype=np.float64, na_value=np.nan)
        missing = np.isnan(out)
        bad = np.isinf(out)
    else:
        for i, v in enumerate(values):
            if v is None or v is pd.NA or (isinstance(v, float) and np.isnan(v)):
                missing[i] = True
            elif isinstance(v, str):
                s = v.strip()
                if s == "":
                    missing[i] = True
                elif _NUMBER.fullmatch(s):
                    out[i] = float(s)
                else:
                    bad[i] = True
            elif isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(
                v, (bool, np.bool_)
            ):
                out[i] = float(v)
                bad[i] = not np.isfinite(out[i])
            else:
                bad[i] = True
    if bad.any():
        rows = np.flatnonzero(bad)
        hint = ""
        texts = [str(values[i]) for i in rows]
        if any(re.fullmatch(r"\s*[+-]?\d+,\d+\s*", t) for t in texts):
            hint = " Use a dot as the decimal separator (12.5, not 12,5)."
        elif any(("°" in t) or ("'" in t) for t in texts):
            hint = " Convert degrees-minutes-seconds to decimal degrees."
        # A coordinate cell is shown with its digits masked: messages end up in logs and mail.
        if "coordinate" in what:
            shown = {int(i): _masked(str(values[i])) for i in rows}
            examples = _examples(rows, ids, shown, quote=False) + " (digits shown as #)"
        else:
            examples = _examples(rows, ids, values)
        raise TableError(
            f"column {column!r} of {_name(table)} has {rows.size} {what} value(s) that are "
            f"not numbers: {examples}.{hint} Give plain decimal numbers, "
            "and leave the cell empty for a record without one."
        )
    return out, missing


def _parse_crs(value, what: str) -> pyproj.CRS:
    try:
        return pyproj.CRS.from_user_input(value)
    except pyproj.exceptions.CRSError as exc:
        raise TableError(
            f"{what} {value!r} is not a CRS pyproj recognises. Give an EPSG code such as "
            "'EPSG:4326' (lon/lat on WGS84) or a WKT/PROJ string."
        ) from exc


@dataclass
class _Points:
    x: np.ndarray
    y: np.ndarray
    usable: np.ndarray  # bool
    crs: pyproj.CRS
    source: str


def _points_from_columns(table: StudyTable, points: dict, ids, qa) -> _Points:
    if not isinstance(points, dict) or "x" not in points or "y" not in points:
        raise TableError(
            f"study.points must name the coordinate columns as {{x: ..., y: ...}}, got {points!r}."
        )
    frame = table.frame
    crs = _parse_crs(points.get("crs", "EPSG:4326"), "study.points.crs")
    for key in ("x", "y"):
        col = points[key]
        if col not in frame.columns:
            raise TableError(
                f"coordinate column {col!r} (study.points.{key}) is not in {_name(table)}. "
                + column_hint(str(col), frame.columns)
            )
    x, x_missing = _parse_numbers(frame[points["x"]], points["x"], ids, "coordinate", table)
    y, y_missing = _parse_numbers(frame[points["y"]], points["y"], ids, "coordinate", table)
    located = ~(x_missing | y_missing)
    for i in np.flatnonzero(~located):
        qa[i].append("no_location")
    return _Points(x, y, located, crs, f"columns {points['x']}/{points['y']}")


def _geometry_types(geoms: np.ndarray) -> dict[str, int]:
    present = geoms[~shapely.is_missing(geoms)]
    present = present[~shapely.is_empty(present)]
    return {
        str(k): int(v) for k, v in pd.Series(shapely.get_type_id(present)).value_counts().items()
    }


_TYPE_NAMES = {
    "0": "Point",
    "1": "LineString",
    "2": "LinearRing",
    "3": "Polygon",
    "4": "MultiPoint",
    "5": "MultiLineString",
    "6": "MultiPolygon",
    "7": "GeometryCollection",
}


def _type_summary(types: dict[str, int]) -> str:
    return ", ".join(f"{v} {_TYPE_NAMES.get(k, k)}" for k, v in sorted(types.items()))


def _points_from_geometry(table: StudyTable, ids, qa) -> _Points:
    geoms = np.asarray(table.geometry.to_numpy(), dtype=object)
    missing = shapely.is_missing(geoms)
    empty = ~missing & shapely.is_empty(geoms)
    for i in np.flatnonzero(missing):
        qa[i].append("no_location")
    for i in np.flatnonzero(empty):
        qa[i].append("empty_geometry")
    usable = ~(missing | empty)
    x = np.full(len(geoms), np.nan)
    y = np.full(len(geoms), np.nan)
    x[usable] = shapely.get_x(geoms[usable])
    y[usable] = shapely.get_y(geoms[usable])
    return _Points(x, y, usable, table.crs, f"point geometries of {_name(table)}")


def _screen_points(pts: _Points, ids, qa, table) -> list[tuple[type, str]]:
    """Mark suspect points, check the CRS range; return warnings to emit."""
    notes = []
    u = pts.usable
    ax, ay = np.abs(pts.x), np.abs(pts.y)
    suspect = u & (
        ((pts.x == 0) & (pts.y == 0)) | np.isin(ax, SENTINEL_VALUES) | np.isin(ay, SENTINEL_VALUES)
    )
    if suspect.any():
        rows = np.flatnonzero(suspect)
        for i in rows:
            qa[i].append("suspect_location")
        # Messages name records by row and id, never by their coordinates: messages end up
        # in logs and mail. A sentinel is no location, so saying which one it is reveals nothing.
        coords = {int(i): _suspect_text(pts.x[i], pts.y[i]) for i in rows[:_MAX_EXAMPLES]}
        notes.append(
            (
                SuspectLocationWarning,
                f"{rows.size} record(s) of {_name(table)} sit at (0, 0) or at a sentinel "
                f"value such as -999 or 9999: {_examples(rows, ids, coords, quote=False)}. "
                "They get no unit (QA 'suspect_location'); correct the coordinates or leave "
                "the cells empty.",
            )
        )
        pts.usable = u & ~suspect
    if pts.crs.is_geographic:
        ok = pts.usable
        bad = ok & ((ax > 180) | (ay > 90))
        if bad.any():
            rows = np.flatnonzero(bad)
            coords = {
                int(i): _out_of_range_text(ax[i] > 180, ay[i] > 90) for i in rows[:_MAX_EXAMPLES]
            }
            hint = ""
            if np.all(ay[bad] <= 180) and np.all(ax[bad] <= 90):
                hint = (
                    " x and y look swapped: x must be the longitude and y the latitude;"
                    " swap study.points.x and study.points.y."
                )
            elif np.all((pts.x[bad] > 180) & (pts.x[bad] <= 360) & (ay[bad] <= 90)):
                hint = " Longitudes look like 0..360: subtract 360 from those above 180."
            else:
                hint = (
                    " If the coordinates are projected (metres), set study.points.crs to their CRS."
                )
            raise TableError(
                f"{rows.size} record(s) of {_name(table)} have coordinates outside the range "
                f"of {pts.crs.name} (longitude -180..180, latitude -90..90): "
                f"{_examples(rows, ids, coords, quote=False)}.{hint}"
            )
    return notes


def _suspect_text(x: float, y: float) -> str:
    """Which marker a suspect point holds, without its other coordinate."""
    if x == 0 and y == 0:
        return "at (0, 0)"
    parts = [f"{name} is {v:g}" for name, v in (("x", x), ("y", y)) if abs(v) in SENTINEL_VALUES]
    return " and ".join(parts)


def _out_of_range_text(x_bad: bool, y_bad: bool) -> str:
    """Which coordinate is out of range, without its value."""
    if x_bad and y_bad:
        return "longitude and latitude out of range"
    return "longitude out of range" if x_bad else "latitude out of range"


def _masked(text: str) -> str:
    """A cell with its digits shown as ``#``: the shape of a coordinate, not its value."""
    return repr(re.sub(r"\d", "#", text))


def _polygonal(geom):
    """Return the polygonal part of ``geom`` (Polygon/MultiPolygon) or None."""
    parts = [geom]
    polys = []
    while parts:
        g = parts.pop()
        t = g.geom_type
        if t == "Polygon":
            if not g.is_empty:
                polys.append(g)
        elif t in ("MultiPolygon", "GeometryCollection"):
            parts.extend(shapely.get_parts(g))
    if not polys:
        return None
    # union_all rather than MultiPolygon(polys): parts that share an edge
    # would make an invalid MultiPolygon.
    return shapely.union_all(polys)


def _clean_polygons(geoms: np.ndarray, qa, ids, missing_code: str, where: str, consider=None):
    """2-D, valid polygons; None with QA codes where unusable; warnings to emit.

    Only rows where ``consider`` is True are examined (all by default); the
    others must already be None and carry their own QA code.
    """
    geoms = np.asarray(geoms, dtype=object).copy()
    if consider is None:
        consider = np.ones(len(geoms), dtype=bool)
    missing = consider & shapely.is_missing(geoms)
    present = consider & ~missing
    geoms[present] = shapely.force_2d(geoms[present])
    empty = present & shapely.is_empty(geoms)
    for i in np.flatnonzero(missing):
        qa[i].append(missing_code)
    for i in np.flatnonzero(empty):
        qa[i].append("empty_geometry")
    geoms[missing | empty] = None
    ok = present & ~empty
    invalid = np.zeros(len(geoms), dtype=bool)
    invalid[ok] = ~shapely.is_valid(geoms[ok])
    notes = []
    if invalid.any():
        rows = np.flatnonzero(invalid)
        repaired = shapely.make_valid(geoms[rows])
        for i, g in zip(rows, repaired, strict=True):
            qa[i].append("geometry_repaired")
            kept = _polygonal(g)
            if kept is None:
                qa[i].append("empty_geometry")
            geoms[i] = kept
        notes.append(
            (
                GeometryRepairedWarning,
                f"{rows.size} invalid polygon(s) in {where} were repaired with shapely "
                f"make_valid, keeping their polygonal parts: {_examples(rows, ids)}. "
                "Check them in a GIS if the results look wrong (QA 'geometry_repaired').",
            )
        )
    return geoms, notes


def _require_polygons(types: dict[str, int], where: str, what_to_do: str) -> None:
    other = {k: v for k, v in types.items() if k not in ("3", "6")}
    if other:
        raise TableError(
            f"{where} holds {_type_summary(types)}; units need Polygon or MultiPolygon "
            f"geometries. {what_to_do}"
        )


# ---------------------------------------------------------------------------
# build_units


def build_units(
    table: StudyTable,
    *,
    id_column: str,
    points: dict | None = None,
    buffer_m: float | None = None,
    radius_column: str | None = None,
    boundaries=None,
    boundary_id: str = "id",
    at_point: str | None = None,
    n_vertices: int = 128,
) -> UnitSet:
    """Build one unit per study record.

    Parameters
    ----------
    table : StudyTable
        The study table (:func:`covextract.io.tables.read_study_table`).
    id_column : str
        Column with the unique record id; ids are compared as text.
    points : dict, optional
        ``{"x": column, "y": column, "crs": "EPSG:4326"}`` for tables with
        coordinate columns; ``crs`` defaults to EPSG:4326 (x = longitude,
        y = latitude, decimal degrees). Without it, a vector table's point
        geometries are used.
    buffer_m : float, optional
        Geodesic buffer radius in metres around each point.
    radius_column : str, optional
        Column holding a radius in metres per record (instead of ``buffer_m``).
    boundaries : geopandas.GeoDataFrame, optional
        Polygons joined to the records by id
        (:func:`covextract.io.tables.read_boundaries`).
    boundary_id : str, default "id"
        Id column of ``boundaries``.
    at_point : {"nearest", "bilinear"}, optional
        Point units: the value of a layer at each point, by that method.
    n_vertices : int, default 128
        Vertices of each buffer polygon.

    Returns
    -------
    UnitSet

    Notes
    -----
    The unit shape is chosen as follows: ``boundaries`` gives area units
    joined by id (records without a boundary get ``None`` and
    ``no_boundary``; boundaries of ids not in the table are ignored);
    ``buffer_m``/``radius_column`` give geodesic buffers around the points,
    stored in the points' geographic CRS (the geodetic CRS of a projected
    one); ``at_point`` gives point units in the points' CRS; with none of
    these a vector table of polygons gives its own polygons. At most one of
    ``buffer_m``/``radius_column``, ``boundaries``, ``at_point`` may be set.

    Raises
    ------
    TableError
        Bad ids, coordinates, radii, boundary ids; no or several unit shapes
        chosen; geometry types that do not fit the chosen shape.
    GeometryError
        A buffer cannot be built (radius above 1000 km, circle over a pole).

    Warns
    -----
    SuspectLocationWarning
        Points at (0, 0) or sentinel values; they get ``None``.
    GeometryRepairedWarning
        Invalid polygons were repaired.
    """
    ids = _table_ids(table, id_column)
    n = len(ids)
    qa: list[list[str]] = [[] for _ in range(n)]
    notes: list[tuple[type, str]] = []

    chosen = [
        key
        for key, on in (
            ("units.buffer_m", buffer_m is not None or radius_column is not None),
            ("units.boundaries", boundaries is not None),
            ("units.at_point", at_point is not None),
        )
        if on
    ]
    if len(chosen) > 1:
        raise TableError(
            f"choose one unit shape: {' and '.join(chosen)} are both set. Keep one of "
            "units.buffer_m / units.boundaries / units.at_point (a covariate may override "
            "the buffer for a sensitivity run)."
        )
    if buffer_m is not None and radius_column is not None:
        raise TableError(
            "give the buffer radius either as a number (units.buffer_m: 2000) or as a column "
            "(units.buffer_m: {column: radius_m}), not both."
        )

    if boundaries is not None:
        units = _join_boundaries(table, ids, qa, notes, boundaries, boundary_id, id_column)
    elif buffer_m is not None or radius_column is not None:
        pts = _locate(table, points, ids, qa, "a buffer")
        notes += _screen_points(pts, ids, qa, table)
        units = _buffers(table, ids, qa, pts, buffer_m, radius_column, n_vertices)
    elif at_point is not None:
        if at_point not in AT_POINT_METHODS:
            raise GeometryError(
                f"units.at_point is {at_point!r}; choose one of "
                + ", ".join(repr(m) for m in AT_POINT_METHODS)
                + "."
            )
        pts = _locate(table, points, ids, qa, "at_point")
        notes += _screen_points(pts, ids, qa, table)
        geoms = np.full(n, None, dtype=object)
        geoms[pts.usable] = shapely.points(pts.x[pts.usable], pts.y[pts.usable])
        units = UnitSet(
            ids=ids,
            geometry=geoms,
            crs=pts.crs,
            kind="point",
            qa=qa,
            description=f"value at each point ({at_point})",
            params={"shape": "point", "method": at_point},
        )
    else:
        units = _own_polygons(table, ids, qa, notes, points)

    for cls, message in notes:
        warnings.warn(message, cls, stacklevel=2)
    return units


def _locate(table: StudyTable, points, ids, qa, purpose: str) -> _Points:
    if points is not None:
        return _points_from_columns(table, points, ids, qa)
    if table.geometry is None:
        raise TableError(
            f"{purpose} needs point locations, but {_name(table)} has no geometry and "
            "study.points is not set. Name the coordinate columns with "
            "study.points: {x: lon, y: lat, crs: 'EPSG:4326'}."
        )
    geoms = np.asarray(table.geometry.to_numpy(), dtype=object)
    types = _geometry_types(geoms)
    if set(types) - {"0"}:
        raise TableError(
            f"{purpose} needs one point per record, but {_name(table)} holds "
            f"{_type_summary(types)}. For polygons drop the buffer/at_point setting to use "
            "them as they are; for multi-part points keep one point per record."
        )
    return _points_from_geometry(table, ids, qa)


def _buffers(table, ids, qa, pts: _Points, buffer_m, radius_column, n_vertices) -> UnitSet:
    n = len(ids)
    if int(n_vertices) < MIN_VERTICES:
        raise GeometryError(
            f"n_vertices is {n_vertices}; a buffer polygon needs at least {MIN_VERTICES}."
        )
    use = pts.usable.copy()
    if radius_column is not None:
        frame = table.frame
        if radius_column not in frame.columns:
            raise TableError(
                f"radius column {radius_column!r} (units.buffer_m.column) is not in "
                f"{_name(table)}. " + column_hint(str(radius_column), frame.columns)
            )
        radius, r_missing = _parse_numbers(
            frame[radius_column], radius_column, ids, "radius", table
        )
        bad = use & (r_missing | ~(radius > 0))
        if bad.any():
            rows = np.flatnonzero(bad)
            values = frame[radius_column].to_numpy()
            raise TableError(
                f"column {radius_column!r} of {_name(table)} has {rows.size} radius value(s) "
                f"that are empty, zero or negative: {_examples(rows, ids, values)}. Give a "
                "positive radius in metres for every record with a location."
            )
        too_large = use & (radius > MAX_RADIUS_M)
        if too_large.any():
            rows = np.flatnonzero(too_large)
            raise GeometryError(
                f"column {radius_column!r} of {_name(table)} has {rows.size} radius value(s) "
                f"above {MAX_RADIUS_M:g} m: {_examples(rows, ids, radius)}. Radii are in "
                "metres; check the unit of the column."
            )
    else:
        try:
            r = parse_buffer(buffer_m).radius_m
        except OptionError as exc:
            raise GeometryError(f"units.buffer_m is {buffer_m!r}: {exc}.") from None
        if r is None:
            raise GeometryError(
                f"units.buffer_m is {buffer_m!r}; give a column of radii as radius_column."
            )
        radius = np.full(n, r)

    # Buffers are traced in lon/lat on the points' own ellipsoid.
    geo_crs = pts.crs if pts.crs.is_geographic else pts.crs.geodetic_crs
    if geo_crs is None or not geo_crs.is_geographic:
        raise GeometryError(
            f"the points' CRS {pts.crs.name!r} has no geographic CRS to trace buffers in; "
            "give the points in a geographic or projected CRS."
        )
    geod = geo_crs.get_geod()
    lon, lat = pts.x[use], pts.y[use]
    if not pts.crs.is_geographic and lon.size:
        tr = _transformer(pts.crs.to_wkt(), geo_crs.to_wkt())
        lon, lat = (np.asarray(a, dtype=np.float64) for a in tr.transform(lon, lat))
    problems = buffer_input_problems(lon, lat, radius[use], ellps=geod)
    pole = problems["pole"] | problems["not_finite"] | problems["latitude"]
    if pole.any():
        rows = np.flatnonzero(use)[pole]
        raise GeometryError(
            f"{rows.size} buffer(s) cannot be traced as a ring in lon/lat because they "
            f"reach a pole or the point cannot be placed on the ellipsoid: "
            f"{_examples(rows, ids)}. Use a smaller radius or boundaries for those records."
        )
    geoms = np.full(n, None, dtype=object)
    if lon.size:
        geoms[use] = geodesic_buffers(lon, lat, radius[use], n_vertices=n_vertices, ellps=geod)

    params = {
        "shape": "buffer",
        "radius_m": None if radius_column is not None else float(buffer_m),
        "radius_column": radius_column,
        "n_vertices": int(n_vertices),
        "ellipsoid": geo_crs.ellipsoid.name if geo_crs.ellipsoid is not None else None,
    }
    if radius_column is None:
        description = f"geodesic buffer of {float(buffer_m):g} m around each point"
    elif use.any():
        lo, hi = float(radius[use].min()), float(radius[use].max())
        description = f"geodesic buffer, radius from column {radius_column} ({lo:g}-{hi:g} m)"
    else:
        description = f"geodesic buffer, radius from column {radius_column}"
    return UnitSet(
        ids=ids,
        geometry=geoms,
        crs=geo_crs,
        kind="area",
        qa=qa,
        description=description,
        params=params,
    )


def _join_boundaries(table, ids, qa, notes, boundaries, boundary_id, id_column) -> UnitSet:
    source = boundaries.attrs.get("source", "the boundary layer")
    if boundary_id not in boundaries.columns:
        raise TableError(
            f"boundary id column {boundary_id!r} is not in {source}. "
            + column_hint(boundary_id, [c for c in boundaries.columns if c != "geometry"])
        )
    if boundaries.crs is None:
        raise TableError(
            f"{source} has no CRS. Assign the CRS its coordinates are in and save it again."
        )
    b_ids, b_missing = ids_as_text(boundaries[boundary_id].to_numpy())
    b_geoms = np.asarray(boundaries.geometry.to_numpy(), dtype=object)
    b_ids, b_geoms = b_ids[~b_missing], b_geoms[~b_missing]
    dup = pd.Series(b_ids).duplicated(keep=False).to_numpy()
    if dup.any():
        values = list(dict.fromkeys(b_ids[dup]))
        raise TableError(
            f"{len(values)} id(s) occur more than once in column {boundary_id!r} of {source}: "
            + ", ".join(repr(v) for v in values[:_MAX_EXAMPLES])
            + (f" and {len(values) - _MAX_EXAMPLES} more" if len(values) > _MAX_EXAMPLES else "")
            + ". Each unit needs one feature: dissolve the parts into one (multi)polygon per "
            "id (geopandas `dissolve(by=...)`)."
        )
    _require_polygons(
        _geometry_types(b_geoms),
        source,
        "Give a boundary file of polygons (points need units.buffer_m or units.at_point).",
    )
    lookup = pd.Series(np.arange(len(b_ids)), index=pd.Index(b_ids, dtype=object))
    pos = lookup.reindex(pd.Index(ids, dtype=object)).to_numpy(dtype=np.float64)
    matched = ~np.isnan(pos)
    if len(ids) and not matched.any():
        hint = ""
        stripped = {str(b).lstrip("0") for b in b_ids}
        if any(str(t).lstrip("0") in stripped for t in ids[:1000]):
            hint = (
                " Some ids differ only by leading zeros: the two columns must hold the same"
                " text (a spreadsheet may have dropped the zeros)."
            )
        if not len(b_ids):
            raise TableError(
                f"no record of {_name(table)} matches a boundary: {source} has no feature "
                f"with an id in {boundary_id!r}. Check units.boundaries.id and that the file "
                "holds the boundaries."
            )
        raise TableError(
            f"no record of {_name(table)} matches a boundary: ids in {id_column!r} look like "
            + ", ".join(repr(v) for v in ids[:3])
            + f", ids in {boundary_id!r} of {source} look like "
            + ", ".join(repr(v) for v in b_ids[:3])
            + f".{hint} Check study.id and units.boundaries.id."
        )
    joined = np.full(len(ids), None, dtype=object)
    joined[matched] = b_geoms[pos[matched].astype(np.int64)]
    for i in np.flatnonzero(~matched):
        qa[i].append("no_boundary")
    # Only matched records are cleaned; unmatched ones already carry no_boundary.
    cleaned, cnotes = _clean_polygons(joined, qa, ids, "empty_geometry", source, matched)
    notes += cnotes
    return UnitSet(
        ids=ids,
        geometry=cleaned,
        crs=pyproj.CRS.from_user_input(boundaries.crs),
        kind="area",
        qa=qa,
        description=f"boundary from {source}, matched on {id_column}",
        params={
            "shape": "boundaries",
            "source": source,
            "id_column": id_column,
            "boundary_id": boundary_id,
        },
    )


def _own_polygons(table, ids, qa, notes, points) -> UnitSet:
    if table.geometry is None or points is not None:
        raise TableError(
            f"{_name(table)} gives points, not areas: choose one of units.buffer_m / "
            "units.boundaries / units.at_point (a buffer around each point, boundaries "
            "joined by id, or the value at the point)."
        )
    geoms = np.asarray(table.geometry.to_numpy(), dtype=object)
    types = _geometry_types(geoms)
    if types and set(types) <= {"0"}:
        raise TableError(
            f"{_name(table)} holds point geometries: choose one of units.buffer_m / "
            "units.boundaries / units.at_point."
        )
    _require_polygons(
        types,
        _name(table),
        "Give one polygon per record, or use units.buffer_m around points.",
    )
    cleaned, cnotes = _clean_polygons(geoms, qa, ids, "no_location", _name(table))
    notes += cnotes
    return UnitSet(
        ids=ids,
        geometry=cleaned,
        crs=table.crs,
        kind="area",
        qa=qa,
        description=f"own polygon of each record in {_name(table)}",
        params={"shape": "own_polygons", "source": _name(table)},
    )
