"""What every recipe block shares: constants, field types, the base model, problem helpers.

Validation is strict on types, because a recipe is typed by hand and YAML
guesses types: ``2000`` is a number, ``"2000"`` is text, and an unquoted
``off`` is the boolean false. Every model forbids unknown keys.

Problems are collected, not raised one at a time: checks inside one block
(a layer, a covariate) run in that block's model; checks that need several
blocks run on the raw data in :mod:`covextract.recipe.checks`, so they are
reported together with pydantic's own errors even when other parts of the
recipe are invalid.

Error messages raised here are final, plain sentences (error type
``"recipe"``); :mod:`covextract.recipe.loader` rewrites pydantic's generic
ones and adds the file and line. This module is internal to the recipe
package; its names are public only so the package's modules can share them.
"""

from __future__ import annotations

import datetime
import difflib
import os
import re
from pathlib import PurePath
from typing import Annotated, Any

from pydantic import BaseModel, ConfigDict, Field, StringConstraints, ValidationError
from pydantic_core import InitErrorDetails, PydanticCustomError

#: The recipe version this package reads.
RECIPE_VERSION = 1
#: Layer names, covariate names and class labels become parts of column names.
NAME_PATTERN = r"^[a-z][a-z0-9_]*$"
#: File types a study table may have (lower-case suffixes).
STUDY_TABLE_SUFFIXES = (".csv", ".parquet", ".gpkg", ".geojson", ".shp")
#: File types a boundaries file may have.
BOUNDARY_SUFFIXES = (".gpkg", ".geojson", ".shp", ".parquet")
#: File types the output table may have.
OUTPUT_TABLE_SUFFIXES = (".csv", ".parquet", ".gpkg")
#: Default name of the weights-cache folder, created next to the study table.
STATE_FOLDER_NAME = ".covextract-state"
#: The kinds of layer.
KIND_CHOICES = ("continuous", "categorical")
#: The keys of ``units:`` that each give a unit shape; at most one may be set.
SHAPE_KEYS = ("buffer_m", "boundaries", "at_point")

# --------------------------------------------------------------------------
# helpers shared by the validators


def problem(message: str) -> PydanticCustomError:
    """Make a validation error whose text is final (braces in it are kept as is)."""
    return PydanticCustomError("recipe", "{message}", {"message": message})


def issue(loc: tuple, message: str, value: Any = None) -> InitErrorDetails:
    """One problem at ``loc`` (relative to the block that reports it)."""
    return {"type": problem(message), "loc": loc, "input": value}


def raise_issues(title: str, issues: list[InitErrorDetails]) -> None:
    """Raise the collected problems of one block together, if there are any."""
    # A ValidationError raised inside a validator keeps each issue's own
    # location (prefixed by the enclosing one), so one block can report
    # several problems at the keys they concern.
    if issues:
        raise ValidationError.from_exception_data(title, issues)


def validate_with(cls: type, data: Any, handler, issues: list[InitErrorDetails]) -> Any:
    """Run a wrap validator's handler and report its errors together with ``issues``."""
    try:
        value = handler(data)
    except ValidationError as exc:
        if not issues:
            raise
        raise ValidationError.from_exception_data(cls.__name__, reissue(exc) + issues) from None
    raise_issues(cls.__name__, issues)
    return value


def hint(word: str, choices) -> str:
    """``"; did you mean 'x'?"`` for the closest choice, or ``""``."""
    close = difflib.get_close_matches(word, [str(c) for c in choices], n=1, cutoff=0.6)
    return f"; did you mean {close[0]!r}?" if close else ""


_EXPONENT = re.compile(r"^[-+]?(\d+)(?:\.(\d*))?[eE]([-+]?\d+)$")


def _number_hint(value: Any) -> str:
    """How to write a number that YAML read as text (``1e9``), or ``""``."""
    if not isinstance(value, str):
        return ""
    text = value.strip()
    match = _EXPONENT.match(text)
    if match:
        # YAML 1.1 needs a dot and a signed exponent (1.0e+9); 1e9 is text.
        whole, frac, exp = match.groups()
        exp_int = int(exp)
        dotted = f"{'-' if text.startswith('-') else ''}{whole}.{frac or '0'}e{exp_int:+d}"
        try:
            number = float(text)
        except (ValueError, OverflowError):
            return f"; YAML reads {text} as text: write {dotted} for a number"
        plain = f" or {int(number)}" if number.is_integer() and abs(number) < 1e16 else ""
        return f"; YAML reads {text} as text: write {dotted}{plain} for a number"
    return ""


def describe(value: Any) -> str:
    """Show a value as a user would recognise it, with its YAML type."""
    if isinstance(value, bool):
        return (
            f"{str(value).lower()} (a yes/no value: YAML reads unquoted yes, no, on, off, "
            "true and false that way; put quotes around it to mean text)"
        )
    if value is None:
        return "nothing (an empty value)"
    if isinstance(value, str):
        return f"{value!r} (text{_number_hint(value)})"
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


def is_number(value: Any) -> bool:
    """True for an int or float that is not a yes/no value."""
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def same_path(a: str, b: str) -> bool:
    """Whether two paths as written name the same file (``~`` and ``..`` resolved)."""
    return os.path.normpath(os.path.expanduser(a)) == os.path.normpath(os.path.expanduser(b))


def suffix_of(path: str) -> str:
    """The lower-case file suffix of ``path`` (``".csv"``)."""
    return PurePath(path).suffix.lower()


def check_suffix(path: str, allowed: tuple[str, ...], what: str) -> str:
    """Refuse a file type covextract does not read or write in this place."""
    if suffix_of(path) not in allowed:
        raise problem(
            f"{path!r} is not a file type covextract {what}; use a file ending in "
            + ", ".join(allowed)
        )
    return path


def check_crs(value: str | None) -> str | None:
    """Refuse a CRS that pyproj cannot read."""
    if value is None:
        return None
    # Imported here: pyproj is heavy and only needed when a CRS is given.
    from pyproj import CRS
    from pyproj.exceptions import CRSError

    try:
        CRS.from_user_input(value)
    except CRSError as exc:
        detail = str(exc).splitlines()[0] if str(exc) else "unknown CRS"
        raise problem(
            f"{value!r} is not a coordinate reference system pyproj can read ({detail}); "
            'give an authority code such as "EPSG:4326" or a WKT/PROJ string'
        ) from None
    return value


def empty_block(value: Any) -> Any:
    """Read a block written with nothing under it as an empty block."""
    # ``units:`` with nothing under it parses as None: treat it as an empty block.
    return {} if value is None else value


def reissue(exc: ValidationError) -> list[InitErrorDetails]:
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


def nodata_list(value: Any) -> Any:
    """Read a single nodata number as a list of one."""
    if is_number(value):
        return [value]
    if value is None or isinstance(value, list):
        return value
    raise problem(f"expected a number or a list of numbers, got {describe(value)}")


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


class RecipeModel(BaseModel):
    """Base of every recipe model: strict types, no unknown keys."""

    model_config = ConfigDict(extra="forbid", strict=True)
