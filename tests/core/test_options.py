"""The shared option vocabularies: one home, one validation, the same values everywhere."""

from __future__ import annotations

import math
import typing

import numpy as np
import pytest

from covextract.core import options
from covextract.core.options import (
    MAX_RADIUS_M,
    Buffer,
    OptionError,
    area_weighting_choice,
    is_point_method,
    parse_buffer,
    rule_text,
    uses_area_weights,
    weighting_text,
)


def test_rule_texts():
    # Written out here, not read from the module's tables.
    assert rule_text("overlap") == (
        "overlap: each pixel weighted by the exact fraction of its area inside the unit"
    )
    assert rule_text("center") == "center: pixels whose centre lies inside the unit, weight 1"
    assert rule_text("touched") == "touched: every pixel the unit touches, weight 1"
    assert rule_text("nearest") == "nearest: the pixel containing the point"
    assert rule_text("bilinear") == (
        "bilinear: interpolated between the four nearest pixel centres"
    )
    assert rule_text("sideways") == "sideways"


def test_every_stage_uses_the_same_names():
    from covextract.engine import coverage, zonal
    from covextract.recipe import Covariate, Units
    from covextract.units import AT_POINT_METHODS

    assert options.PIXEL_RULE_NAMES == ("overlap", "center", "touched")
    assert options.POINT_METHOD_NAMES == ("nearest", "bilinear")
    assert options.AREA_WEIGHTING_NAMES == ("auto", "off")
    assert zonal.PIXEL_RULES is options.PIXEL_RULE_NAMES
    assert zonal.POINT_METHODS is options.POINT_METHOD_NAMES
    assert coverage._POLYGON_RULES is options.PIXEL_RULE_NAMES
    assert coverage._POINT_METHODS is options.POINT_METHOD_NAMES
    assert AT_POINT_METHODS is options.POINT_METHOD_NAMES
    pixels = Covariate.model_fields["pixels"]
    assert typing.get_args(pixels.annotation) == ("overlap", "center", "touched")
    assert pixels.default == "overlap"
    at_point = typing.get_args(Units.model_fields["at_point"].annotation)[0]
    assert typing.get_args(at_point) == ("nearest", "bilinear")


def test_is_point_method():
    assert is_point_method("nearest") and is_point_method("bilinear")
    assert not is_point_method("overlap")
    assert not is_point_method(None)


def test_area_weighting_from_yaml_yes_no():
    assert area_weighting_choice(False) == "off"
    assert area_weighting_choice("auto") == "auto"
    assert area_weighting_choice("sometimes") == "sometimes"  # the caller checks choices
    with pytest.raises(OptionError, match=r"area_weighting: true is not a choice .*or off$"):
        area_weighting_choice(True)


@pytest.mark.parametrize(
    "value, varies, expected",
    [
        ("auto", True, True),
        ("auto", False, False),
        (True, True, True),
        (True, False, False),
        ("off", True, False),
        (False, True, False),
        (None, True, False),
        ("on", False, True),
    ],
)
def test_uses_area_weights(value, varies, expected):
    assert uses_area_weights(value, varies) is expected


def test_uses_area_weights_refuses_other_values():
    with pytest.raises(ValueError, match="area_weighting must be 'auto' or 'off', got 'yes'"):
        uses_area_weights("yes", True)


def test_weighting_text():
    assert [weighting_text(v) for v in ("off", False, "auto", True, None)] == [
        "off",
        "off",
        "auto",
        "auto",
        "auto",
    ]


@pytest.mark.parametrize("value", [2000, 2000.0, np.float64(2000), np.int64(2000), 0.5])
def test_buffer_radius(value):
    parsed = parse_buffer(value)
    assert parsed == Buffer(radius_m=float(value))
    assert type(parsed.radius_m) is float


def test_buffer_at_the_limit_is_accepted():
    assert parse_buffer(MAX_RADIUS_M).radius_m == 1_000_000.0


@pytest.mark.parametrize(
    "value, message",
    [
        (0, "a buffer radius must be more than 0 metres, got 0"),
        (-5, "a buffer radius must be more than 0 metres, got -5"),
        (math.nan, "a buffer radius must be a finite number of metres"),
        (math.inf, "a buffer radius must be a finite number of metres"),
        (
            2e6,
            "a buffer radius of 2e+06 m is above the limit of 1e+06 m; the radius is in "
            "metres: 2 km is 2000",
        ),
        (
            True,
            "expected a buffer radius in metres (a number > 0) or {column: <column of radii "
            "in metres>}, got True",
        ),
        (
            "2000",
            "expected a buffer radius in metres (a number > 0) or {column: <column of radii "
            "in metres>}, got '2000'",
        ),
        (
            {"column": ""},
            "expected a buffer radius in metres (a number > 0) or {column: <column of radii "
            "in metres>}, got {'column': ''}",
        ),
        (
            {"column": "r", "unit": "km"},
            "expected a buffer radius in metres (a number > 0) or {column: <column of radii "
            "in metres>}, got {'column': 'r', 'unit': 'km'}",
        ),
    ],
)
def test_bad_buffer(value, message):
    with pytest.raises(OptionError) as info:
        parse_buffer(value)
    assert str(info.value) == message


def test_buffer_column():
    assert parse_buffer({"column": "radius_m"}) == Buffer(column="radius_m")

    class Held:
        column = "radius_m"

    assert parse_buffer(Held()) == Buffer(column="radius_m")
    assert parse_buffer(Buffer(radius_m=10.0)) == Buffer(radius_m=10.0)


def test_buffer_message_shows_the_value_the_callers_way():
    with pytest.raises(OptionError, match=r"got <text two km>$"):
        parse_buffer("two km", describe=lambda v: f"<text {v}>")
