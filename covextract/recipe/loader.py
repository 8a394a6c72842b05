"""Load a recipe from YAML (or a mapping) and report every problem with its line.

The YAML is composed into PyYAML nodes, which carry their position in the
file, and constructed from the same nodes, so each key path of the data has
a line. Validation errors from :class:`covextract.recipe.Recipe` arrive as
pydantic locations (``("covariates", 1, "stats", 0)``); each is mapped to
the key path a user reads (``covariates[1].stats[0]``) and to the line of
that key, or of its nearest parent when the key is missing. Pydantic's
generic messages are rewritten into plain ones that show the value found
and the valid choices.

YAML here is YAML 1.1 as PyYAML reads it: unquoted ``yes``, ``no``, ``on``
and ``off`` are booleans. The schema accepts ``area_weighting: off`` for
that reason; elsewhere the messages say to quote such words.
"""

from __future__ import annotations

import difflib
import os
import re
import types
import typing
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import yaml
from pydantic import BaseModel, ValidationError

from covextract.errors import InputFileError, RecipeError, RecipeProblem
from covextract.recipe.common import NAME_PATTERN, describe
from covextract.recipe.model import Recipe, nearest_line
from covextract.recipe.renamed import renamed_to

__all__ = ["load_recipe"]

_MISSING_HINTS = {
    ("version",): "write version: 1 as the first line of the recipe",
    ("study",): "add a study block naming the table and its id column",
    ("layers",): "add a layers block naming each raster",
    ("covariates",): "add a covariates list saying which statistics to compute",
    ("output",): "add an output block with table: <path of the result>",
}


def load_recipe(
    source: str | os.PathLike | Mapping, *, base_dir: str | os.PathLike | None = None
) -> Recipe:
    """Read and validate a recipe.

    Parameters
    ----------
    source : str, path-like or mapping
        Path of a YAML recipe file, or the recipe as a mapping (as
        ``yaml.safe_load`` would give it).
    base_dir : str or path-like, optional
        Folder that relative paths in the recipe are relative to. Default:
        the recipe file's folder, or the current folder for a mapping.

    Returns
    -------
    Recipe
        The validated recipe, knowing its folder, its file and the line
        of each key.

    Raises
    ------
    InputFileError
        The recipe file does not exist or cannot be read (also an
        ``OSError``).
    RecipeError
        The recipe is not valid YAML or breaks the schema; ``problems``
        lists every problem found, each with its key path, file and line.

    Examples
    --------
    >>> recipe = load_recipe("study/recipe.yaml")  # doctest: +SKIP
    >>> recipe.resolve(recipe.study.table)  # doctest: +SKIP
    PosixPath('/data/study/data/villages.csv')
    """
    if isinstance(source, Mapping):
        data: Any = dict(source)
        file = None
        lines: dict[tuple[str, ...], int] = {}
        problems: list[RecipeProblem] = []
        folder = Path(base_dir).expanduser() if base_dir is not None else Path.cwd()
    elif isinstance(source, (str, os.PathLike)):
        path = Path(source).expanduser()
        file = os.fspath(source)
        text = _read_text(path)
        data, lines, problems = _parse_yaml(text, file)
        folder = Path(base_dir).expanduser() if base_dir is not None else path.parent
    else:
        raise TypeError(f"load_recipe takes a file path or a mapping, got {type(source).__name__}")

    if data is None and not problems:
        problems.append(
            RecipeProblem(
                "the recipe is empty; start with version: 1", file=file, line=1 if file else None
            )
        )
    elif data is not None and not isinstance(data, dict):
        problems.append(
            RecipeProblem(
                "the recipe must be a mapping of keys (version, study, layers, covariates, "
                f"output), got {describe(data)}",
                file=file,
                line=nearest_line(lines, ()),
            )
        )
    if data is None or not isinstance(data, dict):
        raise RecipeError(problems)

    try:
        recipe = Recipe.model_validate(data)
    except ValidationError as exc:
        problems += _problems_from(exc, data, file, lines)
        recipe = None
    if problems:
        # Top-down order reads like the file; problems without a line keep their order.
        problems.sort(key=lambda p: (p.line is None, p.line or 0))
        raise RecipeError(problems)

    recipe._base_dir = Path(os.path.abspath(folder))
    recipe._source_file = Path(os.path.abspath(path)) if file is not None else None
    recipe._lines = lines
    return recipe


# --------------------------------------------------------------------------
# reading


def _read_text(path: Path) -> str:
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise InputFileError(
            f"recipe file not found: {path}; check the path (relative paths start from the "
            f"current folder, {Path.cwd()})"
        ) from None
    except IsADirectoryError:
        raise InputFileError(
            f"{path} is a folder, not a recipe file; give the path of the recipe's .yaml file"
        ) from None
    except OSError as exc:
        raise InputFileError(
            f"cannot read recipe file {path}: {exc.strerror or exc}; check its permissions"
        ) from None
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise RecipeError(
            [
                RecipeProblem(
                    f"the recipe is not UTF-8 text (byte {raw[exc.start]:#04x}); save it as UTF-8",
                    file=os.fspath(path),
                    line=line,
                )
            ]
        ) from None


def _parse_yaml(
    text: str, file: str
) -> tuple[Any, dict[tuple[str, ...], int], list[RecipeProblem]]:
    """Parse YAML text into data, the line of each key path, and duplicate-key problems."""
    loader = yaml.SafeLoader(text)
    try:
        node = loader.get_single_node()
        if node is None:
            return None, {}, []
        problems = _duplicate_keys(node, file)
        data = loader.construct_document(node)
        # construct_document has merged any ``<<`` keys into the nodes, so
        # the index below sees the mappings as the data holds them.
        lines = _index_lines(node, loader)
        return data, lines, problems
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        what = exc.problem or "unreadable YAML"
        if exc.context:
            what = f"{what} ({exc.context})"
        where = f" at line {mark.line + 1}, column {mark.column + 1}" if mark else ""
        raise RecipeError(
            [
                RecipeProblem(
                    f"the recipe is not valid YAML: {what}{where}; check the indentation "
                    "and quote text that holds ': ' or starts with a special character",
                    file=file,
                    line=mark.line + 1 if mark else None,
                )
            ]
        ) from None
    except yaml.YAMLError as exc:
        raise RecipeError(
            [RecipeProblem(f"the recipe is not valid YAML: {exc}", file=file)]
        ) from None
    finally:
        loader.dispose()


def _duplicate_keys(root: yaml.Node, file: str) -> list[RecipeProblem]:
    # PyYAML keeps the last of two equal keys without a word; a recipe with
    # two ``ndvi:`` layers is almost surely a mistake.
    problems = []
    stack: list[tuple[yaml.Node, str]] = [(root, "")]
    seen_nodes: set[int] = set()
    while stack:
        node, path = stack.pop()
        if id(node) in seen_nodes:
            continue
        seen_nodes.add(id(node))
        if isinstance(node, yaml.MappingNode):
            first: dict[tuple[str, str], int] = {}
            for key, value in node.value:
                if not isinstance(key, yaml.ScalarNode) or key.tag == "tag:yaml.org,2002:merge":
                    continue
                sub = f"{path}.{key.value}" if path else key.value
                stack.append((value, sub))
                line = key.start_mark.line + 1
                ident = (key.tag, key.value)
                if ident in first:
                    problems.append(
                        RecipeProblem(
                            f"key {key.value!r} appears twice in the same block (first on line "
                            f"{first[ident]}); YAML would silently keep only the last: remove "
                            "or rename one",
                            key=sub,
                            file=file,
                            line=line,
                        )
                    )
                else:
                    first[ident] = line
        elif isinstance(node, yaml.SequenceNode):
            stack.extend((item, f"{path}[{i}]") for i, item in enumerate(node.value))
    return problems


def _index_lines(root: yaml.Node, loader: yaml.SafeLoader) -> dict[tuple[str, ...], int]:
    """1-based line of every key path (keys and list indices as text)."""
    lines: dict[tuple[str, ...], int] = {(): root.start_mark.line + 1}

    def walk(node: yaml.Node, path: tuple[str, ...], active: frozenset) -> None:
        if id(node) in active:  # an alias that contains itself
            return
        active = active | {id(node)}
        if isinstance(node, yaml.MappingNode):
            for key, value in node.value:
                if not isinstance(key, yaml.ScalarNode):
                    continue
                sub = path + (str(loader.construct_object(key)),)
                lines[sub] = key.start_mark.line + 1
                walk(value, sub, active)
        elif isinstance(node, yaml.SequenceNode):
            for i, item in enumerate(node.value):
                sub = path + (str(i),)
                lines[sub] = item.start_mark.line + 1
                walk(item, sub, active)

    walk(root, (), frozenset())
    return lines


# --------------------------------------------------------------------------
# pydantic errors → recipe problems


def _problems_from(
    exc: ValidationError, data: dict, file: str | None, lines: dict[tuple[str, ...], int]
) -> list[RecipeProblem]:
    errors = exc.errors()
    missing = {tuple(e["loc"]) for e in errors if e["type"] == "missing"}
    covered: set[tuple] = set()
    messages = []
    for err in errors:
        loc = tuple(err["loc"])
        if err["type"] == "extra_forbidden":
            message, suggestion = _unknown_key(loc, missing)
            if suggestion is not None:
                # The typo explains the missing key: one problem, not two.
                covered.add(loc[:-1] + (suggestion,))
        else:
            message = _message(err, loc)
        messages.append((loc, message))
    return [
        RecipeProblem(
            message,
            key=_format_key_path(loc, data) or None,
            file=file,
            line=nearest_line(lines, loc),
        )
        for loc, message in messages
        if loc not in covered
    ]


def _message(err: dict, loc: tuple) -> str:
    kind = err["type"]
    value = err.get("input")
    ctx = err.get("ctx") or {}
    is_key = bool(loc) and loc[-1] == "[key]"
    if kind == "recipe":
        return err["msg"]
    if kind == "missing":
        hint = _MISSING_HINTS.get(loc)
        return f"missing required key {loc[-1]!r}" + (f"; {hint}" if hint else "")
    if kind == "string_type":
        number = isinstance(value, (int, float)) and not isinstance(value, bool)
        extra = "; put it in quotes" if number else ""
        what = "a name (text)" if is_key else "text"
        return f"expected {what}, got {describe(value)}{extra}"
    if kind == "int_type":
        what = "a whole number as key" if is_key else "a whole number"
        return f"expected {what}, got {describe(value)}"
    if kind == "float_type":
        return f"expected a number, got {describe(value)}"
    if kind == "list_type":
        one = isinstance(value, (str, int, float))
        extra = f"; write [{value}] for a list of one" if one else ""
        return f"expected a list, got {describe(value)}{extra}"
    if kind in ("dict_type", "model_type", "model_attributes_type"):
        return "expected a block of key: value lines (or {key: value, ...}), got " + describe(value)
    if kind == "literal_error":
        choices = _choices_at(loc)
        if not choices:
            return f"invalid choice {value!r}; valid: {ctx.get('expected', '')}"
        hint = ""
        if isinstance(value, str):
            close = difflib.get_close_matches(value, [str(c) for c in choices], n=1)
            hint = f"; did you mean {close[0]!r}?" if close else ""
        shown = value if isinstance(value, str) else describe(value)
        return f"invalid choice {shown!r}{hint} (valid: {', '.join(map(str, choices))})"
    if kind == "greater_than":
        return f"must be more than {_plain(ctx.get('gt'))}, got {_plain(value)}"
    if kind == "greater_than_equal":
        return f"must be at least {_plain(ctx.get('ge'))}, got {_plain(value)}"
    if kind == "finite_number":
        return f"must be a finite number, got {value!r}"
    if kind == "string_too_short":
        return "must not be empty"
    if kind in ("too_short", "too_long"):
        actual = ctx.get("actual_length")
        if loc and loc[-1] == "valid_range":
            return f"expected [min, max], two numbers; got {actual} item(s)"
        if kind == "too_short" and ctx.get("min_length") == 1:
            return "must not be empty; give at least one entry"
        bound = "at least" if kind == "too_short" else "at most"
        limit = ctx.get("min_length") if kind == "too_short" else ctx.get("max_length")
        return f"must have {bound} {limit} item(s), got {actual}"
    if kind == "string_pattern_mismatch" and ctx.get("pattern") == NAME_PATTERN:
        suggestion = _as_name(value)
        example = f" (for example {suggestion!r})" if suggestion else ""
        return (
            f"{value!r} cannot be used as a name: names become parts of column names, so "
            "they start with a lower-case letter and hold only a-z, 0-9 and _" + example
        )
    return err["msg"]


def _plain(value: Any) -> str:
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value)


def _as_name(value: Any) -> str:
    text = re.sub(r"[^a-z0-9]+", "_", str(value).lower()).strip("_")
    text = re.sub(r"^[^a-z]+", "", text)
    return text


def _unknown_key(loc: tuple, missing: set[tuple]) -> tuple[str, str | None]:
    """Message for an unknown key, and the missing required key it likely meant.

    A key listed in :data:`~covextract.recipe.renamed.RENAMED_KEYS` is reported as
    renamed; any other gets the closest allowed key as a did-you-mean.
    """
    key = loc[-1]
    allowed = _keys_at(loc[:-1])
    models = [tp.__name__ for tp in _types_at(loc[:-1]) if _is_model(tp)]
    new = renamed_to(models, str(key), allowed)
    if new is not None:
        meant = new if loc[:-1] + (new,) in missing else None
        return f"key {key!r} was renamed to {new!r}; rename it in your recipe", meant
    close = difflib.get_close_matches(str(key), allowed, n=1, cutoff=0.6) if allowed else []
    message = f"unknown key {key!r}"
    meant = None
    if close:
        if loc[:-1] + (close[0],) in missing:
            meant = close[0]
            message += f"; did you mean {close[0]!r} (required here)?"
        else:
            message += f"; did you mean {close[0]!r}?"
    if allowed:
        message += (" Allowed" if close else "; allowed") + " here: " + ", ".join(allowed)
    return message, meant


# ---- what the schema expects at a location ---------------------------------


def _flatten(tp: Any) -> list[Any]:
    """Union and Annotated members of a type hint, without None."""
    origin = typing.get_origin(tp)
    if origin is typing.Annotated:
        return _flatten(typing.get_args(tp)[0])
    if origin is typing.Union or origin is types.UnionType:
        return [t for arg in typing.get_args(tp) for t in _flatten(arg)]
    if tp is type(None):
        return []
    return [tp]


def _types_at(loc: tuple) -> list[Any]:
    """List the schema types that may sit at a pydantic location."""
    current: list[Any] = [Recipe]
    for part in loc:
        following: list[Any] = []
        for tp in (t for c in current for t in _flatten(c)):
            origin = typing.get_origin(tp)
            if isinstance(tp, type) and issubclass(tp, BaseModel):
                if isinstance(part, str) and part in tp.model_fields:
                    following.append(tp.model_fields[part].annotation)
            elif origin is list and isinstance(part, int):
                following.append(typing.get_args(tp)[0])
            elif origin is dict and part != "[key]":
                following.append(typing.get_args(tp)[1])
        current = following
    return [t for c in current for t in _flatten(c)]


def _is_model(tp: Any) -> bool:
    return isinstance(tp, type) and issubclass(tp, BaseModel)


def _keys_at(loc: tuple) -> list[str]:
    keys: list[str] = []
    for tp in _types_at(loc):
        if _is_model(tp):
            keys += [k for k in tp.model_fields if k not in keys]
    return keys


def _choices_at(loc: tuple) -> list[Any]:
    literals = [tp for tp in _types_at(loc) if typing.get_origin(tp) is typing.Literal]
    return [choice for tp in literals for choice in typing.get_args(tp)]


def _format_key_path(loc: tuple, data: Any) -> str:
    """Write a pydantic location as the key path a user reads (``[i]`` for list items)."""
    out = ""
    current = data
    for part in loc:
        if part == "[key]":
            continue
        if isinstance(current, list) and isinstance(part, int):
            out += f"[{part}]"
            current = current[part] if 0 <= part < len(current) else None
            continue
        out += ("." if out else "") + str(part)
        current = current.get(part) if isinstance(current, dict) else None
    return out
