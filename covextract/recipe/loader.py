"""Load a recipe from YAML (or a mapping) and report every problem with its line.

The YAML is composed into PyYAML nodes, which carry their position in the
file, and constructed from the same nodes, so each key path of the data has
a line. Validation errors from :class:`covextract.recipe.Recipe` arrive as
pydantic locations (``("covariates", 1, "stats", 0)``); each is mapped to
the key path a user reads (``covariates[1].stats[0]``) and to the line of
that key, or of its nearest parent when the key is missing. Pydantic's
generic messages are rewritten into plain ones that show the value found
and the valid choices.

Loading is bounded, so that no recipe can make ``check`` hang or exhaust
memory: the file holds at most :data:`MAX_RECIPE_BYTES`, blocks nest at most
:data:`MAX_DEPTH` deep, lists and mappings hold at most
:data:`MAX_ITEMS` entries (fewer for some keys, :data:`ITEM_LIMITS`), and YAML
aliases (``*name``) may expand the recipe to at most :data:`MAX_VALUES`
values: nine nested aliases of nine items each would turn a few hundred
bytes into 387 million values. Aliases stay allowed below that, because
``yaml.safe_dump`` writes one wherever a script's data shares an object.
The expanded size is computed once per node, so every walk below is linear
in the file's size or bounded by the expansion limit.

YAML here is YAML 1.1 as PyYAML reads it: unquoted ``yes``, ``no``, ``on``
and ``off`` are booleans. The schema accepts ``area_weighting: off`` for
that reason; elsewhere the messages say to quote such words.
"""

from __future__ import annotations

import difflib
import errno
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

__all__ = [
    "load_recipe",
    "MAX_RECIPE_BYTES",
    "MAX_DEPTH",
    "MAX_VALUES",
    "MAX_ITEMS",
    "ITEM_LIMITS",
]

#: Largest recipe file read, in bytes. The demo recipe, comments and all, is
#: under 10 kB; a recipe a hundred times larger is surely not typed by hand.
MAX_RECIPE_BYTES = 1_000_000
#: Deepest nesting of blocks and lists. A recipe nests about six deep
#: (``covariates[0].reallocate.zones.file``).
MAX_DEPTH = 20
#: Most values (keys, list items and scalars) a recipe may expand to
#: through YAML aliases; the demo recipe holds about 400.
MAX_VALUES = 100_000
#: Most entries in any list or mapping of a recipe.
MAX_ITEMS = 1000
#: Tighter limits for some keys (by the key holding the list or mapping).
#: There are fewer than 100 statistic names in all.
ITEM_LIMITS = {"stats": 100}

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
        problems = _check_bounds(data, file, lines)
        if problems:
            raise RecipeError(problems)
    elif isinstance(source, (str, os.PathLike)):
        path = Path(source).expanduser()
        file = os.fspath(source)
        text = _read_text(path)
        data, lines, problems = _parse_yaml(text, file)
        bounds = _check_bounds(data, file, lines)
        if bounds:
            raise RecipeError(bounds)
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
        with open(path, "rb") as f:
            # One byte more than the limit tells a file at the limit from a
            # larger one without reading a huge (or endless) file whole.
            raw = f.read(MAX_RECIPE_BYTES + 1)
            size = len(raw)
            if size > MAX_RECIPE_BYTES:
                try:
                    size = max(size, os.fstat(f.fileno()).st_size)
                except OSError:
                    pass
    except FileNotFoundError:
        if path.is_symlink():
            raise InputFileError(
                f"recipe file {path} is a symbolic link to {os.readlink(path)}, which does not "
                "exist; point the link at the recipe or give the recipe's own path"
            ) from None
        raise InputFileError(
            f"recipe file not found: {path}; check the path (relative paths start from the "
            f"current folder, {Path.cwd()})"
        ) from None
    except OSError as exc:
        if exc.errno == errno.ELOOP:
            raise InputFileError(
                f"recipe file {path} is a symbolic link loop (the links point at each other "
                "and never reach a file); give the path of the recipe file itself"
            ) from None
        if isinstance(exc, IsADirectoryError):
            raise InputFileError(
                f"{path} is a folder, not a recipe file; give the path of the recipe's .yaml file"
            ) from None
        raise InputFileError(
            f"cannot read recipe file {path}: {exc.strerror or exc}; check its permissions"
        ) from None
    if size > MAX_RECIPE_BYTES:
        more = "more than " if size == MAX_RECIPE_BYTES + 1 else ""
        raise RecipeError(
            [
                RecipeProblem(
                    f"the recipe file is {more}{_size_text(size)}; a recipe may hold at most "
                    f"{_size_text(MAX_RECIPE_BYTES)}: check that this is the recipe (long "
                    "lists of classes or covariates are better split over several recipes)",
                    file=os.fspath(path),
                )
            ]
        )
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


def _size_text(size: int) -> str:
    if size >= 1_000_000:
        return f"{size / 1_000_000:.1f} MB ({size:,} bytes)"
    if size >= 1000:
        return f"{size / 1000:.0f} kB ({size:,} bytes)"
    return f"{size} bytes"


_TOO_DEEP = (
    f"the recipe nests deeper than {MAX_DEPTH} levels of blocks and lists; a recipe needs "
    "about six: check the brackets and indentation"
)


class _Refused(Exception):
    """A recipe YAML construct covextract does not read, with its 1-based line."""

    def __init__(self, message: str, line: int) -> None:
        super().__init__(message)
        self.message = message
        self.line = line


class _RecipeLoader(yaml.SafeLoader):
    """PyYAML's safe loader with a nesting limit; it notes the line of the first alias.

    A value YAML cannot hold (a date such as 2021-02-30, a number of more
    than 4300 digits) becomes a YAML error at its line instead of a
    ``ValueError`` from inside PyYAML.
    """

    _depth = 0
    _first_alias: int | None = None

    def compose_node(self, parent, index):
        event = self.peek_event()
        line = event.start_mark.line + 1
        if isinstance(event, yaml.AliasEvent) and self._first_alias is None:
            self._first_alias = line
        if self._depth >= MAX_DEPTH:
            raise _Refused(_TOO_DEEP, line)
        self._depth += 1
        try:
            return super().compose_node(parent, index)
        finally:
            self._depth -= 1

    def _guarded(self, construct, node, what, why):
        try:
            return construct(self, node)
        except (ValueError, OverflowError) as exc:
            shown = node.value if len(node.value) <= 40 else node.value[:37] + "..."
            raise yaml.constructor.ConstructorError(
                None,
                None,
                f"{shown!r} cannot be read as {what} ({why or exc}); put it in quotes to mean text",
                node.start_mark,
            ) from None

    def construct_yaml_timestamp(self, node):
        return self._guarded(yaml.SafeLoader.construct_yaml_timestamp, node, "a date", None)

    def construct_yaml_int(self, node):
        return self._guarded(
            yaml.SafeLoader.construct_yaml_int, node, "a whole number", "too many digits"
        )

    def construct_yaml_float(self, node):
        return self._guarded(yaml.SafeLoader.construct_yaml_float, node, "a number", "too long")


_RecipeLoader.add_constructor("tag:yaml.org,2002:timestamp", _RecipeLoader.construct_yaml_timestamp)
_RecipeLoader.add_constructor("tag:yaml.org,2002:int", _RecipeLoader.construct_yaml_int)
_RecipeLoader.add_constructor("tag:yaml.org,2002:float", _RecipeLoader.construct_yaml_float)


_FLOW_TOKEN = re.compile(r""""(?:[^"\\]|\\.)*"|'(?:[^']|'')*'|(?:^|\s)#[^\n]*|[\[{\]}]""")


def _deep_flow_line(text: str) -> int | None:
    """Line where ``[``/``{`` brackets first nest deeper than the limit, else None.

    PyYAML's scanner slows down with every open bracket of a line (about a
    second for a line of a thousand), before the composer's depth limit is
    reached; this scan finds such a line in one pass. Quoted text and
    comments are skipped, so brackets inside them do not count.
    """
    if text.count("[") + text.count("{") <= MAX_DEPTH:
        return None
    depth = 0
    for match in _FLOW_TOKEN.finditer(text):
        token = match.group()
        if token in "[{":
            depth += 1
            if depth > MAX_DEPTH:
                return text.count("\n", 0, match.start()) + 1
        elif token in "]}":
            depth = max(depth - 1, 0)
    return None


def _check_expansion(root: yaml.Node, alias_line: int) -> None:
    """Refuse aliases that make the recipe expand beyond :data:`MAX_VALUES` values.

    Each node's expanded size is computed once (the nodes form a graph in
    which an alias is a second edge to a node), so this is linear in the
    file's size. An alias inside its own anchor is refused too.
    """
    size: dict[int, int] = {}
    stack: list[tuple[yaml.Node, bool]] = [(root, False)]
    open_nodes: set[int] = set()
    while stack:
        node, done = stack.pop()
        key = id(node)
        children = _children(node)
        if done:
            open_nodes.discard(key)
            size[key] = min(1 + sum(size[id(c)] for c in children), MAX_VALUES + 1)
            continue
        if key in size:
            continue
        if key in open_nodes:
            raise _Refused(
                "a YAML alias (*name) sits inside its own anchor (&name), which would repeat "
                "without end; write the value out",
                node.start_mark.line + 1,
            )
        open_nodes.add(key)
        stack.append((node, True))
        for child in children:
            if id(child) in open_nodes:
                raise _Refused(
                    "a YAML alias (*name) sits inside its own anchor (&name), which would "
                    "repeat without end; write the value out",
                    child.start_mark.line + 1,
                )
            if id(child) not in size:
                stack.append((child, False))
    if size[id(root)] > MAX_VALUES:
        raise _Refused(
            f"YAML aliases (*name) make this recipe expand to more than {MAX_VALUES:,} values "
            "(the first alias is on this line); write the values out, or use fewer aliases",
            alias_line,
        )


def _children(node: yaml.Node) -> list[yaml.Node]:
    if isinstance(node, yaml.MappingNode):
        return [n for pair in node.value for n in pair]
    if isinstance(node, yaml.SequenceNode):
        return list(node.value)
    return []


def _parse_yaml(
    text: str, file: str
) -> tuple[Any, dict[tuple[str, ...], int], list[RecipeProblem]]:
    """Parse YAML text into data, the line of each key path, and duplicate-key problems."""
    deep = _deep_flow_line(text)
    if deep is not None:
        raise RecipeError([RecipeProblem(_TOO_DEEP, file=file, line=deep)])
    try:
        # The reader checks every character when it is made: inside the try.
        loader = _RecipeLoader(text)
    except yaml.reader.ReaderError as exc:
        line = text[: exc.position].count("\n") + 1
        raise RecipeError(
            [
                RecipeProblem(
                    f"the recipe holds a control character ({exc.character:#06x}) YAML "
                    "does not allow; delete it (in quoted text, write it as an escape such as "
                    "\\t)",
                    file=file,
                    line=line,
                )
            ]
        ) from None
    try:
        node = loader.get_single_node()
        if node is None:
            return None, {}, []
        if loader._first_alias is not None:
            _check_expansion(node, loader._first_alias)
        problems = _duplicate_keys(node, file)
        data = loader.construct_document(node)
        # construct_document has merged any ``<<`` keys into the nodes, so
        # the index below sees the mappings as the data holds them.
        lines = _index_lines(node, loader)
        return data, lines, problems
    except _Refused as exc:
        raise RecipeError([RecipeProblem(exc.message, file=file, line=exc.line)]) from None
    except yaml.constructor.ConstructorError as exc:
        mark = exc.problem_mark
        line = mark.line + 1 if mark else None
        what = exc.problem or "unreadable value"
        if "could not determine a constructor" in what:
            tag = what.split("tag", 1)[-1].strip(" '!").replace("tag:yaml.org,2002:", "!!")
            what = (
                f"the YAML tag {tag!r} is not allowed in a recipe (a recipe holds only plain "
                "text, numbers, yes/no, lists and blocks); remove the tag"
            )
        raise RecipeError([RecipeProblem(what, file=file, line=line)]) from None
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
    """1-based line of every key path (keys and list indices as text).

    An alias is walked again at each place it stands, as the data holds it
    there; :func:`_check_expansion` has bounded the expanded size by then, so
    the walk is bounded by :data:`MAX_VALUES` and linear in it.
    """
    lines: dict[tuple[str, ...], int] = {(): root.start_mark.line + 1}
    stack: list[tuple[yaml.Node, tuple[str, ...]]] = [(root, ())]
    while stack:
        node, path = stack.pop()
        if isinstance(node, yaml.MappingNode):
            for key, value in node.value:
                if not isinstance(key, yaml.ScalarNode):
                    continue
                sub = path + (str(loader.construct_object(key)),)
                lines[sub] = key.start_mark.line + 1
                stack.append((value, sub))
        elif isinstance(node, yaml.SequenceNode):
            for i, item in enumerate(node.value):
                sub = path + (str(i),)
                lines[sub] = item.start_mark.line + 1
                stack.append((item, sub))
    return lines


def _check_bounds(data: Any, file: str | None, lines: dict) -> list[RecipeProblem]:
    """Refuse lists and mappings beyond the limits, too deep nesting, and NUL characters.

    Runs before validation, so that no check meets a list of a million
    statistics. Works on data given as a mapping too (which may even
    contain itself: the depth limit ends the walk).
    """
    problems: list[RecipeProblem] = []
    stack: list[tuple[Any, tuple]] = [(data, ())]
    while stack and len(problems) < 20:
        value, path = stack.pop()
        if len(path) > MAX_DEPTH:
            problems.append(
                RecipeProblem(
                    f"the recipe nests deeper than {MAX_DEPTH} levels of blocks and lists",
                    key=_format_key_path(path, data) or None,
                    file=file,
                    line=nearest_line(lines, path),
                )
            )
            continue
        if isinstance(value, str):
            if "\x00" in value:
                problems.append(
                    RecipeProblem(
                        "the text holds a NUL character (\\0), which no name or path may "
                        "hold; remove it",
                        key=_format_key_path(path, data) or None,
                        file=file,
                        line=nearest_line(lines, path),
                    )
                )
            continue
        if not isinstance(value, (dict, list)):
            continue
        limit = ITEM_LIMITS.get(path[-1], MAX_ITEMS) if path else MAX_ITEMS
        if len(value) > limit:
            what = "list holds" if isinstance(value, list) else "block holds"
            what = f"this {what}" if path else "the recipe holds"
            unit = "entries" if isinstance(value, list) else "keys"
            problems.append(
                RecipeProblem(
                    f"{what} {len(value):,} {unit}; a recipe allows at most {limit} here: "
                    "check that it is what you meant, or split the work over several recipes",
                    key=_format_key_path(path, data) or None,
                    file=file,
                    line=nearest_line(lines, path),
                )
            )
            continue
        if isinstance(value, dict):
            for k, v in value.items():
                if isinstance(k, str) and "\x00" in k:
                    stack.append((k, path + (k,)))
                stack.append((v, path + (k,)))
        else:
            stack.extend((v, path + (i,)) for i, v in enumerate(value))
    return problems


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
