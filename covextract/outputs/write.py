"""Write a run's outputs: panel, codebook, table and, last, the manifest.

This is the one place where the output set is written, so the commit of the
whole set as one unit has a single home.
"""

from __future__ import annotations

from dataclasses import dataclass

from covextract.crashpoints import crash_point

__all__ = ["WRITERS", "Writer", "WriteContext", "write_outputs"]


@dataclass
class WriteContext:
    """Where the outputs go (paths by role) and the records' geometries for a GeoPackage."""

    paths: dict
    geometry: tuple | None = None


class Writer:
    """One output of a :class:`~covextract.run.RunResult`, written atomically.

    ``name`` is the role of its path in the recipe's output paths;
    :meth:`write` returns ``(role, path)`` of every file it wrote, which the
    manifest fingerprints. A new output (a report) is one more subclass in
    :data:`WRITERS`; the run does not change.
    """

    name = "output"

    def wanted(self, ctx: WriteContext) -> bool:
        """True when the recipe asks for this output."""
        return self.name in ctx.paths

    def write(self, result, ctx: WriteContext) -> list:
        """Write the output; return ``(role, path)`` of each file written."""
        raise NotImplementedError


class PanelWriter(Writer):
    """The long panel: one Parquet file per period (``output.panel``)."""

    name = "panel"

    def write(self, result, ctx):
        import pandas as pd

        from covextract.outputs.panel import write_panel

        panel = result.panel
        if panel is None:
            panel = pd.DataFrame(columns=[result.id_column, "column", "period_start"])
        files = write_panel(ctx.paths["panel"], panel, id_column=result.id_column)
        return [(f"panel:{p.name}", p) for p in files]


class CodebookWriter(Writer):
    """The codebook, as CSV and Markdown."""

    name = "codebook"

    def write(self, result, ctx):
        from covextract.outputs.codebook import write_codebook

        paths = ctx.paths
        write_codebook(
            result,
            paths["codebook"],
            markdown_path=paths["codebook_md"],
            title=f"Codebook for {paths['table'].name}",
        )
        return [("codebook", paths["codebook"]), ("codebook_md", paths["codebook_md"])]


class TableWriter(Writer):
    """The study table with the new columns (CSV, Parquet or GeoPackage)."""

    name = "table"

    def write(self, result, ctx):
        from covextract.outputs.table import table_format, write_table

        path = ctx.paths["table"]
        geoms, crs = ctx.geometry if table_format(path) == "gpkg" else (None, None)
        write_table(result.table, path, geometry=geoms, crs=crs)
        return [("table", path)]


#: The outputs, in the order they are written; the manifest follows them all.
WRITERS: list[Writer] = [PanelWriter(), CodebookWriter(), TableWriter()]


def write_outputs(
    result, paths, recipe, started, *, inputs, geometry=None, manifest_extra=None, hashes=None
) -> dict:
    """Write every output of ``result`` (each file atomically, the manifest last).

    Parameters
    ----------
    result : RunResult
    paths : dict
        Output paths by role (``table``, ``codebook``, ``codebook_md``,
        ``manifest``, optional ``panel``).
    recipe : Recipe
        For its fingerprint, file and folder (the manifest's paths are relative to it).
    started : datetime
        When the run started (UTC).
    manifest_extra : dict, optional
        More top-level entries of the manifest (the refresh's fingerprint).
    inputs : list of dict
        ``{"role", "path"}`` of every input file.
    geometry : (list, crs), optional
        Record geometries for a GeoPackage table.
    hashes : callable, optional
        ``hashes(path) -> sha256`` supplying known input fingerprints (the
        ledger keeps them, so unchanged inputs are not read again).

    Returns
    -------
    dict
        The written files by role.
    """
    from covextract.outputs.manifest import write_manifest

    ctx = WriteContext(paths, geometry)
    outputs = {k: paths[k] for k in ("table", "codebook", "codebook_md", "manifest")}
    written = []
    for writer in WRITERS:
        if writer.wanted(ctx):
            written += writer.write(result, ctx)
            crash_point(f"after_{writer.name}")
    outputs.update({w.name: paths[w.name] for w in WRITERS if w.wanted(ctx)})
    if hashes is not None:
        inputs = [{**item, "sha256": hashes(item["path"])} for item in inputs]
    write_manifest(
        paths["manifest"],
        recipe_fingerprint=recipe.fingerprint,
        recipe_file=recipe.source_file,
        inputs=inputs,
        outputs=written,
        layers=result.layers,
        started=started,
        base_dir=recipe.base_dir,
        extra=manifest_extra,
    )
    crash_point("after_manifest")
    return outputs
