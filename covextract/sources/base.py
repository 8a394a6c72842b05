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
inside the recipe's folder is shown relative to it; a file outside it by its
file name and content hash, as the manifest names it.
"""

from __future__ import annotations

import functools
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
        With forward slashes, the path relative to ``base_dir`` when it lies
        inside it (a relative path as written, normalised). A file outside it
        (absolute, or relative with ``..`` leading out) is shown by its file
        name and content hash, ``rain.tif (sha256 1a2b3c4d5e6f)``, as the
        manifest shows it; a template outside it by its file-name part alone.
    """
    text = os.fspath(path_text)
    path = Path(text).expanduser()
    if not path.is_absolute():
        rel = os.path.normpath(text)
        if rel != ".." and not rel.startswith(".." + os.sep):
            return Path(rel).as_posix()
        path = Path(base_dir) / path
    rel = os.path.relpath(os.path.abspath(path), os.path.abspath(Path(base_dir)))
    if rel == ".." or rel.startswith(".." + os.sep) or os.path.isabs(rel):
        return _outside_name(os.path.abspath(path), os.path.abspath(base_dir))
    return Path(rel).as_posix()


def _outside_name(path: str, base_dir: str) -> str:
    """File name and short content hash of a file outside the recipe's folder."""
    if "{" in Path(path).name or not os.path.isfile(path):
        return Path(path).name
    st = os.stat(path)
    return _shareable(path, base_dir, st.st_size, st.st_mtime_ns)


@functools.lru_cache(maxsize=256)
def _shareable(path: str, base_dir: str, size: int, mtime_ns: int) -> str:
    # size and mtime are in the key so that a changed file is hashed again; every
    # covariate on a layer asks, and hashing reads the whole file
    from covextract.io.paths import shareable_path

    return shareable_path(path, base_dir)


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
