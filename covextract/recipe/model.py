"""The recipe, version 1, as one validated object.

The models mirror the YAML a user writes (see "Recipe (user contract,
version 1)" in the design notes), one module per block:
:mod:`~covextract.recipe.study` (``study:``, ``units:``),
:mod:`~covextract.recipe.layers`, :mod:`~covextract.recipe.covariates`,
:mod:`~covextract.recipe.output` (``output:``, ``execution:``), with the
checks across blocks in :mod:`~covextract.recipe.checks`.

Paths are kept as the text the user wrote; :meth:`Recipe.resolve` turns them
into paths relative to the recipe's folder.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
from pathlib import Path, PurePath
from typing import Annotated, Any, Literal

from pydantic import BeforeValidator, Field, PrivateAttr, model_validator

from covextract.recipe.checks import cross_check
from covextract.recipe.common import (
    RECIPE_VERSION,
    STATE_FOLDER_NAME,
    Name,
    RecipeModel,
    describe,
    empty_block,
    problem,
    validate_with,
)
from covextract.recipe.covariates import Covariate
from covextract.recipe.layers import Layer
from covextract.recipe.output import Execution, Output
from covextract.recipe.study import Study, Units

__all__ = ["Recipe", "split_key_path", "nearest_line"]


def _check_version(value: Any) -> Any:
    # Literal[1] alone would take True and 1.0, which equal 1 in Python.
    if value is None:
        raise problem(f"the recipe version is empty; write version: {RECIPE_VERSION}")
    if not (isinstance(value, int) and not isinstance(value, bool)) or value != RECIPE_VERSION:
        raise problem(
            f"unsupported recipe version {describe(value)}: this covextract reads "
            f"version {RECIPE_VERSION}; write version: {RECIPE_VERSION}"
        )
    return value


class Recipe(RecipeModel):
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
    units: Annotated[Units, BeforeValidator(empty_block)] = Field(default_factory=Units)
    layers: Annotated[dict[Name, Layer], Field(min_length=1)]
    covariates: Annotated[list[Covariate], Field(min_length=1)]
    output: Output
    execution: Annotated[Execution, BeforeValidator(empty_block)] = Field(default_factory=Execution)

    _base_dir: Path = PrivateAttr(default_factory=Path.cwd)
    _source_file: Path | None = PrivateAttr(default=None)
    _lines: dict[tuple[str, ...], int] = PrivateAttr(default_factory=dict)

    @model_validator(mode="wrap")
    @classmethod
    def _check_across_blocks(cls, data: Any, handler) -> Recipe:
        issues = cross_check(data) if isinstance(data, dict) else []
        recipe = validate_with(cls, data, handler, issues)
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
        parts = split_key_path(key_path) if isinstance(key_path, str) else tuple(key_path)
        return nearest_line(self._lines, parts)

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


def split_key_path(key_path: str) -> tuple[str, ...]:
    """``"covariates[1].stats[0]"`` → ``("covariates", "1", "stats", "0")``."""
    return tuple(m.group(1) or m.group(2) for m in _KEY_PART.finditer(key_path))


def nearest_line(lines: dict[tuple[str, ...], int], parts: tuple) -> int | None:
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
