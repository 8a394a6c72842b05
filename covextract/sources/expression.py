"""A small, safe evaluator for band-math expressions such as ``(nir - red) / (nir + red)``.

Expressions are parsed with :mod:`ast` and only a whitelist of node types is
evaluated — numbers, band names, arithmetic, comparisons, ``&``/``|``/``~``,
conditional ``a if cond else b`` and calls to a short list of numpy
functions. Python's ``eval`` is never used: attribute access, subscripts,
other names, lambdas, comprehensions and dunder names are refused when the
expression is checked, before any pixel is read.

Division by zero and other invalid results (inf, NaN) become nodata, never
``inf``.
"""

from __future__ import annotations

import ast
import difflib

import numpy as np

from covextract.errors import RecipeError, RecipeProblem

__all__ = ["FUNCTIONS", "BUILTIN_INDICES", "Expression", "parse_expression"]

#: numpy functions an expression may call.
FUNCTIONS = {
    "abs": np.abs,
    "sqrt": np.sqrt,
    "log": np.log,
    "log10": np.log10,
    "exp": np.exp,
    "minimum": np.minimum,
    "maximum": np.maximum,
    "clip": np.clip,
    "where": np.where,
}

#: Built-in indices: expression and the bands they need (reflectances 0–1).
BUILTIN_INDICES = {
    # Rouse et al. (1974), Monitoring vegetation systems in the Great Plains with ERTS.
    "ndvi": "(nir - red) / (nir + red)",
    # Huete et al. (2002), Remote Sensing of Environment 83:195-213.
    "evi": "2.5 * (nir - red) / (nir + 6 * red - 7.5 * blue + 1)",
}

_BINOPS = {
    ast.Add: np.add,
    ast.Sub: np.subtract,
    ast.Mult: np.multiply,
    ast.Div: np.divide,
    ast.Pow: np.power,
    ast.Mod: np.mod,
    ast.BitAnd: np.logical_and,
    ast.BitOr: np.logical_or,
}
_CMPOPS = {
    ast.Lt: np.less,
    ast.LtE: np.less_equal,
    ast.Gt: np.greater,
    ast.GtE: np.greater_equal,
    ast.Eq: np.equal,
    ast.NotEq: np.not_equal,
}
_UNARY = {ast.USub: np.negative, ast.UAdd: np.positive, ast.Invert: np.logical_not}


class Expression:
    """A checked expression over named bands; call it with ``{band: array}``."""

    def __init__(self, text: str, tree: ast.Expression, bands: tuple) -> None:
        self.text = text
        self._tree = tree
        self.bands = bands

    def __call__(self, arrays: dict) -> np.ndarray:
        """Evaluate on float64 arrays; invalid results (inf, NaN) are NaN."""
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            out = np.asarray(self._eval(self._tree.body, arrays), dtype=np.float64)
        return np.where(np.isfinite(out), out, np.nan)

    def _eval(self, node, env):
        if isinstance(node, ast.Constant):
            return float(node.value)
        if isinstance(node, ast.Name):
            return env[node.id]
        if isinstance(node, ast.BinOp):
            return _BINOPS[type(node.op)](self._eval(node.left, env), self._eval(node.right, env))
        if isinstance(node, ast.UnaryOp):
            return _UNARY[type(node.op)](self._eval(node.operand, env))
        if isinstance(node, ast.Compare):
            left = self._eval(node.left, env)
            result = None
            for op, comp in zip(node.ops, node.comparators, strict=True):
                right = self._eval(comp, env)
                part = _CMPOPS[type(op)](left, right)
                result = part if result is None else np.logical_and(result, part)
                left = right
            return result
        if isinstance(node, ast.IfExp):
            return np.where(
                self._eval(node.test, env), self._eval(node.body, env), self._eval(node.orelse, env)
            )
        if isinstance(node, ast.Call):
            return FUNCTIONS[node.func.id](*[self._eval(a, env) for a in node.args])
        raise AssertionError(f"unchecked node {type(node).__name__}")  # pragma: no cover


def _refuse(text: str, why: str, key: str | None):
    raise RecipeError([RecipeProblem(f"expression {text!r}: {why}", key=key)])


def parse_expression(text: str, bands, *, key: str | None = None) -> Expression:
    """Check ``text`` against the allowed syntax and the available ``bands``.

    Parameters
    ----------
    text : str
        The expression, or the name of a built-in index (``ndvi``, ``evi``).
    bands : iterable of str
        Band names the expression may use.
    key : str, optional
        Recipe key for error messages.

    Raises
    ------
    RecipeError
        Syntax error, a name that is not a band, or anything outside the
        allowed arithmetic (attribute access, other calls, lambdas...).
    """
    bands = tuple(bands)
    if not isinstance(text, str) or not text.strip():
        _refuse(str(text), "an expression must be non-empty text", key)
    source = BUILTIN_INDICES.get(text.strip().lower(), text)
    if "__" in source:
        _refuse(text, "double underscores are not allowed", key)
    try:
        tree = ast.parse(source, mode="eval")
    except SyntaxError as exc:
        _refuse(text, f"syntax error at column {exc.offset}: {exc.msg}", key)
    used = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Expression | ast.Load | ast.operator | ast.unaryop | ast.cmpop):
            if isinstance(node, ast.operator) and type(node) not in _BINOPS:
                _refuse(text, f"operator {type(node).__name__} is not allowed", key)
            continue
        if isinstance(node, ast.Constant):
            if not isinstance(node.value, int | float) or isinstance(node.value, bool):
                _refuse(text, f"only numbers are allowed as constants, not {node.value!r}", key)
        elif isinstance(node, ast.Name):
            if node.id in FUNCTIONS:
                continue
            if node.id not in bands:
                hint = difflib.get_close_matches(node.id, bands, n=1)
                more = f"; did you mean {hint[0]!r}?" if hint else ""
                _refuse(
                    text,
                    f"{node.id!r} is not a band of this layer (bands: "
                    f"{', '.join(bands) or 'none'}){more}",
                    key,
                )
            used.append(node.id)
        elif isinstance(node, ast.Call):
            if not isinstance(node.func, ast.Name) or node.func.id not in FUNCTIONS:
                _refuse(text, "only these functions may be called: " + ", ".join(FUNCTIONS), key)
            if node.keywords:
                _refuse(text, "keyword arguments are not allowed", key)
        elif isinstance(node, ast.BinOp | ast.UnaryOp | ast.Compare | ast.IfExp):
            if isinstance(node, ast.UnaryOp) and type(node.op) not in _UNARY:
                _refuse(text, f"operator {type(node.op).__name__} is not allowed", key)
        else:
            _refuse(
                text,
                f"{type(node).__name__} is not allowed in an expression (only "
                "arithmetic, comparisons and a few numpy functions)",
                key,
            )
    for node in ast.walk(tree):
        if isinstance(node, ast.Name) and node.id in FUNCTIONS:
            # a function name used as a value rather than called
            parents = [p for p in ast.walk(tree) if isinstance(p, ast.Call) and p.func is node]
            if not parents:
                _refuse(text, f"{node.id!r} is a function and must be called", key)
    return Expression(text, tree, tuple(dict.fromkeys(used)))
