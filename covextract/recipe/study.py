"""The recipe's ``study:`` and ``units:`` blocks: the records and the shape of each unit."""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import PlainSerializer, PlainValidator, field_validator, model_validator

from covextract.core.options import POINT_METHOD_NAMES, OptionError, parse_buffer
from covextract.recipe.common import (
    BOUNDARY_SUFFIXES,
    SHAPE_KEYS,
    STUDY_TABLE_SUFFIXES,
    Column,
    PathText,
    RecipeModel,
    check_crs,
    check_suffix,
    describe,
    issue,
    problem,
    raise_issues,
    suffix_of,
    validate_with,
)

__all__ = ["ColumnBuffer", "BufferSpec", "Points", "Study", "Boundaries", "Units"]


class ColumnBuffer(RecipeModel):
    """A buffer radius read per record from a column of the study table.

    Parameters
    ----------
    column : str
        Column holding the radius of each record's buffer, in metres.
    """

    column: Column


def _buffer_value(value: Any) -> float | ColumnBuffer:
    # A mapping goes through its model first, so a wrong key inside it is
    # reported at its own line with the usual did-you-mean.
    if isinstance(value, dict):
        value = ColumnBuffer.model_validate(value)
    try:
        parsed = parse_buffer(value, describe=describe)
    except OptionError as exc:
        raise problem(str(exc)) from None
    return value if isinstance(value, ColumnBuffer) else parsed.radius_m


def _dump_buffer(value: float | ColumnBuffer) -> Any:
    return value.model_dump() if isinstance(value, ColumnBuffer) else value


#: ``buffer_m``: a radius in metres, or ``{column: <name>}`` for one radius per record.
BufferSpec = Annotated[
    float | ColumnBuffer,
    PlainValidator(_buffer_value),
    PlainSerializer(_dump_buffer),
]


class Points(RecipeModel):
    """Point locations read from two columns of the study table.

    Parameters
    ----------
    x, y : str
        Columns with the easting/longitude and northing/latitude.
    crs : str
        CRS of the coordinates, anything ``pyproj.CRS.from_user_input``
        reads; default ``"EPSG:4326"`` (longitude, latitude in degrees).
    """

    x: Column
    y: Column
    crs: str = "EPSG:4326"

    @field_validator("crs")
    @classmethod
    def _valid_crs(cls, value: str | None) -> str | None:
        return check_crs(value)


class Study(RecipeModel):
    """The study table: one row per village, cluster, facility or household.

    Parameters
    ----------
    table : str
        Path of the table (csv, parquet, gpkg, geojson, shp).
    id : str
        Column with the unique record key (kept as text).
    layer : str, optional
        Layer inside a GeoPackage.
    points : Points, optional
        Point locations from two columns.
    date : str, optional
        Column with each record's date (visit date).
    date_format : str, optional
        ``strftime`` pattern of ``date`` when it is not ISO 8601.
    """

    table: PathText
    id: Column
    layer: str | None = None
    points: Points | None = None
    date: Column | None = None
    date_format: str | None = None

    @field_validator("table")
    @classmethod
    def _table_type(cls, value: str) -> str:
        return check_suffix(value, STUDY_TABLE_SUFFIXES, "reads as a study table")

    @model_validator(mode="after")
    def _consistent(self) -> Study:
        issues = []
        if self.layer is not None and suffix_of(self.table) != ".gpkg":
            issues.append(
                issue(
                    ("layer",),
                    f"layer names a layer inside a GeoPackage, but {self.table!r} is not a "
                    ".gpkg file; remove layer",
                    self.layer,
                )
            )
        if self.date_format is not None and self.date is None:
            issues.append(
                issue(
                    ("date_format",),
                    "date_format is given but no date column; add date: <column> or "
                    "remove date_format",
                    self.date_format,
                )
            )
        raise_issues("Study", issues)
        return self


class Boundaries(RecipeModel):
    """Unit polygons joined to the study table by id.

    Parameters
    ----------
    file : str
        Path of the boundaries file (gpkg, geojson, shp, parquet).
    id : str
        Column of the boundaries file matching ``study.id``.
    layer : str, optional
        Layer inside a GeoPackage.
    """

    file: PathText
    id: Column
    layer: str | None = None

    @field_validator("file")
    @classmethod
    def _file_type(cls, value: str) -> str:
        return check_suffix(value, BOUNDARY_SUFFIXES, "reads as boundaries")

    @model_validator(mode="after")
    def _layer_in_geopackage(self) -> Boundaries:
        if self.layer is not None and suffix_of(self.file) != ".gpkg":
            raise_issues(
                "Boundaries",
                [
                    issue(
                        ("layer",),
                        f"layer names a layer inside a GeoPackage, but {self.file!r} is not "
                        "a .gpkg file; remove layer",
                        self.layer,
                    )
                ],
            )
        return self


class Units(RecipeModel):
    """The shape of each unit; at most one of the three may be given.

    With none given, each record's own geometry (from a geospatial study
    table) is the unit.

    Parameters
    ----------
    buffer_m : float or ColumnBuffer, optional
        Geodesic buffer around each point, radius in metres, or a column
        of radii.
    boundaries : Boundaries, optional
        Polygons from another file, joined by id.
    at_point : {"nearest", "bilinear"}, optional
        The value under each point instead of an area.
    """

    buffer_m: BufferSpec | None = None
    boundaries: Boundaries | None = None
    at_point: Literal[POINT_METHOD_NAMES] | None = None

    @model_validator(mode="wrap")
    @classmethod
    def _one_shape(cls, data: Any, handler) -> Units:
        # Checked on the raw block so a conflict is reported even when one of
        # the shapes is itself invalid.
        issues = []
        if isinstance(data, dict):
            given = [k for k in SHAPE_KEYS if data.get(k) is not None]
            if len(given) > 1:
                issues.append(
                    issue(
                        (),
                        f"give only one unit shape, found {' and '.join(given)}; to compare "
                        "shapes, set buffer_m on a covariate instead",
                        given,
                    )
                )
        return validate_with(cls, data, handler, issues)
