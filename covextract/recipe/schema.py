"""The recipe, version 1: pydantic models and their validation rules.

The models mirror the YAML a user writes (see "Recipe (user contract,
version 1)" in the design notes). Validation is strict on types, because a
recipe is typed by hand and YAML guesses types: ``2000`` is a number,
``"2000"`` is text, and an unquoted ``off`` is the boolean false. Every model
forbids unknown keys.

Problems are collected, not raised one at a time: checks inside one block
(a layer, a covariate) run in that block's model; checks that need several
blocks (a covariate naming a layer, statistics that depend on the layer's
kind and on the unit shape) run on the raw data in :class:`Recipe`'s wrap
validator, so they are reported together with pydantic's own errors even when
other parts of the recipe are invalid.

Error messages raised here are final, plain sentences (error type
``"recipe"``); :mod:`covextract.recipe.loader` rewrites pydantic's generic
ones and adds the file and line.

Paths are kept as the text the user wrote; :meth:`Recipe.resolve` turns them
into paths relative to the recipe's folder.
"""

from __future__ import annotations

import datetime
import difflib
import hashlib
import json
import os
import re
from pathlib import Path, PurePath
from typing import Annotated, Any, Literal

from pydantic import (
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    PlainSerializer,
    PlainValidator,
    PrivateAttr,
    StringConstraints,
    ValidationError,
    field_validator,
    model_validator,
)
from pydantic_core import InitErrorDetails, PydanticCustomError

from covextract.stats.names import (
    POINT_STATS,
    THRESHOLD_STATS,
    known_stat_names,
    parse_stat,
)

__all__ = [
    "RECIPE_VERSION",
    "NAME_PATTERN",
    "CATEGORICAL_STATS",
    "STUDY_TABLE_SUFFIXES",
    "BOUNDARY_SUFFIXES",
    "OUTPUT_TABLE_SUFFIXES",
    "STATE_FOLDER_NAME",
    "ColumnBuffer",
    "Points",
    "Study",
    "Boundaries",
    "Units",
    "Layer",
    "Covariate",
    "Output",
    "Execution",
    "Recipe",
]

#: The recipe version this module reads.
RECIPE_VERSION = 1
#: Layer names, covariate names and class labels become parts of column names.
NAME_PATTERN = r"^[a-z][a-z0-9_]*$"
#: Statistics of categorical layers (``share`` gives one column per class or group).
CATEGORICAL_STATS = (
    "share",
    "dominant",
    "classes_present",
    "shannon",
    "valid_share",
    "transition",
    "net_change",
)
#: Categorical statistics that compare with an earlier layer (``since:``).
CHANGE_STATS = ("transition", "net_change")
#: File types a study table may have (lower-case suffixes).
STUDY_TABLE_SUFFIXES = (".csv", ".parquet", ".gpkg", ".geojson", ".shp")
#: File types a boundaries file may have.
BOUNDARY_SUFFIXES = (".gpkg", ".geojson", ".shp", ".parquet")
#: File types the output table may have.
OUTPUT_TABLE_SUFFIXES = (".csv", ".parquet", ".gpkg")
#: Default name of the weights-cache folder, created next to the study table.
STATE_FOLDER_NAME = ".covextract-state"

_AT_POINT_CHOICES = ("nearest", "bilinear")
_KIND_CHOICES = ("continuous", "categorical")
_SHAPE_KEYS = ("buffer_m", "boundaries", "at_point")


# --------------------------------------------------------------------------
# helpers shared by the validators


def _problem(message: str) -> PydanticCustomError:
    """Make a validation error whose text is final (braces in it are kept as is)."""
    return PydanticCustomError("recipe", "{message}", {"message": message})


def _issue(loc: tuple, message: str, value: Any = None) -> InitErrorDetails:
    return {"type": _problem(message), "loc": loc, "input": value}


def _raise_issues(title: str, issues: list[InitErrorDetails]) -> None:
    # A ValidationError raised inside a validator keeps each issue's own
    # location (prefixed by the enclosing one), so one block can report
    # several problems at the keys they concern.
    if issues:
        raise ValidationError.from_exception_data(title, issues)


def _validate_with(cls: type, data: Any, handler, issues: list[InitErrorDetails]) -> Any:
    """Run a wrap validator's handler and report its errors together with ``issues``."""
    try:
        value = handler(data)
    except ValidationError as exc:
        if not issues:
            raise
        raise ValidationError.from_exception_data(cls.__name__, _reissue(exc) + issues) from None
    _raise_issues(cls.__name__, issues)
    return value


def _hint(word: str, choices) -> str:
    """``"; did you mean 'x'?"`` for the closest choice, or ``""``."""
    close = difflib.get_close_matches(word, [str(c) for c in choices], n=1, cutoff=0.6)
    return f"; did you mean {close[0]!r}?" if close else ""


def _describe(value: Any) -> str:
    """Show a value as a user would recognise it, with its YAML type."""
    if isinstance(value, bool):
        return (
            f"{str(value).lower()} (a yes/no value: YAML reads unquoted yes, no, on, off, "
            "true and false that way; put quotes around it to mean text)"
        )
    if value is None:
        return "nothing (an empty value)"
    if isinstance(value, str):
        return f"{value!r} (text)"
    if isinstance(value, int):
        return f"{value} (a whole number)"
    if isinstance(value, float):
        return f"{value!r} (a number)"
    if isinstance(value, (datetime.date, datetime.time)):
        return f"{value.isoformat()} (a date or time; put it in quotes to mean text)"
    if isinstance(value, list):
        return "a list"
    if isinstance(value, dict):
        return "a mapping"
    return f"{value!r} ({type(value).__name__})"


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _same_path(a: str, b: str) -> bool:
    return os.path.normpath(os.path.expanduser(a)) == os.path.normpath(os.path.expanduser(b))


def _suffix(path: str) -> str:
    return PurePath(path).suffix.lower()


def _check_suffix(path: str, allowed: tuple[str, ...], what: str) -> str:
    if _suffix(path) not in allowed:
        raise _problem(
            f"{path!r} is not a file type covextract {what}; use a file ending in "
            + ", ".join(allowed)
        )
    return path


def _check_crs(value: str | None) -> str | None:
    if value is None:
        return None
    # Imported here: pyproj is heavy and only needed when a CRS is given.
    from pyproj import CRS
    from pyproj.exceptions import CRSError

    try:
        CRS.from_user_input(value)
    except CRSError as exc:
        detail = str(exc).splitlines()[0] if str(exc) else "unknown CRS"
        raise _problem(
            f"{value!r} is not a coordinate reference system pyproj can read ({detail}); "
            'give an authority code such as "EPSG:4326" or a WKT/PROJ string'
        ) from None
    return value


def _empty_block(value: Any) -> Any:
    # ``units:`` with nothing under it parses as None: treat it as an empty block.
    return {} if value is None else value


# --------------------------------------------------------------------------
# field types

#: A column of the study table or of a boundaries file.
Column = Annotated[str, StringConstraints(min_length=1)]
#: A path as written in the recipe (relative to the recipe's folder).
PathText = Annotated[str, StringConstraints(min_length=1)]
#: A name that becomes part of column names.
Name = Annotated[str, StringConstraints(pattern=NAME_PATTERN)]
#: A finite number.
Finite = Annotated[float, Field(allow_inf_nan=False)]


class _Model(BaseModel):
    """Base of every recipe model: strict types, no unknown keys."""

    model_config = ConfigDict(extra="forbid", strict=True)


class ColumnBuffer(_Model):
    """A buffer radius read per record from a column of the study table.

    Parameters
    ----------
    column : str
        Column holding the radius of each record's buffer, in metres.
    """

    column: Column


def _buffer_value(value: Any) -> float | ColumnBuffer:
    if isinstance(value, ColumnBuffer):
        return value
    if isinstance(value, dict):
        return ColumnBuffer.model_validate(value)
    if _is_number(value):
        if value != value or value in (float("inf"), float("-inf")):
            raise _problem("a buffer radius must be a finite number of metres")
        if value <= 0:
            raise _problem(f"a buffer radius must be more than 0 metres, got {value}")
        return float(value)
    raise _problem(
        "expected a buffer radius in metres (a number > 0) or {column: <column of radii "
        f"in metres>}}, got {_describe(value)}"
    )


def _dump_buffer(value: float | ColumnBuffer) -> Any:
    return value.model_dump() if isinstance(value, ColumnBuffer) else value


#: ``buffer_m``: a radius in metres, or ``{column: <name>}`` for one radius per record.
BufferSpec = Annotated[
    float | ColumnBuffer,
    PlainValidator(_buffer_value),
    PlainSerializer(_dump_buffer),
]


def _area_weighting(value: Any) -> Any:
    # YAML 1.1 (PyYAML) reads an unquoted ``off`` as False. ``on``/``yes``/
    # ``true`` read as True, which names no choice: refuse it rather than
    # guess between ``auto`` and something else.
    if value is False:
        return "off"
    if value is True:
        raise _problem(
            "area_weighting: true is not a choice (YAML reads unquoted on, yes and true "
            "as true); use auto (weight pixels by their true ground area where it varies) "
            "or off"
        )
    return value


def _nodata_list(value: Any) -> Any:
    if _is_number(value):
        return [value]
    if value is None or isinstance(value, list):
        return value
    raise _problem(f"expected a number or a list of numbers, got {_describe(value)}")


def _check_version(value: Any) -> Any:
    # Literal[1] alone would take True and 1.0, which equal 1 in Python.
    if value is None:
        raise _problem(f"the recipe version is empty; write version: {RECIPE_VERSION}")
    if not (isinstance(value, int) and not isinstance(value, bool)) or value != RECIPE_VERSION:
        raise _problem(
            f"unsupported recipe version {_describe(value)}: this covextract reads "
            f"version {RECIPE_VERSION}; write version: {RECIPE_VERSION}"
        )
    return value


# --------------------------------------------------------------------------
# blocks


class Points(_Model):
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
        return _check_crs(value)


class Study(_Model):
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
        return _check_suffix(value, STUDY_TABLE_SUFFIXES, "reads as a study table")

    @model_validator(mode="after")
    def _consistent(self) -> Study:
        issues = []
        if self.layer is not None and _suffix(self.table) != ".gpkg":
            issues.append(
                _issue(
                    ("layer",),
                    f"layer names a layer inside a GeoPackage, but {self.table!r} is not a "
                    ".gpkg file; remove layer",
                    self.layer,
                )
            )
        if self.date_format is not None and self.date is None:
            issues.append(
                _issue(
                    ("date_format",),
                    "date_format is given but no date column; add date: <column> or "
                    "remove date_format",
                    self.date_format,
                )
            )
        _raise_issues("Study", issues)
        return self


class Boundaries(_Model):
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
        return _check_suffix(value, BOUNDARY_SUFFIXES, "reads as boundaries")

    @model_validator(mode="after")
    def _layer_in_geopackage(self) -> Boundaries:
        if self.layer is not None and _suffix(self.file) != ".gpkg":
            _raise_issues(
                "Boundaries",
                [
                    _issue(
                        ("layer",),
                        f"layer names a layer inside a GeoPackage, but {self.file!r} is not "
                        "a .gpkg file; remove layer",
                        self.layer,
                    )
                ],
            )
        return self


class Units(_Model):
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
    at_point: Literal["nearest", "bilinear"] | None = None

    @model_validator(mode="wrap")
    @classmethod
    def _one_shape(cls, data: Any, handler) -> Units:
        # Checked on the raw block so a conflict is reported even when one of
        # the shapes is itself invalid.
        issues = []
        if isinstance(data, dict):
            given = [k for k in _SHAPE_KEYS if data.get(k) is not None]
            if len(given) > 1:
                issues.append(
                    _issue(
                        (),
                        f"give only one unit shape, found {' and '.join(given)}; to compare "
                        "shapes, set buffer_m on a covariate instead",
                        given,
                    )
                )
        return _validate_with(cls, data, handler, issues)


class Band(_Model):
    """One input band of a band-math layer.

    Parameters
    ----------
    file : str
        Raster path.
    band : int
        1-based band number; default 1.
    scale, offset : float, optional
        Physical value = stored × scale + offset, applied before the index.
    nodata : list of float, optional
        Stored fill values, in addition to the file's own nodata.
    """

    file: PathText
    band: Annotated[int, Field(ge=1)] = 1
    scale: Finite | None = None
    offset: Finite | None = None
    nodata: Annotated[
        Annotated[list[Finite], Field(min_length=1)] | None,
        BeforeValidator(_nodata_list),
    ] = None


class Layer(_Model):
    """One raster band and how to read it.

    Parameters
    ----------
    file : str
        Raster path.
    band : int
        1-based band number; default 1.
    kind : {"continuous", "categorical"}
        Measured values or class codes; default continuous.
    scale, offset : float, optional
        Physical value = stored value × scale + offset (continuous only).
    nodata : list of float, optional
        Stored values to treat as missing, in addition to the file's own
        nodata; a single number is read as a list of one.
    valid_range : [float, float], optional
        Physical values outside ``[min, max]`` are treated as missing
        (continuous only).
    crs : str, optional
        CRS of a raster whose file has none.
    unit, source, version, citation, license : str, optional
        Metadata copied to the codebook and the manifest.
    classes : dict of int to str
        Class code to label (categorical layers; required there).
    groups : dict of str to list of int, optional
        Several class codes counted as one (categorical layers).
    bands : dict of str to Band, optional
        Instead of ``file``: named bands of rasters on one grid, combined per
        pixel by ``index`` or ``expression``.
    index : {"ndvi", "evi"}, optional
        A built-in index of ``bands`` (NDVI: bands nir, red; EVI: nir, red, blue).
    expression : str, optional
        A band-math formula over the band names, e.g. ``(nir - red) / (nir + red)``.
    ceiling : float, optional
        Physical values above it are set to it (saturated night lights).
    every : str, optional
        Makes the layer a series: ``file`` is a path template with date fields
        (``rain_{year}{month:02d}.tif``) and each file covers one step of
        ``month``, ``day``, ``year`` or ``N days``; for a NetCDF cube, the
        step when the file has no time bounds.
    variable : str, optional
        The variable of a NetCDF cube (``file: rain.nc``); makes the layer a
        series with the time axis of the file.
    """

    file: PathText | None = None
    band: Annotated[int, Field(ge=1)] = 1
    kind: Literal["continuous", "categorical"] = "continuous"
    scale: Finite | None = None
    offset: Finite | None = None
    nodata: Annotated[
        Annotated[list[Finite], Field(min_length=1)] | None,
        BeforeValidator(_nodata_list),
    ] = None
    valid_range: Annotated[list[Finite], Field(min_length=2, max_length=2)] | None = None
    crs: str | None = None
    unit: str | None = None
    source: str | None = None
    version: str | None = None
    citation: str | None = None
    license: str | None = None
    classes: Annotated[dict[int, Name], Field(min_length=1)] | None = None
    groups: (
        Annotated[dict[Name, Annotated[list[int], Field(min_length=1)]], Field(min_length=1)] | None
    ) = None
    bands: Annotated[dict[Name, Band], Field(min_length=1)] | None = None
    index: Literal["ndvi", "evi"] | None = None
    expression: Annotated[str, StringConstraints(min_length=1)] | None = None
    ceiling: Finite | None = None
    every: Annotated[str, StringConstraints(min_length=1)] | None = None
    variable: Annotated[str, StringConstraints(min_length=1)] | None = None

    @field_validator("every")
    @classmethod
    def _valid_every(cls, value: str | None) -> str | None:
        if value is not None:
            from covextract.core.periods import parse_every
            from covextract.errors import RecipeError

            try:
                parse_every(value)
            except RecipeError as exc:
                raise _problem(exc.problems[0].message) from None
        return value

    @property
    def is_series(self) -> bool:
        """True for a series of rasters (template or cube)."""
        return self.variable is not None or (self.file is not None and "{" in self.file)

    @field_validator("crs")
    @classmethod
    def _valid_crs(cls, value: str | None) -> str | None:
        return _check_crs(value)

    @field_validator("scale")
    @classmethod
    def _scale_not_zero(cls, value: float | None) -> float | None:
        if value == 0:
            raise _problem("scale 0 would turn every pixel into the offset; remove scale or fix it")
        return value

    @field_validator("valid_range")
    @classmethod
    def _range_order(cls, value: list[float] | None) -> list[float] | None:
        if value is not None and not value[0] < value[1]:
            raise _problem(f"valid_range must be [min, max] with min < max, got {value}")
        return value

    @model_validator(mode="after")
    def _kind_rules(self) -> Layer:
        issues = []
        issues += self._band_rules()
        if self.kind == "categorical":
            if self.classes is None:
                issues.append(
                    _issue(
                        ("classes",),
                        "a categorical layer needs classes: {<code>: <label>, ...} naming "
                        "each class code (labels become column names)",
                    )
                )
            for key in ("scale", "offset", "valid_range"):
                if getattr(self, key) is not None:
                    issues.append(
                        _issue(
                            (key,),
                            f"{key} applies to continuous values, not to class codes; "
                            "remove it from this categorical layer",
                            getattr(self, key),
                        )
                    )
        else:
            for key in ("classes", "groups"):
                if getattr(self, key) is not None:
                    issues.append(
                        _issue(
                            (key,),
                            f"{key} apply to categorical layers; add kind: categorical or "
                            f"remove {key}",
                            getattr(self, key),
                        )
                    )
        if self.kind == "categorical" and self.classes:
            seen: dict[str, int] = {}
            for code, label in self.classes.items():
                if label in seen:
                    issues.append(
                        _issue(
                            ("classes", code),
                            f"label {label!r} is used for codes {seen[label]} and {code}; "
                            "to count several codes as one, give each its own label and "
                            "add a group",
                            label,
                        )
                    )
                seen.setdefault(label, code)
            for label, codes in (self.groups or {}).items():
                if label in seen:
                    issues.append(
                        _issue(
                            ("groups", label),
                            f"group {label!r} has the name of a class; both would write the "
                            "same column: rename the group",
                            label,
                        )
                    )
                for j, code in enumerate(codes):
                    if code not in self.classes:
                        issues.append(
                            _issue(
                                ("groups", label, j),
                                f"class code {code} is not in classes; known codes: "
                                + ", ".join(str(c) for c in self.classes),
                                code,
                            )
                        )
                    elif code in codes[:j]:
                        issues.append(
                            _issue(("groups", label, j), f"class code {code} is listed twice", code)
                        )
        _raise_issues("Layer", issues)
        return self

    def _band_rules(self) -> list:
        issues = []
        if self.file is None and self.bands is None:
            issues.append(
                _issue(
                    ("file",),
                    "a layer needs file: <raster>, or bands: with an "
                    "index: or expression: combining them",
                )
            )
        if self.file is not None and self.bands is not None:
            issues.append(_issue(("bands",), "give either file: or bands:, not both", None))
        if self.bands is not None:
            if self.kind == "categorical":
                issues.append(
                    _issue(
                        ("bands",),
                        "band math gives continuous values; remove kind: categorical",
                        None,
                    )
                )
            if (self.index is None) == (self.expression is None):
                issues.append(
                    _issue(
                        ("index",),
                        "bands: need exactly one of index: (ndvi, evi) "
                        "or expression: to combine them",
                        None,
                    )
                )
            needed = {"ndvi": ("nir", "red"), "evi": ("nir", "red", "blue")}.get(self.index, ())
            missing = [b for b in needed if b not in self.bands]
            if missing:
                issues.append(
                    _issue(
                        ("bands",),
                        f"index {self.index} needs bands named "
                        f"{', '.join(needed)}; missing: {', '.join(missing)}",
                        None,
                    )
                )
            if self.expression is not None:
                from covextract.errors import RecipeError
                from covextract.sources.expression import parse_expression

                try:
                    parse_expression(self.expression, self.bands)
                except RecipeError as exc:
                    issues.append(_issue(("expression",), exc.problems[0].message, self.expression))
        elif self.index is not None or self.expression is not None:
            key = "index" if self.index is not None else "expression"
            issues.append(
                _issue(
                    (key,),
                    f"{key}: combines bands: add bands: {{name: {{file: ...}}}}}}}} to this layer",
                    getattr(self, key),
                )
            )
        if self.file is not None and "{" in self.file and self.every is None:
            issues.append(
                _issue(
                    ("every",),
                    "a file template with date fields needs every: "
                    "(month, day, year or N days), the length of each file's period",
                    None,
                )
            )
        if (
            self.every is not None
            and self.variable is None
            and (self.file is None or "{" not in self.file)
        ):
            issues.append(
                _issue(
                    ("every",),
                    "every: is for series: give file: a template with "
                    "date fields such as rain_{year}{month:02d}.tif, or a NetCDF "
                    "cube with variable:",
                    self.every,
                )
            )
        if self.is_series and self.bands is not None:
            issues.append(_issue(("bands",), "band-math layers cannot be series yet", None))
        if self.ceiling is not None and self.kind == "categorical":
            issues.append(
                _issue(("ceiling",), "ceiling applies to continuous values", self.ceiling)
            )
        return issues


class Before(_Model):
    """A window of whole periods before each record's date.

    Parameters
    ----------
    date : str, optional
        Column of the record's date; default ``study.date``.
    months, lag_months : int
        The ``months`` months ending with the month ``lag_months`` before the
        record's month (``lag_months: 0`` ends with the record's own month).
    days, lag_days : int
        Instead of months: ``days`` days ending ``lag_days`` days before the date.
    combine : {"sum", "mean", "min", "max", "count_above"}
        How the periods' values combine; ``count_above`` needs ``threshold``.
    threshold : float, optional
        For ``count_above`` (strictly greater).
    """

    date: Column | None = None
    months: Annotated[int, Field(ge=1)] | None = None
    lag_months: Annotated[int, Field(ge=0)] = 0
    days: Annotated[int, Field(ge=1)] | None = None
    lag_days: Annotated[int, Field(ge=0)] = 0
    combine: Literal["sum", "mean", "min", "max", "count_above"] = "sum"
    threshold: Finite | None = None

    @model_validator(mode="after")
    def _one_length(self) -> Before:
        issues = []
        if (self.months is None) == (self.days is None):
            issues.append(
                _issue(("months",), "give exactly one of months: or days: for the window's length")
            )
        if self.combine == "count_above" and self.threshold is None:
            issues.append(
                _issue(
                    ("threshold",),
                    "combine: count_above needs threshold: (for "
                    "example 200 for months with more than 200 mm)",
                )
            )
        _raise_issues("Before", issues)
        return self


def _year_range(value):
    """``"1991..2020"`` -> (1991, 2020)."""
    if isinstance(value, str) and ".." in value:
        a, b = value.split("..", 1)
        if a.strip().isdigit() and b.strip().isdigit() and int(a) <= int(b):
            return value
    raise _problem(f"a range of years is written FIRST..LAST (1991..2020), got {value!r}")


class Trend(_Model):
    """Linear trend of each unit's annual values.

    Parameters
    ----------
    periods : str
        Years of the trend, ``2001..2020``.
    min_years : int
        Fewer valid years give a missing trend (QA ``too_few_years``); default 5.
    """

    periods: Annotated[str, BeforeValidator(_year_range)]
    min_years: Annotated[int, Field(ge=3)] = 5


class Change(_Model):
    """Change between two periods, computed per pixel, then summarised per unit.

    Parameters
    ----------
    from : str
        The earlier period (``2019``, ``2019-03``); on a finer series every
        period inside it is first collapsed per pixel.
    to : str
        The later period.
    collapse : {"mean", "sum", "max"}
        How a finer series is collapsed per pixel over each period; default mean.
    """

    model_config = ConfigDict(extra="forbid", strict=True, populate_by_name=True)

    from_: Annotated[str, StringConstraints(min_length=1), Field(alias="from")]
    to: Annotated[str, StringConstraints(min_length=1)]
    collapse: Literal["mean", "sum", "max"] = "mean"

    @field_validator("from_", "to", mode="before")
    @classmethod
    def _text(cls, value):
        return str(value) if isinstance(value, int) and not isinstance(value, bool) else value


class Anomaly(_Model):
    """Anomalies against a baseline, per unit and calendar month.

    Parameters
    ----------
    baseline : str
        Baseline years, ``1991..2020``.
    kind : {"difference", "percent", "zscore", "spi"}
        value − normal; 100·value/normal; (value − normal)/sd; or the
        standardized precipitation index (needs ``months``).
    months : {1, 3, 6, 12}, optional
        SPI time scale.
    min_years : int, optional
        Fewest valid baseline years per calendar month (default 5 for
        anomalies, 10 for SPI, its minimum); fewer give missing values.
    """

    baseline: Annotated[str, BeforeValidator(_year_range)]
    min_years: Annotated[int, Field(ge=2)] | None = None
    kind: Literal["difference", "percent", "zscore", "spi"] = "difference"
    months: Literal[1, 3, 6, 12] | None = None

    @model_validator(mode="after")
    def _spi_scale(self) -> Anomaly:
        if self.kind == "spi" and self.months is None:
            _raise_issues(
                "Anomaly",
                [
                    _issue(
                        ("months",),
                        "kind: spi needs months: 1, 3, 6 or 12 (the time scale of the index)",
                    )
                ],
            )
        if self.kind != "spi" and self.months is not None:
            _raise_issues(
                "Anomaly",
                [
                    _issue(
                        ("months",),
                        "months: is the SPI time scale; use it with kind: spi",
                        self.months,
                    )
                ],
            )
        return self


class Totals(_Model):
    """Known totals per zone (e.g. census counts by district).

    Parameters
    ----------
    file : str
        A CSV or Parquet table.
    id : str
        Column holding the zone id (matches ``zones.id``).
    column : str
        Column holding the total.
    """

    file: PathText
    id: Column
    column: Column


class Reallocate(_Model):
    """Dasymetric reallocation of zone totals over light (a population proxy).

    Parameters
    ----------
    zones : Boundaries
        Zone polygons with an id (``file``, ``id``, ``layer``).
    totals : Totals
        The known total of each zone.
    by : {"light", "lit_area"}
        Spread each total in proportion to light, or to lit area (pixels above
        ``threshold``); default light.
    threshold : float, optional
        Background light below which a pixel is unlit (``by: lit_area``).
    """

    zones: Boundaries
    totals: Totals
    by: Literal["light", "lit_area"] = "light"
    threshold: Finite | None = None

    @model_validator(mode="after")
    def _threshold_for_lit_area(self) -> Reallocate:
        if self.by == "lit_area" and self.threshold is None:
            _raise_issues(
                "Reallocate",
                [_issue(("threshold",), "by: lit_area needs threshold: <background light level>")],
            )
        return self


class Calibrate(_Model):
    """Population proxy by a log–log fit of known counts on light.

    Parameters
    ----------
    known : str
        Study-table column with the known count of the units that have one
        (empty cells: unknown, predicted).
    light : {"density_total", "sum", "mean"}
        Which light statistic of the unit predicts; default density_total.
    """

    known: Column
    light: Literal["density_total", "sum", "mean"] = "density_total"


#: Statistics of population proxies.
PROXY_STATS = {"reallocate": ("allocated",), "calibrate": ("predicted",)}


class Covariate(_Model):
    """Statistics of one layer, summarised per unit.

    Parameters
    ----------
    layer : str
        Name of a layer in ``layers``.
    stats : list of str
        Statistic names (see :mod:`covextract.stats.names`; categorical
        layers take :data:`CATEGORICAL_STATS`).
    pixels : {"overlap", "center", "touched"}
        Which pixels count and with what weight; default overlap
        (the fraction of each pixel's area inside the unit).
    area_weighting : {"auto", "off"}
        ``auto`` weights pixels by their true ground area where it varies
        over the grid; default auto.
    buffer_m : float or ColumnBuffer, optional
        Buffer radius in metres replacing the unit shape for this covariate.
    name : str, optional
        Replaces the layer part of the output column names.
    threshold : float, optional
        Threshold of ``area_above`` and ``share_above``, in the layer's
        physical unit (after scale and offset).
    since : str, optional
        Categorical layers: the earlier layer (same grid) that ``transition``
        and ``net_change`` compare with.
    pairs : list of [from, to], optional
        Class or group labels of the transitions to report (``any`` as
        ``from``: any other class).
    weight_by : str, optional
        A continuous layer on the same grid (e.g. population density) that
        weights means, spreads and percentiles: weight = coverage × area ×
        that layer's value.
    periods : str, optional
        Series layers: the periods to compute into the long panel
        (``2019-01..2020-12``, open ended ``2019-01..``).
    before : Before, optional
        Series layers: combine the per-period statistics over a window before
        each record's date; one column per statistic.
    reallocate : Reallocate, optional
        Population proxy: zone totals spread over the layer's light; stat
        ``allocated``.
    calibrate : Calibrate, optional
        Population proxy: log–log fit on units with known counts; stat
        ``predicted`` (with ``_lower`` and ``_upper`` columns).
    """

    layer: str
    stats: Annotated[list[str], Field(min_length=1)]
    pixels: Literal["overlap", "center", "touched"] = "overlap"
    area_weighting: Annotated[Literal["auto", "off"], BeforeValidator(_area_weighting)] = "auto"
    buffer_m: BufferSpec | None = None
    name: Name | None = None
    threshold: Finite | None = None
    since: Name | None = None
    pairs: list[Annotated[list[Name], Field(min_length=2, max_length=2)]] | None = None
    weight_by: Name | None = None
    periods: Annotated[str, StringConstraints(min_length=1)] | None = None
    before: Before | None = None
    trend: Trend | None = None
    anomaly: Anomaly | None = None
    change: Change | None = None
    reallocate: Reallocate | None = None
    calibrate: Calibrate | None = None


class Output(_Model):
    """Where the results go.

    Parameters
    ----------
    table : str
        The study table with the new columns (.csv, .parquet or .gpkg).
    codebook : str, optional
        Default ``<table stem>_codebook.csv`` next to the table.
    manifest : str, optional
        Default ``<table stem>_manifest.json`` next to the table.
    drop : list of str
        Study-table columns left out of the written table; default none.
    panel : str, optional
        Folder of the long panel of per-period values (Parquet, one file per
        period); needed by covariates with ``periods:``.
    state : str, optional
        Folder of the weights cache. It reveals where the units are, so the
        default (filled in by :class:`Recipe`) sits next to the study table,
        with the confidential inputs, not next to outputs meant for sharing.
    """

    table: PathText
    codebook: PathText | None = None
    manifest: PathText | None = None
    drop: Annotated[list[Column], BeforeValidator(lambda v: [] if v is None else v)] = Field(
        default_factory=list
    )
    state: PathText | None = None
    panel: PathText | None = None

    @field_validator("table")
    @classmethod
    def _table_type(cls, value: str) -> str:
        return _check_suffix(value, OUTPUT_TABLE_SUFFIXES, "writes as an output table")

    @model_validator(mode="after")
    def _defaults_and_clashes(self) -> Output:
        table = PurePath(self.table)
        if self.codebook is None:
            self.codebook = str(table.with_name(table.stem + "_codebook.csv"))
        if self.manifest is None:
            self.manifest = str(table.with_name(table.stem + "_manifest.json"))
        issues = []
        if _same_path(self.codebook, self.table):
            issues.append(
                _issue(("codebook",), "codebook and table are the same file", self.codebook)
            )
        if _same_path(self.manifest, self.table) or _same_path(self.manifest, self.codebook):
            issues.append(
                _issue(("manifest",), "manifest is the same file as another output", self.manifest)
            )
        _raise_issues("Output", issues)
        return self


class Execution(_Model):
    """How the work runs; never changes the results.

    Parameters
    ----------
    threads : int, optional
        Local worker threads; default: one per CPU core.
    scheduler : str, optional
        Address of a running dask.distributed scheduler
        (``tcp://host:8786``); default: local threads.
    """

    threads: Annotated[int, Field(ge=1)] | None = None
    scheduler: Annotated[str, StringConstraints(min_length=1)] | None = None


# --------------------------------------------------------------------------
# checks across blocks (run on the raw data, so they work when other parts fail)


def _stat_problem(stat: str, kind: str, point: bool) -> str | None:
    """Why ``stat`` cannot be asked of a layer of ``kind``, or None."""
    if kind == "categorical" and not point:
        if stat in CATEGORICAL_STATS:
            return None
        message = f"unknown statistic {stat!r} for a categorical layer; valid: " + ", ".join(
            CATEGORICAL_STATS
        )
        candidates: list[str] = list(CATEGORICAL_STATS)
        try:
            parse_stat(stat)
            message += f"; {stat} is a statistic of continuous layers"
        except ValueError:
            pass
    else:
        try:
            parse_stat(stat, point=point)
            return None
        except ValueError as exc:
            message = str(exc)
        candidates = []
        for candidate in known_stat_names():
            try:
                parse_stat(candidate, point=point)
                candidates.append(candidate)
            except ValueError:
                pass
        if not point and stat in POINT_STATS:
            message += f"; {stat} is the value under each point and needs units.at_point"
    if not re.match(r"^q\d", stat):
        message += _hint(stat, candidates)
    return message


def _point_mode(units: Any) -> bool | None:
    """Whether the recipe's units are points (True), areas (False) or unclear (None)."""
    if units is None:
        return False
    if not isinstance(units, dict):
        return None
    given = [k for k in _SHAPE_KEYS if units.get(k) is not None]
    if len(given) > 1:
        return None
    if given == ["at_point"]:
        return True if units["at_point"] in _AT_POINT_CHOICES else None
    return False


def _check_covariate(
    i: int, cov: dict, kinds: dict | None, point_units: bool | None, at_point: Any
) -> list[InitErrorDetails]:
    issues: list[InitErrorDetails] = []
    loc = ("covariates", i)
    layer = cov.get("layer")
    kind = None
    if isinstance(layer, str) and kinds is not None:
        if layer in kinds:
            kind = kinds[layer]
        else:
            issues.append(
                _issue(
                    loc + ("layer",),
                    f"unknown layer {layer!r}{_hint(layer, kinds)} (layers in this recipe: "
                    + ", ".join(str(k) for k in kinds)
                    + ")",
                    layer,
                )
            )
    point = None if point_units is None else (point_units and cov.get("buffer_m") is None)
    proxies = [k for k in PROXY_STATS if cov.get(k) is not None]
    proxy = proxies[0] if proxies else None
    if len(proxies) > 1:
        issues.append(
            _issue(
                loc + (proxies[1],),
                "give reallocate: or calibrate:, not both "
                "(use two covariates with different names)",
            )
        )
    if proxy is not None and kind == "categorical":
        issues.append(_issue(loc + (proxy,), f"{proxy}: needs a continuous light layer", layer))
    if proxy is not None and point:
        issues.append(
            _issue(
                loc + (proxy,),
                f"{proxy}: needs area units (buffers or boundaries), not values at points",
                None,
            )
        )
    stats = cov.get("stats")
    names = [s for s in stats if isinstance(s, str)] if isinstance(stats, list) else []
    if isinstance(stats, list):
        for j, stat in enumerate(stats):
            if not isinstance(stat, str):
                continue  # pydantic reports the type
            if stat in stats[:j]:
                issues.append(
                    _issue(loc + ("stats", j), f"statistic {stat!r} is listed twice", stat)
                )
            elif proxy is not None:
                if stat not in PROXY_STATS[proxy]:
                    issues.append(
                        _issue(
                            loc + ("stats", j),
                            f"a covariate with {proxy}: gives "
                            f"stats: {list(PROXY_STATS[proxy])}; {stat!r} is not one"
                            " (put other statistics in a covariate of their own)",
                            stat,
                        )
                    )
            elif kind is not None:
                # With the unit shape unclear, report only names wrong either way.
                modes = (False, True) if point is None else (point,)
                problems = [_stat_problem(stat, kind, mode) for mode in modes]
                if all(problems):
                    issues.append(_issue(loc + ("stats", j), problems[0], stat))
    needing = [s for s in names if s in THRESHOLD_STATS]
    has_threshold = cov.get("threshold") is not None
    if needing and not has_threshold and not point:
        issues.append(
            _issue(
                loc + ("threshold",),
                f"statistic {needing[0]} needs a threshold: add threshold: <value in the "
                "layer's unit> to this covariate",
            )
        )
    elif has_threshold and isinstance(stats, list) and not needing:
        issues.append(
            _issue(
                loc + ("threshold",),
                "threshold is only used by "
                + " and ".join(THRESHOLD_STATS)
                + "; add one of them to stats or remove threshold",
                cov.get("threshold"),
            )
        )
    if kind == "categorical" and point and at_point == "bilinear":
        issues.append(
            _issue(
                loc + ("layer",),
                f"layer {layer!r} holds class codes, which bilinear interpolation would mix; "
                "use units.at_point: nearest, or give this covariate a buffer_m",
                layer,
            )
        )
    return issues


def _labels_of(spec: Any) -> set:
    if not isinstance(spec, dict):
        return set()
    labels = {str(v) for v in (spec.get("classes") or {}).values()}
    labels |= {str(g) for g in (spec.get("groups") or {})}
    return labels | {"other"}


def _check_change(i: int, cov: dict, layers: dict) -> list[InitErrorDetails]:
    """``since:`` / ``pairs:`` and the statistics that need them."""
    issues: list[InitErrorDetails] = []
    loc = ("covariates", i)
    stats = cov.get("stats") if isinstance(cov.get("stats"), list) else []
    wants = [s for s in stats if s in CHANGE_STATS]
    since = cov.get("since")
    pairs = cov.get("pairs")
    layer = cov.get("layer")
    spec = layers.get(layer) if isinstance(layer, str) else None
    kind = spec.get("kind", "continuous") if isinstance(spec, dict) else None
    if wants and since is None:
        issues.append(
            _issue(
                loc + ("since",),
                f"statistic {wants[0]} compares with an earlier "
                "layer: add since: <name of the earlier categorical layer>",
            )
        )
    if since is not None:
        if kind is not None and kind != "categorical":
            issues.append(_issue(loc + ("since",), "since: is for categorical layers only", since))
        if isinstance(since, str) and since not in layers:
            issues.append(
                _issue(loc + ("since",), f"unknown layer {since!r}{_hint(since, layers)}", since)
            )
        elif isinstance(since, str):
            other = layers[since]
            if isinstance(other, dict) and other.get("kind", "continuous") != "categorical":
                issues.append(
                    _issue(
                        loc + ("since",),
                        f"layer {since!r} is not categorical; "
                        "transitions compare two categorical layers",
                        since,
                    )
                )
            elif (
                isinstance(spec, dict)
                and isinstance(other, dict)
                and ((spec.get("classes") or {}) != (other.get("classes") or {}))
            ):
                issues.append(
                    _issue(
                        loc + ("since",),
                        f"layers {layer!r} and {since!r} have "
                        "different class tables; transitions need the same classes",
                        since,
                    )
                )
        if not wants:
            issues.append(
                _issue(
                    loc + ("since",),
                    "since: is only used by transition and "
                    "net_change; add one of them to stats or remove since",
                    since,
                )
            )
    series = isinstance(spec, dict) and (
        spec.get("variable") is not None or "{" in str(spec.get("file") or "")
    )
    timed = [k for k in ("periods", "before", "trend", "change") if cov.get(k) is not None]
    if cov.get("anomaly") is not None and not ({"periods", "before"} & set(timed)):
        issues.append(
            _issue(
                loc + ("anomaly",),
                "anomaly: turns the series into anomalies; "
                "add periods: (into the panel) or before: (a window before each "
                "visit) to say where they go",
            )
        )
    if timed and isinstance(spec, dict) and not series:
        issues.append(
            _issue(
                loc + (timed[0],),
                f"{timed[0]}: needs a series layer; layer "
                f"{layer!r} is one raster (give it a file template with date "
                "fields and every:, or a NetCDF cube with variable:)",
                None,
            )
        )
    if series and not timed:
        issues.append(
            _issue(
                loc + ("layer",),
                f"layer {layer!r} is a series: add periods: "
                "(values per period, into output.panel), before: (a window "
                "before each record's date) or trend: to this covariate",
                layer,
            )
        )
    if len(timed) >= 2:
        issues.append(
            _issue(
                loc + (timed[1],),
                f"give one of periods:, before: or trend:, not {' and '.join(timed)} "
                "(use covariates with different names)",
            )
        )
    if isinstance(cov.get("periods"), str):
        from covextract.core.periods import parse_selection
        from covextract.errors import RecipeError

        try:
            parse_selection(cov["periods"])
        except RecipeError as exc:
            issues.append(_issue(loc + ("periods",), exc.problems[0].message, cov["periods"]))
    weight_by = cov.get("weight_by")
    if isinstance(weight_by, str):
        other = layers.get(weight_by)
        if other is None:
            issues.append(
                _issue(
                    loc + ("weight_by",),
                    f"unknown layer {weight_by!r}{_hint(weight_by, layers)}",
                    weight_by,
                )
            )
        elif isinstance(other, dict) and other.get("kind", "continuous") != "continuous":
            issues.append(
                _issue(
                    loc + ("weight_by",),
                    f"layer {weight_by!r} holds class codes; "
                    "weight_by needs a continuous layer such as population density",
                    weight_by,
                )
            )
        if kind == "categorical":
            issues.append(
                _issue(loc + ("weight_by",), "weight_by applies to continuous layers", weight_by)
            )
    if "transition" in stats and not pairs:
        issues.append(
            _issue(
                loc + ("pairs",),
                "statistic transition needs pairs: [[from, to], "
                "...] naming classes or groups (from may be any)",
            )
        )
    if pairs and "transition" not in stats:
        issues.append(_issue(loc + ("pairs",), "pairs: is only used by transition", pairs))
    if isinstance(pairs, list) and isinstance(spec, dict):
        labels = _labels_of(spec)
        for j, pair in enumerate(pairs):
            if not (isinstance(pair, list) and len(pair) == 2):
                continue
            for k, label in enumerate(pair):
                if not isinstance(label, str):
                    continue
                if label == "any" and k == 0:
                    continue
                if label not in labels:
                    issues.append(
                        _issue(
                            loc + ("pairs", j, k),
                            f"{label!r} is not a class or "
                            f"group of layer {layer!r}{_hint(label, labels)}; known: "
                            + ", ".join(sorted(labels)),
                            label,
                        )
                    )
    return issues


def _cross_check(data: dict) -> list[InitErrorDetails]:
    issues: list[InitErrorDetails] = []
    study = data.get("study") if isinstance(data.get("study"), dict) else {}
    units = data.get("units")
    units_dict = units if isinstance(units, dict) else {}
    layers = data.get("layers")
    kinds = None
    if isinstance(layers, dict):
        kinds = {}
        for name, spec in layers.items():
            kind = spec.get("kind", "continuous") if isinstance(spec, dict) else None
            kinds[name] = kind if kind in _KIND_CHOICES else None
    point_units = _point_mode(units)
    covariates = data.get("covariates")
    if isinstance(covariates, list):
        for i, cov in enumerate(covariates):
            if isinstance(cov, dict):
                issues += _check_covariate(i, cov, kinds, point_units, units_dict.get("at_point"))
                issues += _check_change(i, cov, layers if isinstance(layers, dict) else {})

    table = study.get("table")
    has_shape = any(units_dict.get(k) is not None for k in _SHAPE_KEYS)
    if (
        isinstance(table, str)
        and _suffix(table) == ".csv"
        and study.get("points") is None
        and units_dict.get("boundaries") is None
    ):
        issues.append(
            _issue(
                ("study", "points"),
                "a CSV table has no geometry: add points: {x: <column>, y: <column>} to study, "
                "or units.boundaries to join polygons by id",
            )
        )
    if study.get("points") is not None and not has_shape and isinstance(covariates, list):
        bare = [
            f"covariates[{i}]"
            for i, cov in enumerate(covariates)
            if isinstance(cov, dict) and cov.get("buffer_m") is None
        ]
        if bare:
            issues.append(
                _issue(
                    ("units",),
                    "the records are points (study.points) but no unit shape is given for "
                    + ", ".join(bare)
                    + ": set units.buffer_m (a buffer in metres around each point), "
                    "units.at_point (the value under each point) or buffer_m on each covariate",
                )
            )

    output = data.get("output")
    out_table = output.get("table") if isinstance(output, dict) else None
    if isinstance(out_table, str):
        inputs = [("study.table", table)]
        boundaries = units_dict.get("boundaries")
        if isinstance(boundaries, dict):
            inputs.append(("units.boundaries.file", boundaries.get("file")))
        for what, path in inputs:
            if isinstance(path, str) and _same_path(path, out_table):
                issues.append(
                    _issue(
                        ("output", "table"),
                        f"output.table is the same file as {what}; covextract never writes "
                        "over an input: choose another path",
                        out_table,
                    )
                )
    return issues


def _reissue(exc: ValidationError) -> list[InitErrorDetails]:
    """Pydantic's errors as init details, keeping type, message and context."""
    out: list[InitErrorDetails] = []
    for err in exc.errors():
        ctx = dict(err.get("ctx") or {})
        ctx["message"] = err["msg"]
        out.append(
            {
                "type": PydanticCustomError(err["type"], "{message}", ctx),
                "loc": err["loc"],
                "input": err.get("input"),
            }
        )
    return out


# --------------------------------------------------------------------------
# the recipe


class Recipe(_Model):
    """A validated recipe, version 1.

    Build it with :func:`covextract.recipe.load_recipe`, which also records
    the recipe's folder (for relative paths) and the line of every key (for
    messages). ``Recipe.model_validate(data)`` runs the same checks but
    knows no file: paths resolve against the current folder and
    :meth:`line_of` gives None.

    Attributes
    ----------
    version : int
        Always 1.
    study : Study
    units : Units
        Empty (all None) when the records' own geometry is the unit.
    layers : dict of str to Layer
        In the order written.
    covariates : list of Covariate
        In the order written; output columns follow this order.
    output : Output
        ``codebook``, ``manifest`` and ``state`` are filled with their
        defaults when not given.
    execution : Execution
    """

    version: Annotated[Literal[1], BeforeValidator(_check_version)]
    study: Study
    units: Annotated[Units, BeforeValidator(_empty_block)] = Field(default_factory=Units)
    layers: Annotated[dict[Name, Layer], Field(min_length=1)]
    covariates: Annotated[list[Covariate], Field(min_length=1)]
    output: Output
    execution: Annotated[Execution, BeforeValidator(_empty_block)] = Field(
        default_factory=Execution
    )

    _base_dir: Path = PrivateAttr(default_factory=Path.cwd)
    _source_file: Path | None = PrivateAttr(default=None)
    _lines: dict[tuple[str, ...], int] = PrivateAttr(default_factory=dict)

    @model_validator(mode="wrap")
    @classmethod
    def _check_across_blocks(cls, data: Any, handler) -> Recipe:
        issues = _cross_check(data) if isinstance(data, dict) else []
        recipe = _validate_with(cls, data, handler, issues)
        if recipe.output.state is None:
            recipe.output.state = str(PurePath(recipe.study.table).parent / STATE_FOLDER_NAME)
        return recipe

    # ---- file context -------------------------------------------------

    @property
    def base_dir(self) -> Path:
        """The folder relative paths are resolved against (the recipe's folder)."""
        return self._base_dir

    @property
    def source_file(self) -> Path | None:
        """The recipe file, or None for a recipe given as a mapping."""
        return self._source_file

    def resolve(self, path: str | os.PathLike) -> Path:
        """Turn a path from the recipe into an absolute path.

        ``~`` is expanded; a relative path is taken relative to
        :attr:`base_dir`. The result is normalised (``a/../b`` becomes
        ``b``) but symlinks are not followed.
        """
        p = Path(path).expanduser()
        if not p.is_absolute():
            p = self._base_dir / p
        return Path(os.path.abspath(p))

    def line_of(self, key_path: str | tuple) -> int | None:
        """1-based line of a key in the recipe file.

        Parameters
        ----------
        key_path : str or tuple
            Dotted path such as ``"covariates[1].stats[0]"`` or
            ``"layers.cover.classes.2"``, or the same as a tuple
            (``("covariates", 1, "stats", 0)``).

        Returns
        -------
        int or None
            The line of the key; for a key the file does not contain (a
            default, or a missing key), the line of its nearest enclosing
            key, which is where it would be added. None for a recipe that
            did not come from a file.
        """
        parts = _split_key_path(key_path) if isinstance(key_path, str) else tuple(key_path)
        return _nearest_line(self._lines, parts)

    # ---- content ------------------------------------------------------

    def to_dict(self) -> dict:
        """Return the validated recipe as plain data (defaults filled in, empty keys left out).

        The result is accepted by :func:`covextract.recipe.load_recipe` and
        yields the same recipe.
        """
        return self.model_dump(mode="python", exclude_none=True)

    @property
    def fingerprint(self) -> str:
        """SHA-256 (hex) of the validated recipe in canonical JSON.

        Canonical: keys sorted, defaults filled in, numbers as floats where
        the schema says number, so key order and ``2000`` vs ``2000.0`` do
        not matter. Paths enter as written (not resolved), so a recipe
        folder moved as a whole keeps its fingerprint. ``execution`` is left
        out: threads and scheduler never change the results.
        """
        content = self.model_dump(mode="json", exclude={"execution"})
        text = json.dumps(content, sort_keys=True, separators=(",", ":"), ensure_ascii=False)
        return hashlib.sha256(text.encode("utf-8")).hexdigest()


_KEY_PART = re.compile(r"([^.\[\]]+)|\[(\d+)\]")


def _split_key_path(key_path: str) -> tuple[str, ...]:
    """``"covariates[1].stats[0]"`` → ``("covariates", "1", "stats", "0")``."""
    return tuple(m.group(1) or m.group(2) for m in _KEY_PART.finditer(key_path))


def _nearest_line(lines: dict[tuple[str, ...], int], parts: tuple) -> int | None:
    """Line of ``parts`` in ``lines``, else of its nearest recorded parent."""
    if not lines:
        return None
    key = tuple(str(p) for p in parts if p != "[key]")
    while True:
        if key in lines:
            return lines[key]
        if not key:
            return None
        key = key[:-1]
