"""The option vocabularies every stage shares, and their one validation.

The recipe, the units, the engine and the Python API all take a pixel rule
(``pixels:``), a point method (``units.at_point:``), an area weighting
(``area_weighting:``) and a buffer radius (``buffer_m:``). Their allowed
values, the one-line definition of each value (the codebook's wording) and
the checks live here, as plain code: no I/O, no pydantic, nothing imported
from the rest of the package. Each caller turns :class:`OptionError` into
its own error type (a recipe problem with a line, a ``GeometryError``...).
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

__all__ = [
    "PIXEL_RULES",
    "POINT_METHODS",
    "PIXEL_RULE_NAMES",
    "POINT_METHOD_NAMES",
    "DEFAULT_PIXEL_RULE",
    "AREA_WEIGHTING",
    "AREA_WEIGHTING_NAMES",
    "MAX_RADIUS_M",
    "OptionError",
    "Buffer",
    "rule_text",
    "is_point_method",
    "area_weighting_choice",
    "uses_area_weights",
    "weighting_text",
    "parse_buffer",
]


class OptionError(ValueError):
    """A value outside an option's vocabulary; the message is a final, plain sentence."""


#: Pixel rules for area units: which pixels count and with what weight.
PIXEL_RULES: dict[str, str] = {
    "overlap": "each pixel weighted by the exact fraction of its area inside the unit",
    "center": "pixels whose centre lies inside the unit, weight 1",
    "touched": "every pixel the unit touches, weight 1",
}
#: Point methods for point units: how the value under a point is read.
POINT_METHODS: dict[str, str] = {
    "nearest": "the pixel containing the point",
    "bilinear": "interpolated between the four nearest pixel centres",
}
#: The pixel rules' names, in the order they are documented.
PIXEL_RULE_NAMES: tuple[str, ...] = tuple(PIXEL_RULES)
#: The point methods' names, in the order they are documented.
POINT_METHOD_NAMES: tuple[str, ...] = tuple(POINT_METHODS)
#: The pixel rule when none is given.
DEFAULT_PIXEL_RULE = "overlap"

#: Area weighting choices a user may write.
AREA_WEIGHTING: dict[str, str] = {
    "auto": "weight pixels by their true ground area where it varies over the grid",
    "off": "every pixel counts by its coverage alone, whatever its ground area",
}
#: The area weighting choices' names.
AREA_WEIGHTING_NAMES: tuple[str, ...] = tuple(AREA_WEIGHTING)

#: Largest buffer radius accepted, in metres. Beyond it a "circle" is a
#: continental shape for which zonal statistics of a health unit make no sense.
MAX_RADIUS_M = 1_000_000.0


def rule_text(rule: str) -> str:
    """``"<rule>: <definition>"`` for a pixel rule or point method (the codebook's text).

    An unknown rule is returned as it is, so a description never fails.

    Examples
    --------
    >>> rule_text("center")
    'center: pixels whose centre lies inside the unit, weight 1'
    """
    definition = PIXEL_RULES.get(rule) or POINT_METHODS.get(rule)
    return f"{rule}: {definition}" if definition else str(rule)


def is_point_method(rule: Any) -> bool:
    """True for ``nearest`` and ``bilinear``, the rules of point units."""
    return isinstance(rule, str) and rule in POINT_METHODS


# ---------------------------------------------------------------- area weighting


def area_weighting_choice(value: Any) -> Any:
    """Map a YAML yes/no value of ``area_weighting:`` to a choice.

    YAML 1.1 (PyYAML) reads an unquoted ``off`` as false, so false means
    ``"off"``. ``on``, ``yes`` and ``true`` read as true, which names no
    choice: it is refused rather than guessed. Any other value is returned
    as it is, for the caller's check of the choices.

    Raises
    ------
    OptionError
        For true.
    """
    if value is False:
        return "off"
    if value is True:
        raise OptionError(
            "area_weighting: true is not a choice (YAML reads unquoted on, yes and true "
            "as true); use auto (weight pixels by their true ground area where it varies) "
            "or off"
        )
    return value


def uses_area_weights(value: Any, area_varies: bool) -> bool:
    """Whether the engine weights pixels by ground area.

    Parameters
    ----------
    value : {"auto", "off"}, bool, None or "on"
        The option as the Python API takes it: ``"auto"`` or true weight
        only where the pixel area varies over the grid; ``"off"``, false or
        None never weight; ``"on"`` (set by the run for a weight layer,
        never written by a user) always weights.
    area_varies : bool
        Whether the grid's pixel area varies (by more than 0.1 %).

    Raises
    ------
    ValueError
        For any other value.
    """
    if value == "on":
        return True
    if value in ("auto", True):
        return bool(area_varies)
    if value in ("off", False, None):
        return False
    raise ValueError(f"area_weighting must be 'auto' or 'off', got {value!r}")


def weighting_text(value: Any) -> str:
    """The choice a run records: ``"off"`` for off or false, else ``"auto"``."""
    return "off" if value in (False, "off") else "auto"


# ---------------------------------------------------------------- buffer_m


@dataclass(frozen=True)
class Buffer:
    """A validated ``buffer_m``: one radius for every record, or a column of radii.

    Exactly one of the two is set.

    Attributes
    ----------
    radius_m : float or None
        The radius in metres, finite, above 0 and at most :data:`MAX_RADIUS_M`.
    column : str or None
        The study-table column holding each record's radius in metres.
    """

    radius_m: float | None = None
    column: str | None = None


_BUFFER_EXPECTED = "expected a buffer radius in metres (a number > 0) or {column: <column of "
_BUFFER_EXPECTED += "radii in metres>}"


def parse_buffer(value: Any, *, describe: Callable[[Any], str] = repr) -> Buffer:
    """Validate a ``buffer_m`` value.

    Parameters
    ----------
    value : number, mapping, Buffer or object with a ``column`` attribute
        A radius in metres (a number, not a yes/no value and not text), or
        ``{"column": <name>}`` naming a column of radii.
    describe : callable, optional
        Shows a wrong value in the message (the recipe shows its YAML type).

    Returns
    -------
    Buffer

    Raises
    ------
    OptionError
        A radius that is not a number, not finite, 0 or less, or above
        :data:`MAX_RADIUS_M`; a mapping other than ``{column: <name>}``.

    Examples
    --------
    >>> parse_buffer(2000)
    Buffer(radius_m=2000.0, column=None)
    >>> parse_buffer({"column": "radius_m"}).column
    'radius_m'
    """
    if isinstance(value, Buffer):
        return value
    # numbers.Real takes numpy's numbers too; a yes/no value is not a radius.
    if isinstance(value, numbers.Real) and not isinstance(value, bool):
        if not math.isfinite(value):
            raise OptionError("a buffer radius must be a finite number of metres")
        if value <= 0:
            raise OptionError(f"a buffer radius must be more than 0 metres, got {value}")
        if value > MAX_RADIUS_M:
            raise OptionError(
                f"a buffer radius of {value:g} m is above the limit of {MAX_RADIUS_M:g} m; "
                "the radius is in metres: 2 km is 2000"
            )
        return Buffer(radius_m=float(value))
    column = _column_of(value)
    if column is not None:
        return Buffer(column=column)
    raise OptionError(f"{_BUFFER_EXPECTED}, got {describe(value)}")


def _column_of(value: Any) -> str | None:
    # A mapping {column: name}, or a model holding it (the recipe's ColumnBuffer).
    if isinstance(value, Mapping):
        if set(value) != {"column"}:
            return None
        column = value["column"]
    elif hasattr(value, "column") and not isinstance(value, (str, bytes)):
        column = value.column
    else:
        return None
    return column if isinstance(column, str) and column else None
