"""The registry of layer source kinds, and :func:`open_source`, which picks one per layer.

Every kind is one small class implementing
:class:`~covextract.sources.base.SourceKind`; :data:`KINDS` lists them. A new
kind of source (a catalogue, a Zarr store) is one module with one such class,
added to :data:`KINDS`. The kinds' ``matches`` must not overlap: exactly one
kind opens any layer.
"""

from __future__ import annotations

from pathlib import Path

from covextract.errors import RecipeError, RecipeProblem
from covextract.sources.bandmath import BandMathKind
from covextract.sources.base import LayerSource, SourceKind
from covextract.sources.cube import NetCDFCubeKind
from covextract.sources.raster import RasterFileKind
from covextract.sources.template import TemplateSeriesKind

__all__ = ["KINDS", "kind_of", "open_source"]

#: Every kind of layer source, tried in this order.
KINDS: list[SourceKind] = [
    RasterFileKind(),
    BandMathKind(),
    TemplateSeriesKind(),
    NetCDFCubeKind(),
]


def kind_of(name: str, layer) -> SourceKind:
    """The one kind of source that reads ``layer``.

    Raises
    ------
    RecipeError
        No kind matches the layer, or (a fault of the registry) several do.
    """
    found = [k for k in KINDS if k.matches(layer)]
    if len(found) == 1:
        return found[0]
    if not found:
        raise RecipeError(
            [
                RecipeProblem(
                    f"layer {name!r} names no source covextract can read: give file: (one "
                    "raster, or a path template with date fields and every: for a series), "
                    "file: with variable: (a NetCDF cube), or bands: with index: or "
                    "expression: (band math)",
                    key=f"layers.{name}",
                )
            ]
        )
    kinds = ", ".join(k.name for k in found)
    raise RecipeError(
        [
            RecipeProblem(
                f"layer {name!r} fits several kinds of source ({kinds}); keep only the keys "
                "of one of them",
                key=f"layers.{name}",
            )
        ]
    )


def open_source(name: str, layer, *, resolve, base_dir) -> LayerSource:
    """Open a recipe layer with the kind of source it names.

    Parameters
    ----------
    name : str
        The layer's name in the recipe (for roles, messages and descriptions).
    layer : Layer
        The recipe's layer spec.
    resolve : callable
        ``resolve(path_text) -> Path``: a recipe path made absolute (the
        recipe's ``resolve``).
    base_dir : str or Path
        The recipe's folder: path templates start there, and descriptions
        show paths relative to it.

    Returns
    -------
    LayerSource
        ``.source`` is what the engine reads (a raster source, or a
        ``SeriesIndex`` when ``.is_series``); ``.input_files()`` and
        ``.describe()`` say what it reads.

    Raises
    ------
    RecipeError
        No kind of source matches the layer (the message names the layer),
        or its expression is not valid.
    CovextractError
        The kind's own errors: a missing or unreadable file, no file matching
        a template, a cube without a time axis, bands on different grids.
    """
    kind = kind_of(name, layer)
    base_dir = Path(base_dir)
    source = kind.open(name, layer, resolve=resolve, base_dir=base_dir)
    return LayerSource(name, layer, source, kind, resolve, base_dir)
