"""Write a run's outputs: panel, codebook, table and, last, the manifest, as one unit.

This is the one place where the output set is written. Every writer stages
its files (temporaries in the final folders, the panel as a new sibling
folder); then :class:`~covextract.io.writers.Commit` renames them in the
order of :data:`WRITERS`, the manifest last, behind a journal in the state
folder (see DEVELOPERS.md, "Committing the outputs"). Each writer declares
its paths (:meth:`Writer.targets`), so :mod:`covextract.outputs.guard`
checks a new output without being told.
"""

from __future__ import annotations

import contextlib
import os
from dataclasses import dataclass
from pathlib import Path

from covextract.crashpoints import crash_point
from covextract.io.writers import Commit, WriteFailedError, fsync_dir

__all__ = ["WRITERS", "Writer", "WriteContext", "write_outputs"]


def _link(old: Path, new: Path) -> bool:
    """Hard-link an unchanged period file into the new panel folder (False if impossible)."""
    try:
        os.link(old, new)
    except OSError:
        return False
    return True


@dataclass
class WriteContext:
    """Where the outputs go (paths by role) and the records' geometries for a GeoPackage."""

    paths: dict
    geometry: tuple | None = None
    commit: object = None


class Writer:
    """One output of a :class:`~covextract.run.RunResult`, written atomically.

    ``name`` is the role of its path in the recipe's output paths;
    :meth:`write` returns ``(role, path)`` of every file it wrote, which the
    manifest fingerprints. A new output (a report) is one more subclass in
    :data:`WRITERS`; the run does not change.
    """

    name = "output"

    def targets(self, paths: dict) -> list:
        """The paths this writer writes, as :class:`~covextract.outputs.guard.Target` objects."""
        from covextract.outputs.guard import Target

        return [Target(f"output.{self.name}", f"output.{self.name}", Path(paths[self.name]))]

    def wanted(self, ctx: WriteContext) -> bool:
        """True when the recipe asks for this output."""
        return self.name in ctx.paths

    def write(self, result, ctx: WriteContext) -> list:
        """Write the output (atomic writes, staged by the commit).

        Returns ``(role, final path, staged path)`` of each file written.
        """
        raise NotImplementedError


class PanelWriter(Writer):
    """The long panel: one Parquet file per period (``output.panel``)."""

    name = "panel"

    def targets(self, paths):
        from covextract.outputs.guard import Target

        return [Target("output.panel", "output.panel", Path(paths["panel"]), "folder")]

    def write(self, result, ctx):
        """Write the panel into a new folder that the commit switches in by one rename.

        A period file whose bytes do not change is linked from the present
        folder (same file, same modification time), not written again.
        """
        import pandas as pd

        from covextract.outputs.panel import panel_parts

        panel = result.panel
        if panel is None:
            panel = pd.DataFrame(columns=[result.id_column, "column", "period_start"])
        final = Path(ctx.paths["panel"])
        staged = ctx.commit.stage_folder(final)
        out = []
        for name, data in panel_parts(panel, id_column=result.id_column):
            old, new = final / name, staged / name
            if not (old.is_file() and old.read_bytes() == data and _link(old, new)):
                with open(new, "wb") as fh:
                    fh.write(data)
                    fh.flush()
                    os.fsync(fh.fileno())
            out.append((f"panel:{name}", final / name, new))
        fsync_dir(staged)
        return out


class CodebookWriter(Writer):
    """The codebook, as CSV and Markdown."""

    name = "codebook"

    def targets(self, paths):
        from covextract.outputs.guard import Target

        return [
            Target(
                "output.codebook", "output.codebook", Path(paths["codebook"]), "file", (".csv",)
            ),
            Target(
                "output.codebook",
                "output.codebook's Markdown copy",
                Path(paths["codebook_md"]),
                "file",
                (".md",),
            ),
        ]

    def write(self, result, ctx):
        from covextract.outputs.codebook import write_codebook

        paths = ctx.paths
        write_codebook(
            result,
            paths["codebook"],
            markdown_path=paths["codebook_md"],
            title=f"Codebook for {paths['table'].name}",
        )
        return [
            (role, paths[role], ctx.commit.staged_path(paths[role]))
            for role in ("codebook", "codebook_md")
        ]


class TableWriter(Writer):
    """The study table with the new columns (CSV, Parquet or GeoPackage)."""

    name = "table"

    def write(self, result, ctx):
        from covextract.outputs.table import table_format, write_table

        path = ctx.paths["table"]
        geoms, crs = ctx.geometry if table_format(path) == "gpkg" else (None, None)
        write_table(result.table, path, geometry=geoms, crs=crs)
        return [("table", path, ctx.commit.staged_path(path))]


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
    from covextract.io.writers import COMMIT_JOURNAL
    from covextract.outputs.guard import shown_path
    from covextract.outputs.manifest import write_manifest

    commit = Commit(Path(paths["state"]) / COMMIT_JOURNAL)
    ctx = WriteContext(paths, geometry, commit)
    outputs = {k: paths[k] for k in ("table", "codebook", "codebook_md", "manifest")}
    written = []
    try:
        with commit.staging():
            for writer in WRITERS:
                if writer.wanted(ctx):
                    written += writer.write(result, ctx)
                    crash_point(f"after_{writer.name}")
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
        crash_point("after_staging")
        from covextract.io.paths import file_sha256

        owned = [
            {"path": str(final), "sha256": file_sha256(staged)} for _, final, staged in written
        ]
        owned.append(
            {
                "path": str(paths["manifest"]),
                "sha256": file_sha256(commit.staged_path(paths["manifest"])),
            }
        )
        commit.commit(owned)
    except WriteFailedError as exc:
        if not commit.started:
            commit.abort()
        raise exc.shown_as(shown_path(exc.path, recipe.base_dir)) from None
    except OSError as exc:
        from covextract.io.writers import disk_reason

        if disk_reason(exc) is None or isinstance(exc, WriteFailedError):
            with contextlib.suppress(OSError):
                if not commit.started:
                    commit.abort()
            raise
        intact = not commit.started
        if intact:
            commit.abort()
        where = exc.filename or paths["table"]
        raise WriteFailedError(
            where, exc, shown=shown_path(where, recipe.base_dir), intact=intact
        ) from None
    except BaseException:
        if not commit.started:
            with contextlib.suppress(OSError):
                commit.abort()
        raise
    outputs.update({w.name: paths[w.name] for w in WRITERS if w.wanted(ctx)})
    crash_point("after_manifest")
    return outputs
