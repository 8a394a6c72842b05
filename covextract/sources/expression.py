"""A small, safe evaluator for band-math expressions such as ``(nir - red) / (nir + red)``.

Expressions are parsed with :mod:`ast` and only a whitelist of node types is
evaluated — numbers, band names, arithmetic, comparisons, ``&``/``|``/``~``,
conditional ``a if cond else b`` and calls to a short list of numpy
functions, each with its exact number of arguments. Python's ``eval`` is
never used: attribute access, subscripts, other names, lambdas,
comprehensions, keyword arguments and dunder names are refused when the
expression is checked, before any pixel is read. Every refusal names the
column where the problem starts and what to do.

The checker and the evaluator never recurse on the expression's shape:
the text is limited to :data:`MAX_LENGTH` characters and :data:`MAX_DEPTH`
levels of nesting, both checked on the text before :func:`ast.parse` runs
(Python's parser recurses on nesting), and the tree is then walked with an
explicit stack, so a long sum of terms cannot exhaust Python's stack.

Nothing is computed in place: every allowed function is called with exactly
its allowed positional arguments (numpy's ufuncs take an extra positional
argument as the array to write into, which would overwrite a band), and the
bands are handed to the evaluation as read-only views, so an in-place write
would raise instead of changing a band.

Division by zero and other invalid results (inf, NaN) become nodata, never
``inf``. Numbers are float64 throughout, so ``10 ** 10 ** 10`` overflows to
inf (nodata) at once instead of building a huge integer.
"""

from __future__ import annotations

import ast
import difflib
import math
import re

import numpy as np

from covextract.errors import RecipeError, RecipeProblem

__all__ = [
    "ARITY",
    "FUNCTIONS",
    "BUILTIN_INDICES",
    "MAX_DEPTH",
    "MAX_LENGTH",
    "Expression",
    "parse_expression",
]

#: Longest expression accepted, in characters. Band-math formulas are a line or
#: two; the limit keeps Python's parser (which recurses on nesting) far from
#: its own limits whatever the text holds.
MAX_LENGTH = 2000

#: Deepest nesting accepted: parentheses, signs, function calls, conditionals
#: and operators of different precedence each add a level; a flat chain such
#: as ``a + b - c + d`` is one level however long.
MAX_DEPTH = 50

#: Each allowed function's parameters, by name (shown in messages).
_PARAMETERS = {
    "abs": ("x",),
    "sqrt": ("x",),
    "log": ("x",),
    "log10": ("x",),
    "exp": ("x",),
    "minimum": ("a", "b"),
    "maximum": ("a", "b"),
    "clip": ("x", "low", "high"),
    "where": ("condition", "a", "b"),
}

#: Allowed functions → (fewest, most) positional arguments. No function takes
#: optional arguments: one more would be numpy's output array for the ufuncs
#: and ``clip``, and ``where`` with one argument returns indices, not values.
ARITY = {name: (len(params), len(params)) for name, params in _PARAMETERS.items()}

#: Functions whose next positional argument after the allowed ones is numpy's ``out``.
_TAKES_OUT = {"abs", "sqrt", "log", "log10", "exp", "minimum", "maximum", "clip"}

_NUMPY = {
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


def _exactly(name: str, fn):
    """``fn`` called with exactly ``name``'s allowed positional arguments, never ``out``."""
    low, high = ARITY[name]

    def call(*args):
        # The checker already counted the arguments; this keeps the guarantee
        # for an Expression built by hand.
        if not low <= len(args) <= high:
            raise TypeError(f"{name}() takes {low} arguments, got {len(args)}")
        return fn(*args)

    call.__name__ = name
    return call


#: numpy functions an expression may call, each taking exactly its allowed arguments.
FUNCTIONS = {name: _exactly(name, fn) for name, fn in _NUMPY.items()}

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

_OPERATOR_TEXT = {
    ast.MatMult: "@",
    ast.FloorDiv: "//",
    ast.LShift: "<<",
    ast.RShift: ">>",
    ast.BitXor: "^",
    ast.Not: "not",
    ast.In: "in",
    ast.NotIn: "not in",
    ast.Is: "is",
    ast.IsNot: "is not",
}

#: What a refused node is, in the words of the message.
_NODE_TEXT = {
    ast.Attribute: "attribute access (name.attribute)",
    ast.Subscript: "indexing (name[...])",
    ast.Lambda: "a lambda",
    ast.ListComp: "a comprehension",
    ast.SetComp: "a comprehension",
    ast.DictComp: "a comprehension",
    ast.GeneratorExp: "a comprehension",
    ast.JoinedStr: "an f-string",
    ast.FormattedValue: "an f-string",
    ast.List: "a list",
    ast.Tuple: "a tuple",
    ast.Set: "a set",
    ast.Dict: "a dict",
    ast.NamedExpr: "an assignment (:=)",
    ast.Starred: "unpacking (*)",
    ast.BoolOp: "'and' / 'or'",
    ast.Slice: "a slice",
    ast.Await: "await",
    ast.Yield: "yield",
    ast.YieldFrom: "yield",
}

_SIGNS = frozenset("+-~")
_OPEN, _CLOSE = "([{", ")]}"
_SNIPPET = 40
_LINE_BREAK = re.compile(r"\r\n|\r|\n")


def _allowed_calls() -> str:
    return ", ".join(f"{n}({', '.join(p)})" for n, p in _PARAMETERS.items())


_ALLOWED = (
    "an expression combines band names and numbers with + - * / ** %, comparisons, "
    "& | ~, 'a if condition else b' and the functions " + _allowed_calls()
)


class Expression:
    """A checked expression over named bands; call it with ``{band: array}``."""

    def __init__(self, text: str, tree: ast.Expression, bands: tuple) -> None:
        self.text = text
        self._tree = tree
        self.bands = bands

    def __call__(self, arrays: dict) -> np.ndarray:
        """Evaluate on float64 arrays; invalid results (inf, NaN) are NaN.

        The input arrays are never modified: they are handed to the
        evaluation as read-only views, and every function gets exactly its
        allowed positional arguments. The result is a new array of the
        bands' broadcast shape, also when the expression uses no band.
        """
        env = {name: _read_only(a) for name, a in arrays.items()}
        shape = np.broadcast_shapes(*(a.shape for a in env.values())) if env else ()
        with np.errstate(divide="ignore", invalid="ignore", over="ignore", under="ignore"):
            out = np.asarray(_evaluate(self._tree.body, env), dtype=np.float64)
        out = np.broadcast_to(out, np.broadcast_shapes(out.shape, shape))
        return np.where(np.isfinite(out), out, np.nan)


def _read_only(array) -> np.ndarray:
    """A read-only view of ``array`` (no copy): an in-place write raises instead."""
    view = np.asarray(array).view()
    view.flags.writeable = False
    return view


def _children(node) -> list:
    """The operands of an allowed node, in evaluation order."""
    if isinstance(node, ast.BinOp):
        return [node.left, node.right]
    if isinstance(node, ast.UnaryOp):
        return [node.operand]
    if isinstance(node, ast.Compare):
        return [node.left, *node.comparators]
    if isinstance(node, ast.IfExp):
        return [node.test, node.body, node.orelse]
    if isinstance(node, ast.Call):
        return list(node.args)
    return []


def _apply(node, args):
    """One allowed node applied to its evaluated operands."""
    if isinstance(node, ast.BinOp):
        return _BINOPS[type(node.op)](*args)
    if isinstance(node, ast.UnaryOp):
        return _UNARY[type(node.op)](*args)
    if isinstance(node, ast.Compare):
        result = None
        for op, left, right in zip(node.ops, args[:-1], args[1:], strict=True):
            part = _CMPOPS[type(op)](left, right)
            result = part if result is None else np.logical_and(result, part)
        return result
    if isinstance(node, ast.IfExp):
        return np.where(*args)
    if isinstance(node, ast.Call):
        return FUNCTIONS[node.func.id](*args)
    raise AssertionError(f"unchecked node {type(node).__name__}")  # pragma: no cover


def _evaluate(root, env):
    """Post-order evaluation with an explicit stack (no recursion on the tree's depth)."""
    stack = [(root, False)]
    values: list = []
    while stack:
        node, operands_ready = stack.pop()
        if isinstance(node, ast.Constant):
            values.append(np.float64(node.value))
        elif isinstance(node, ast.Name):
            values.append(env[node.id])
        elif operands_ready:
            n = len(_children(node))
            args = values[len(values) - n :]
            del values[len(values) - n :]
            values.append(_apply(node, args))
        else:
            stack.append((node, True))
            stack.extend((child, False) for child in reversed(_children(node)))
    (result,) = values
    return result


# -- checking ------------------------------------------------------------------------------


class _Text:
    """The expression's text, for positions and snippets in messages."""

    def __init__(self, source: str) -> None:
        self.source = source
        self.lines = _LINE_BREAK.split(source)

    def position(self, offset: int) -> str:
        """``column N`` (or ``line L, column N``) of a 0-based character offset."""
        line = self.source.count("\n", 0, offset)
        start = self.source.rfind("\n", 0, offset) + 1
        column = offset - start + 1
        return f"line {line + 1}, column {column}" if len(self.lines) > 1 else f"column {column}"

    def offset(self, node) -> int:
        """0-based character offset of ``node`` (ast gives UTF-8 byte columns)."""
        line = self.lines[node.lineno - 1]
        column = len(line.encode("utf-8")[: node.col_offset].decode("utf-8", "replace"))
        return sum(len(t) + 1 for t in self.lines[: node.lineno - 1]) + column

    def snippet(self, node=None, offset: int | None = None) -> str:
        """The node's own text (or the text from ``offset``), on one line and shortened."""
        if node is not None:
            text = ast.get_source_segment(self.source, node) or ""
        else:
            text = self.source[offset : offset + _SNIPPET + 1]
        text = " ".join(text.split())
        return text if len(text) <= _SNIPPET else text[: _SNIPPET - 3] + "..."

    def at(self, node=None, offset: int | None = None) -> str:
        """``at column N: <snippet>`` for a node or an offset."""
        if node is not None:
            offset = self.offset(node)
        return f"at {self.position(offset)}: {self.snippet(node, offset)}"


def _refuse(what: str, where: str, todo: str, key: str | None):
    """Raise the one problem: what is wrong, where in the expression, what to do."""
    message = f"{what}, {where}" if where else what
    raise RecipeError([RecipeProblem(f"{message}; {todo}", key=key)])


def _scan_text(text: _Text, key: str | None) -> None:
    """Length and nesting limits on the raw text, before Python's parser recurses on it."""
    source = text.source
    if len(source) > MAX_LENGTH:
        _refuse(
            f"the expression is {len(source)} characters long; the limit is {MAX_LENGTH}",
            "",
            "shorten it (a band-math layer combines a few bands; compute a long formula "
            "into a raster of its own first)",
            key,
        )
    if "__" in source:
        _refuse(
            "double underscores are not allowed",
            text.at(offset=source.index("__")),
            _ALLOWED,
            key,
        )
    depth, signs, sign_start = 0, 0, 0
    for i, ch in enumerate(source):
        if ch in _OPEN:
            depth += 1
            if depth > MAX_DEPTH:
                _refuse(
                    f"brackets are nested more than {MAX_DEPTH} deep",
                    text.at(offset=i),
                    f"the limit is {MAX_DEPTH}: remove redundant parentheses or split the formula",
                    key,
                )
        elif ch in _CLOSE:
            depth = max(depth - 1, 0)
        if ch in _SIGNS:
            sign_start = i if signs == 0 else sign_start
            signs += 1
            if signs > MAX_DEPTH:
                _refuse(
                    f"more than {MAX_DEPTH} signs (+ - ~) in a row",
                    text.at(offset=sign_start),
                    f"the limit is {MAX_DEPTH}: write one sign (two minus signs cancel)",
                    key,
                )
        elif not ch.isspace():
            signs = 0


def _parse(text: _Text, key: str | None) -> ast.Expression:
    """:func:`ast.parse`, every failure turned into the project's error."""
    try:
        return ast.parse(text.source, mode="eval")
    except SyntaxError as exc:
        if "null bytes" in str(exc.msg):
            _refuse("the expression holds a NUL character", "", "remove it", key)
        where = "at the end of the expression"
        line = (exc.lineno or 1) - 1
        if exc.offset and line < len(text.lines) and exc.offset <= len(text.lines[line]):
            offset = sum(len(t) + 1 for t in text.lines[:line]) + exc.offset - 1
            where = text.at(offset=offset)
        _refuse(
            f"syntax error ({exc.msg})",
            where,
            "check the brackets and that every operator has a value on both sides",
            key,
        )
    except ValueError as exc:  # a NUL character, on Pythons that raise ValueError for it
        _refuse(f"the expression cannot be read ({exc})", "", "remove control characters", key)
    except (RecursionError, MemoryError):
        _refuse(
            "the expression is too deeply nested for Python's parser",
            "",
            f"simplify it (at most {MAX_DEPTH} levels of nesting)",
            key,
        )
    raise AssertionError("unreachable")  # pragma: no cover


def _check_constant(node, text: _Text, key) -> None:
    value = node.value
    if not isinstance(value, int | float) or isinstance(value, bool):
        _refuse(
            f"only numbers are allowed as constants, not {value!r}",
            text.at(node),
            "band math has no text, truth values or complex numbers: write a number",
            key,
        )
    try:
        finite = math.isfinite(float(value))
    except OverflowError:
        finite = False
    if not finite:
        _refuse(
            "this number is beyond the range of 64-bit floats (about 1.8e308)",
            text.at(node),
            "write a smaller number",
            key,
        )


def _check_call(node, text: _Text, key) -> None:
    func = node.func
    if not isinstance(func, ast.Name) or func.id not in FUNCTIONS:
        name = f"{func.id}()" if isinstance(func, ast.Name) else "this call"
        _refuse(
            f"{name} is not an allowed function",
            text.at(node),
            "only these functions may be called: " + _allowed_calls(),
            key,
        )
    name, params = func.id, _PARAMETERS[func.id]
    usage = f"{name}({', '.join(params)})"
    for kw in node.keywords:
        if kw.arg == "out":
            _refuse(
                "the out= argument is not allowed (it would write the result into a band)",
                text.at(kw),
                f"write {usage}: the result is always a new layer",
                key,
            )
        if kw.arg is None:
            what = "unpacking (**) is not allowed"
        else:
            what = "keyword arguments are not allowed"
        _refuse(what, text.at(kw), f"pass the arguments by position: {usage}", key)
    for arg in node.args:
        if isinstance(arg, ast.Starred):
            _refuse("unpacking (*) is not allowed", text.at(arg), f"write {usage}", key)
    low, high = ARITY[name]
    got = len(node.args)
    if not low <= got <= high:
        count = str(low) if low == high else f"{low} to {high}"
        plural = "argument" if high == 1 else "arguments"
        todo = f"write {usage}"
        if got > high and name in _TAKES_OUT:
            todo += (
                " (numpy would take an extra argument as the array to write the result "
                "into, overwriting that band)"
            )
        _refuse(f"{name}() takes {count} {plural}, got {got}", text.at(node), todo, key)


def _depths(root):
    """Each node with its nesting depth; a flat chain ``a + b - c`` is one level."""
    stack = [(root, 1)]
    while stack:
        node, depth = stack.pop()
        yield node, depth
        children = [] if isinstance(node, ast.Call) else list(ast.iter_child_nodes(node))
        if isinstance(node, ast.Call):
            children = [*node.args, *node.keywords]
        pushed = []
        for child in children:
            if isinstance(child, ast.expr_context | ast.operator | ast.unaryop | ast.cmpop):
                continue
            flat = (
                isinstance(node, ast.BinOp) and child is node.left and isinstance(child, ast.BinOp)
            )
            pushed.append((child, depth if flat else depth + 1))
        stack.extend(reversed(pushed))


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
        Syntax error, a name that is not a band, a function called with the
        wrong number of arguments or with keyword (``out=``) arguments, an
        expression longer than :data:`MAX_LENGTH` characters or nested deeper
        than :data:`MAX_DEPTH` levels, or anything outside the allowed
        arithmetic (attribute access, other calls, lambdas...). The message
        gives the column where the problem starts and what to do.
    """
    bands = tuple(bands)
    if not isinstance(text, str) or not text.strip():
        _refuse(f"expression {text!r}: an expression must be non-empty text", "", _ALLOWED, key)
    source = BUILTIN_INDICES.get(text.strip().lower(), text)
    where = _Text(source)
    _scan_text(where, key)
    tree = _parse(where, key)
    used = []
    for node, depth in _depths(tree):
        leaf = isinstance(node, ast.Constant | ast.Name)
        if depth > MAX_DEPTH + 1 and not leaf:  # the root Expression is level 1
            _refuse(
                f"the expression is nested more than {MAX_DEPTH} levels deep",
                where.at(node),
                f"the limit is {MAX_DEPTH}: simplify it, or compute part of it into a raster "
                "of its own first",
                key,
            )
        if isinstance(node, ast.Expression | ast.keyword):
            continue  # keywords are refused by their call, with its name
        if isinstance(node, ast.Constant):
            _check_constant(node, where, key)
        elif isinstance(node, ast.Name):
            if node.id in bands:
                used.append(node.id)
                continue
            if node.id in FUNCTIONS:
                _refuse(
                    f"{node.id!r} is a function and must be called",
                    where.at(node),
                    f"write {node.id}({', '.join(_PARAMETERS[node.id])})",
                    key,
                )
            hint = difflib.get_close_matches(node.id, bands, n=1)
            _refuse(
                f"{node.id!r} is not a band of this layer (bands: {', '.join(bands) or 'none'})",
                where.at(node),
                f"did you mean {hint[0]!r}?"
                if hint
                else "use a band name, or add the band under bands:",
                key,
            )
        elif isinstance(node, ast.Call):
            _check_call(node, where, key)
        elif isinstance(node, ast.BinOp | ast.UnaryOp | ast.Compare):
            ops = node.ops if isinstance(node, ast.Compare) else [node.op]
            for op in ops:
                if type(op) not in (_BINOPS | _UNARY | _CMPOPS):
                    shown = _OPERATOR_TEXT.get(type(op), type(op).__name__)
                    hint = {ast.Not: "; use ~ for 'not'"}.get(type(op), "")
                    _refuse(
                        f"operator {shown!r} ({type(op).__name__}) is not allowed",
                        where.at(node),
                        _ALLOWED + hint,
                        key,
                    )
        elif isinstance(node, ast.IfExp):
            continue
        else:
            what = _NODE_TEXT.get(type(node), type(node).__name__)
            hint = "; use & and | for 'and' and 'or'" if isinstance(node, ast.BoolOp) else ""
            _refuse(
                f"{what} is not allowed in an expression",
                where.at(node),
                _ALLOWED + hint,
                key,
            )
    return Expression(text, tree, tuple(dict.fromkeys(used)))
