"""Band-math expressions: published index formulas and a refusal of anything else."""

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from covextract.errors import RecipeError
from covextract.sources.expression import ARITY, FUNCTIONS, MAX_DEPTH, MAX_LENGTH, parse_expression


def test_ndvi_of_reflectance_pairs_equals_the_formula():
    # Rouse et al. (1974): NDVI = (NIR - Red) / (NIR + Red), in [-1, 1]. Reflectance pairs
    # typical of dense vegetation, bare soil and water (values common practice, from memory).
    nir = np.array([0.50, 0.30, 0.02])
    red = np.array([0.08, 0.25, 0.05])
    ndvi = parse_expression("ndvi", ["nir", "red"])({"nir": nir, "red": red})
    assert_allclose(ndvi, (nir - red) / (nir + red))
    assert_allclose(ndvi, [0.42 / 0.58, 0.05 / 0.55, -0.03 / 0.07])
    assert np.all((ndvi >= -1) & (ndvi <= 1))


def test_evi_equals_the_published_formula():
    # Huete et al. (2002): EVI = 2.5 (NIR - Red) / (NIR + 6 Red - 7.5 Blue + 1)
    nir, red, blue = np.array([0.45]), np.array([0.06]), np.array([0.04])
    evi = parse_expression("evi", ["nir", "red", "blue"])({"nir": nir, "red": red, "blue": blue})
    assert_allclose(evi, 2.5 * 0.39 / (0.45 + 0.36 - 0.30 + 1))


def test_user_expression_and_functions():
    expr = parse_expression("where(nir > 0.1, sqrt(nir) - red, 0)", ["nir", "red"])
    out = expr({"nir": np.array([0.04, 0.25]), "red": np.array([0.1, 0.1])})
    assert_allclose(out, [0.0, 0.4])
    assert expr.bands == ("nir", "red")


def test_division_by_zero_gives_nodata_not_inf():
    expr = parse_expression("(nir - red) / (nir + red)", ["nir", "red"])
    out = expr({"nir": np.array([0.0, 0.2]), "red": np.array([0.0, -0.2])})
    assert np.isnan(out).all()


@pytest.mark.parametrize(
    "text,why",
    [
        ("nir.__class__", "double underscores"),
        (
            "nir.real",
            r"attribute access \(name.attribute\) is not allowed in an expression, at "
            "column 1: nir.real",
        ),
        ("__import__('os')", "double underscores"),
        ("open('x')", "only these functions may be called"),
        ("(lambda: 1)()", "only these functions"),
        ("[nir for nir in red]", "not allowed"),
        ("nir[0]", r"indexing \(name\[...\]\) is not allowed"),
        ("swir - red", "'swir' is not a band of this layer"),
        ("nirr - red", "did you mean 'nir'"),
        ("nir +", "syntax error"),
        ("'text'", "only numbers"),
        ("sqrt", "must be called"),
        ("where(nir, red, x=1)", "keyword arguments"),
        ("nir @ red", r"operator '@' \(MatMult\) is not allowed, at column 1"),
        ("nir is red", r"operator 'is' \(Is\) is not allowed"),
        ("nir and red", "use & and | for 'and' and 'or'"),
        ("not nir", "use ~ for 'not'"),
        ("f'{nir}'", "an f-string is not allowed"),
        ("(nir := 1)", r"an assignment \(:=\) is not allowed"),
        ("where(*nir)", r"unpacking \(\*\) is not allowed, at column 7: \*nir"),
        ("True", "only numbers are allowed as constants, not True"),
        ("1e999", "beyond the range of 64-bit floats"),
        ("1" + "0" * 400, "beyond the range of 64-bit floats"),
        ("nir\x00", "NUL character"),
    ],
)
def test_anything_beyond_arithmetic_is_refused(text, why):
    with pytest.raises(RecipeError, match=why):
        parse_expression(text, ["nir", "red"], key="layers.veg.expression")


def test_every_allowed_function_has_an_exact_arity():
    # numpy's signatures (reference library): the ufuncs take one or two operands and then an
    # optional positional output; clip(a, a_min, a_max[, out]); where(condition, x, y) or
    # where(condition) alone, which returns indices instead of values.
    assert ARITY == {
        "abs": (1, 1),
        "sqrt": (1, 1),
        "log": (1, 1),
        "log10": (1, 1),
        "exp": (1, 1),
        "minimum": (2, 2),
        "maximum": (2, 2),
        "clip": (3, 3),
        "where": (3, 3),
    }
    assert set(ARITY) == set(FUNCTIONS)
    bands = ["nir", "red"]
    for name, (low, high) in ARITY.items():
        good = ", ".join(["nir"] * low)
        assert parse_expression(f"{name}({good})", bands).bands == (("nir",) if low else ())
        for wrong in (low - 1, high + 1):
            if wrong < 0:
                continue
            text = f"{name}({', '.join(['red'] * wrong)})"
            with pytest.raises(
                RecipeError, match=rf"{name}\(\) takes {low} arguments?, got {wrong}, at column 1"
            ):
                parse_expression(text, bands)


@pytest.mark.parametrize(
    "text,message",
    [
        (
            "minimum()",
            "minimum() takes 2 arguments, got 0, at column 1: minimum(); write minimum(a, b)",
        ),
        (
            "where(nir)",
            "where() takes 3 arguments, got 1, at column 1: where(nir); write "
            "where(condition, a, b)",
        ),
        (
            "nir + where(nir, red, nir, red)",
            "where() takes 3 arguments, got 4, at column 7: "
            "where(nir, red, nir, red); write where(condition, a, b)",
        ),
        (
            "maximum(nir, red, red) - red",
            "maximum() takes 2 arguments, got 3, at column 1: "
            "maximum(nir, red, red); write maximum(a, b) (numpy would take an extra argument as "
            "the array to write the result into, overwriting that band)",
        ),
        (
            "maximum(nir, red, out=red)",
            "the out= argument is not allowed (it would write the "
            "result into a band), at column 19: out=red; write maximum(a, b): the result is always "
            "a new layer",
        ),
        (
            "clip(nir, 0, 1, red)",
            "clip() takes 3 arguments, got 4, at column 1: "
            "clip(nir, 0, 1, red); write clip(x, low, high) (numpy would take an extra argument as "
            "the array to write the result into, overwriting that band)",
        ),
    ],
)
def test_wrong_arity_and_out_are_refused_with_the_column(text, message):
    with pytest.raises(RecipeError) as err:
        parse_expression(text, ["nir", "red"], key="layers.veg.expression")
    assert str(err.value) == f"layers.veg.expression: {message}"


def test_functions_never_write_into_the_bands():
    nir = np.array([0.5, 0.2, np.nan])
    red = np.array([0.1, 0.3, 0.2])
    kept = nir.copy(), red.copy()
    for text in (
        "maximum(nir, red)",
        "minimum(nir, red) - red",
        "clip(nir, red, 0.4)",
        "where(nir > red, nir, red)",
        "abs(-nir)",
        "nir",
    ):
        out = parse_expression(text, ["nir", "red"])({"nir": nir, "red": red})
        assert out is not nir and out is not red
        assert not np.shares_memory(out, nir) and not np.shares_memory(out, red)
        assert_array_equal(nir, kept[0])
        assert_array_equal(red, kept[1])
        assert nir.flags.writeable and red.flags.writeable  # the caller's arrays stay writable
    assert_allclose(
        parse_expression("maximum(nir, red)", ["nir", "red"])({"nir": nir, "red": red}),
        [0.5, 0.3, np.nan],
    )


def test_an_extra_argument_cannot_reach_numpy_even_unchecked():
    # FUNCTIONS themselves refuse an extra positional argument (numpy's out).
    red = np.array([0.1, 0.3])
    with pytest.raises(TypeError):
        FUNCTIONS["maximum"](np.array([0.5, 0.2]), red, red)
    assert_array_equal(red, [0.1, 0.3])


def test_constant_hazards_give_nodata_at_once():
    # float64 arithmetic (IEEE 754): 1/0 is inf and 10**1e10 overflows to inf; both are nodata.
    nir = np.array([0.5, 0.2])
    for text in ("1/0", "10**10**10", "nir * 10**10**10", "nir / 0", "(-8) ** 0.5", "log(0)"):
        out = parse_expression(text, ["nir"])({"nir": nir})
        assert out.shape == nir.shape
        assert np.isnan(out).all(), text
    assert_allclose(parse_expression("2 ** 3 + nir", ["nir"])({"nir": nir}), [8.5, 8.2])


def test_length_and_depth_limits():
    bands = ["nir", "red"]
    longest = "+".join(["nir"] * ((MAX_LENGTH + 1) // 4))
    assert len(longest) <= MAX_LENGTH
    # a long flat sum is one level of nesting and is evaluated without recursion
    out = parse_expression(longest, bands)({"nir": np.array([1.0]), "red": np.array([0.0])})
    assert_allclose(out, [(MAX_LENGTH + 1) // 4])
    too_long = longest + "+nir" * 2
    with pytest.raises(
        RecipeError, match=f"is {len(too_long)} characters long; the limit is {MAX_LENGTH}; shorten"
    ):
        parse_expression(too_long, bands)
    deepest = "(" * MAX_DEPTH + "nir" + ")" * MAX_DEPTH
    assert parse_expression(deepest, bands).bands == ("nir",)
    with pytest.raises(
        RecipeError,
        match=f"brackets are nested more than {MAX_DEPTH} deep, at column {MAX_DEPTH + 1}",
    ):
        parse_expression("(" + deepest + ")", bands)
    signs = "-" * MAX_DEPTH + "nir"
    assert_allclose(parse_expression(signs, bands)({"nir": np.array([2.0])}), [2.0])
    with pytest.raises(RecipeError, match=f"more than {MAX_DEPTH} signs"):
        parse_expression("-" + signs, bands)
    # signs and calls alternating: 25 parentheses but 50 levels, then 52
    ok = "-abs(" * 25 + "nir" + ")" * 25
    assert parse_expression(ok, bands).bands == ("nir",)
    with pytest.raises(RecipeError, match=f"nested more than {MAX_DEPTH} levels deep, at column"):
        parse_expression("-abs(" * 26 + "nir" + ")" * 26, bands)


def test_positions_count_characters_and_lines():
    with pytest.raises(
        RecipeError, match="'é' is not a band of this layer .*, at line 2, column 9: é"
    ):
        parse_expression("(nir +\n red) + é", ["nir", "red"])
    with pytest.raises(RecipeError, match=r"syntax error \(unmatched '\)'\), at column 8: \)"):
        parse_expression("éé + + )", ["nir", "red"])
    with pytest.raises(RecipeError, match="syntax error .*at the end of the expression"):
        parse_expression("nir +", ["nir", "red"])
