"""Shared outputs that keep exact locations get a warning.

A study table's coordinates are often the most confidential thing in it: a
point is a household or a village, and a circle drawn around a point gives
the point back (its centre). Outputs are written to be shared, so covextract
warns when one keeps exact coordinate columns or writes point geometries, and
says how to leave them out. ``output: {keep_coordinates: true}`` says the
outputs stay with the confidential data on purpose, and silences the warning.
"""

from __future__ import annotations

import warnings

from covextract.core.messages import user_stacklevel
from covextract.errors import CoordinatesKeptWarning

__all__ = ["coordinates_kept", "warn_if_coordinates_kept"]


def _point_geometries(geometry) -> bool:
    """True when any geometry is a point or multipoint (it gives a location back)."""
    for g in geometry:
        if g is not None and getattr(g, "geom_type", "") in ("Point", "MultiPoint"):
            return True
    return False


def coordinates_kept(recipe, table, table_path) -> str:
    """Why the output table reveals exact locations, or ``""`` when it does not.

    Parameters
    ----------
    recipe : Recipe
        The validated recipe (``study.points``, ``output.drop``,
        ``output.keep_coordinates``).
    table : StudyTable
        The study table as read.
    table_path : pathlib.Path
        Where the output table is written (its suffix picks the format).
    """
    from covextract.outputs.table import table_format

    out = recipe.output
    if out.keep_coordinates:
        return ""
    name = table_path.name
    silence = "or set output: {keep_coordinates: true} if the outputs stay with the study data"
    p = recipe.study.points
    fmt = table_format(table_path)
    if fmt == "gpkg":
        if table.geometry is not None:
            if not _point_geometries(table.geometry):
                return ""
            what = "the study table's point geometries"
        elif p is not None:
            what = f"each record's point (from {p.x}, {p.y}) as its geometry"
        else:
            return ""
        return (
            f"output.table {name} is a GeoPackage that writes {what}: exact locations of the "
            "study records, to anyone the table is shared with. Write .csv or .parquet "
            f"(with output: {{drop: [{p.x}, {p.y}]}}) to share it without locations, "
            f"{silence}."
            if p is not None
            else f"output.table {name} is a GeoPackage that writes {what}: exact locations of "
            "the study records, to anyone the table is shared with. Write .csv or .parquet "
            f"to share it without locations, {silence}."
        )
    if p is None:
        return ""
    kept = [c for c in (p.x, p.y) if c not in set(out.drop) and c in table.frame.columns]
    if not kept:
        return ""
    return (
        f"output.table {name} keeps the exact coordinate column(s) {', '.join(kept)} "
        "(study.points): anyone the table is shared with can place every record. Add "
        f"output: {{drop: [{', '.join(kept)}]}} to leave them out, {silence}."
    )


def warn_if_coordinates_kept(recipe, table, table_path) -> None:
    """Emit :class:`CoordinatesKeptWarning` when the output table reveals exact locations."""
    text = coordinates_kept(recipe, table, table_path)
    if text:
        warnings.warn(text, CoordinatesKeptWarning, stacklevel=user_stacklevel())
