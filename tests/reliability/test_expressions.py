"""Reliability catalogue: hostile or broken band-math expressions.

The demo recipe's layer ``veg`` combines the bands ``red`` and ``nir`` by
``index: ndvi``; each case replaces the index by an ``expression:`` and runs
``check`` (or ``run``). Refusals must name the key, the column in the
expression and what to do, exit 1, print no traceback and change no file.
"""

import pytest

KEY = "layers.veg.expression: "

#: What every refusal of foreign syntax says to do (written out, not imported).
ALLOWED = (
    "an expression combines band names and numbers with + - * / ** %, comparisons, "
    "& | ~, 'a if condition else b' and the functions abs(x), sqrt(x), log(x), log10(x), "
    "exp(x), minimum(a, b), maximum(a, b), clip(x, low, high), where(condition, a, b)"
)
CALLS = (
    "only these functions may be called: abs(x), sqrt(x), log(x), log10(x), exp(x), "
    "minimum(a, b), maximum(a, b), clip(x, low, high), where(condition, a, b)"
)
OUT_NOTE = (
    " (numpy would take an extra argument as the array to write the result into, "
    "overwriting that band)"
)
LONG = (
    "; shorten it (a band-math layer combines a few bands; compute a long formula into a "
    "raster of its own first)"
)


def _set_expression(scenario, text):
    veg = scenario.data["layers"]["veg"]
    veg.pop("index", None)
    veg["expression"] = text
    scenario.write_recipe()


CASES = [
    # code, however it is spelled
    pytest.param(
        "__import__('os')",
        "double underscores are not allowed, at column 1: __import__('os'); " + ALLOWED,
        id="code-import",
    ),
    pytest.param(
        "eval('1') + nir",
        "eval() is not an allowed function, at column 1: eval('1'); " + CALLS,
        id="code-eval",
    ),
    pytest.param(
        "nir.real - red",
        "attribute access (name.attribute) is not allowed in an expression, at column 1: "
        "nir.real; " + ALLOWED,
        id="attribute-access",
    ),
    pytest.param(
        "(lambda: nir)()",
        "this call is not an allowed function, at column 1: (lambda: nir)(); " + CALLS,
        id="lambda",
    ),
    pytest.param(
        "nir + sum([b for b in red])",
        "sum() is not an allowed function, at column 7: sum([b for b in red]); " + CALLS,
        id="comprehension-in-a-call",
    ),
    pytest.param(
        "nir - [b for b in red]",
        "a comprehension is not allowed in an expression, at column 7: [b for b in red]; "
        + ALLOWED,
        id="comprehension",
    ),
    pytest.param(
        "f'{nir}'",
        "an f-string is not allowed in an expression, at column 1: f'{nir}'; " + ALLOWED,
        id="f-string",
    ),
    pytest.param(
        "nir + 'red'",
        "only numbers are allowed as constants, not 'red', at column 7: 'red'; band math has "
        "no text, truth values or complex numbers: write a number",
        id="string-constant",
    ),
    pytest.param(
        "nir * 1e999",
        "this number is beyond the range of 64-bit floats (about 1.8e308), at column 7: "
        "1e999; write a smaller number",
        id="number-beyond-float64",
    ),
    pytest.param(
        "nir in red",
        "operator 'in' (In) is not allowed, at column 1: nir in red; " + ALLOWED,
        id="membership-operator",
    ),
    pytest.param(
        "nir > 0.2 and red < 0.1",
        "'and' / 'or' is not allowed in an expression, at column 1: nir > 0.2 and red < 0.1; "
        + ALLOWED
        + "; use & and | for 'and' and 'or'",
        id="boolean-and",
    ),
    # size and nesting
    pytest.param(
        " + ".join(["nir"] * 20_000),
        f"the expression is {20_000 * 6 - 3} characters long; the limit is 2000" + LONG,
        id="20000-terms",
    ),
    pytest.param(
        "-" * 100_000 + "nir",
        "the expression is 100003 characters long; the limit is 2000" + LONG,
        id="100000-nested-minus-signs",
    ),
    pytest.param(
        "-" * 1_000 + "nir",
        "more than 50 signs (+ - ~) in a row, at column 1: "
        + "-" * 37
        + "...; the limit is 50: write one sign (two minus signs cancel)",
        id="1000-minus-signs",
    ),
    pytest.param(
        "(" * 60 + "nir - red" + ")" * 60,
        "brackets are nested more than 50 deep, at column 51: "
        + "(" * 10
        + "nir - red"
        + ")" * 18
        + "...; the limit is 50: remove redundant parentheses or split the formula",
        id="deep-parentheses",
    ),
    pytest.param(
        "-sqrt(" * 26 + "nir" + ")" * 26,
        # 26 signs and 26 calls alternate: 52 levels; the 26th sign (column 151) is level 51
        "the expression is nested more than 50 levels deep, at column 151: "
        "-sqrt(nir); the limit is 50: simplify it, or compute part of it into a raster "
        "of its own first",
        id="deep-calls-and-signs",
    ),
    # wrong arity
    pytest.param(
        "minimum()",
        "minimum() takes 2 arguments, got 0, at column 1: minimum(); write minimum(a, b)",
        id="arity-minimum-none",
    ),
    pytest.param(
        "where(nir)",
        "where() takes 3 arguments, got 1, at column 1: where(nir); write where(condition, a, b)",
        id="arity-where-one",
    ),
    pytest.param(
        "where(nir, red, nir, red)",
        "where() takes 3 arguments, got 4, at column 1: where(nir, red, nir, red); write "
        "where(condition, a, b)",
        id="arity-where-four",
    ),
    pytest.param(
        "(nir - red) / sqrt(nir, red)",
        "sqrt() takes 1 argument, got 2, at column 15: sqrt(nir, red); write sqrt(x)" + OUT_NOTE,
        id="arity-sqrt-two",
    ),
    # writing into a band
    pytest.param(
        "maximum(nir, red, red) - red",
        "maximum() takes 2 arguments, got 3, at column 1: maximum(nir, red, red); write "
        "maximum(a, b)" + OUT_NOTE,
        id="positional-out",
    ),
    pytest.param(
        "maximum(nir, red, out=red) - red",
        "the out= argument is not allowed (it would write the result into a band), at column "
        "19: out=red; write maximum(a, b): the result is always a new layer",
        id="keyword-out",
    ),
    pytest.param(
        "clip(nir, low=0, high=1)",
        "keyword arguments are not allowed, at column 11: low=0; pass the arguments by "
        "position: clip(x, low, high)",
        id="keyword-argument",
    ),
    pytest.param(
        "where(*nir)",
        "unpacking (*) is not allowed, at column 7: *nir; write where(condition, a, b)",
        id="star-arguments",
    ),
]


@pytest.mark.parametrize("text,message", CASES)
def test_bad_expression_is_refused_at_check(scenario, text, message):
    _set_expression(scenario, text)
    scenario.expect(["check", scenario.recipe], code=1, message=KEY + message)


def test_out_argument_is_refused_by_run_before_any_pixel_is_read(scenario):
    _set_expression(scenario, "maximum(nir, red, red) - red")
    scenario.expect(
        ["run", scenario.recipe],
        code=1,
        message=KEY
        + "maximum() takes 2 arguments, got 3, at column 1: maximum(nir, red, red); write "
        "maximum(a, b)" + OUT_NOTE,
    )


@pytest.mark.parametrize("text", ["1/0", "10**10**10", "nir / 0"])
def test_constant_hazards_pass_check_and_become_nodata(scenario, text):
    # float64 arithmetic: 1/0 is inf and 10**1e10 overflows to inf at once (no huge integer is
    # built); the README documents that division by zero gives nodata, so check accepts them.
    _set_expression(scenario, text)
    scenario.expect(
        ["check", scenario.recipe],
        code=0,
        message="recipe and inputs look right; nothing was computed.",
    )
