"""The protocol every kind of layer source implements, and the opened layer it gives.

A *source kind* turns a recipe's layer spec into something the engine reads:
one raster source (``grid``, ``read_block(window)``, ``to_values(stored)``)
or, for a layer with a time axis, a :class:`~covextract.io.series.SeriesIndex`
of such sources. :class:`LayerSource` keeps that object together with the
kind that opened it, so a run can ask any opened layer the same two
questions: which files it reads (:meth:`LayerSource.input_files`, the input
identity of manifests and refresh fingerprints) and what it reads, in one
sentence for the codebook (:meth:`LayerSource.describe`).

Paths in descriptions never show folders outside the recipe's folder: a path
the recipe wrote relative is shown as written, an absolute one relative to
the recipe's folder when inside it, and by its file name alone otherwise.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Protocol, runtime_checkable

__all__ = ["SourceKind", "LayerSource", "shown_path", "step_adjective", "gaps_text"]


@runtime_checkable
class SourceKind(Protocol):
    """One kind of layer source (a raster file, band math, a template series, a cube).

    Attributes
    ----------
    name : str
        Short name of the kind, for messages (``"file"``, ``"band math"``).
    series : bool
        True when :meth:`open` gives a :class:`~covextract.io.series.SeriesIndex`.
    """

    name: str
    series: bool

    def matches(self, layer) -> bool:
        """Whether ``layer`` (a recipe ``Layer``) is of this kind."""

    def open(self, name: str, layer, *, resolve: Callable[[str], Path], base_dir: Path) -> Any:
        """Open the layer: a raster source, or a ``SeriesIndex`` for a series kind."""

    def input_files(self, opened: LayerSource) -> list[tuple[str, Path]]:
        """``(role, path)`` of every file the opened layer reads."""

    def describe(self, opened: LayerSource) -> str:
        """One plain sentence naming what the opened layer reads."""


@dataclass(frozen=True, eq=False)
class LayerSource:
    """A layer opened by its kind.

    Attributes
    ----------
    name : str
        The layer's name in the recipe.
    layer : Layer
        The recipe's layer spec.
    source : object
        What the engine reads: a raster source (``RasterSource``,
        ``BandMathSource``, ``ClippedSource``) or a ``SeriesIndex``.
    kind : SourceKind
        The kind that opened it.
    resolve : callable
        The recipe's ``resolve(path_text) -> Path``.
    base_dir : Path
        The recipe's folder; paths in :meth:`describe` are shown relative to it.
    """

    name: str
    layer: Any
    source: Any
    kind: SourceKind
    resolve: Callable[[str], Path]
    base_dir: Path

    @property
    def is_series(self) -> bool:
        """True when :attr:`source` is a series of periods."""
        return self.kind.series

    def input_files(self) -> list[tuple[str, Path]]:
        """Every file the layer reads as ``(role, absolute path)``, in a fixed order.

        Roles: ``layer:<name>`` for one raster, ``layer:<name>.<band>`` for
        each band of band math, ``layer:<name>:<period label>`` for each
        period of a series (a cube lists its one file for every period).
        """
        return self.kind.input_files(self)

    def describe(self) -> str:
        """One plain sentence naming what the layer reads, for the codebook."""
        return self.kind.describe(self)

    def shown(self, path_text) -> str:
        """``path_text`` as :func:`shown_path` shows it for this recipe."""
        return shown_path(path_text, self.base_dir)


def shown_path(path_text, base_dir) -> str:
    """A recipe path as a shared file may show it (no folders outside the recipe's folder).

    Parameters
    ----------
    path_text : str or Path
        The path as the recipe wrote it (may be a template with ``{fields}``).
    base_dir : str or Path
        The recipe's folder.

    Returns
    -------
    str
        With forward slashes: a relative path as written (normalised); an
        absolute path relative to ``base_dir`` when inside it, else its file
        name alone.
    """
    text = os.fspath(path_text)
    path = Path(text).expanduser()
    if not path.is_absolute():
        return Path(os.path.normpath(text)).as_posix()
    rel = os.path.relpath(os.path.abspath(path), os.path.abspath(Path(base_dir)))
    if rel == ".." or rel.startswith(".." + os.sep) or os.path.isabs(rel):
        return path.name
    return Path(rel).as_posix()


def step_adjective(step) -> str:
    """``monthly``, ``yearly``, ``daily``, ``16-day`` for a series' :class:`Step`."""
    if step.unit == "month":
        return "monthly"
    if step.unit == "year":
        return "yearly"
    if step.count == 1:
        return "daily"
    return f"{step.count}-day" + (" (restarting each year)" if step.restart_yearly else "")


def gaps_text(gaps, *, show: int = 5) -> str:
    """``0 gaps``, ``1 gap (2022-05)``, ``7 gaps (2022-01, ..., 2022-05 and 2 more)``."""
    n = len(gaps)
    text = f"{n} gap" + ("" if n == 1 else "s")
    if not n:
        return text
    labels = ", ".join(g.label for g in gaps[:show])
    more = f" and {n - show} more" if n > show else ""
    return f"{text} ({labels}{more})"
