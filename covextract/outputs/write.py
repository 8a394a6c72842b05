"""Write a run's outputs: panel, codebook, table and, last, the manifest.

This is the one place where the output set is written, so the commit of the
whole set as one unit has a single home.
"""

from __future__ import annotations

from covextract.crashpoints import crash_point

__all__ = ["write_outputs"]


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
    from covextract.outputs.codebook import write_codebook
    from covextract.outputs.manifest import write_manifest
    from covextract.outputs.panel import write_panel
    from covextract.outputs.table import table_format, write_table
    outputs = {k: paths[k] for k in ("table", "codebook", "codebook_md", "manifest")}
    written = []
    if "panel" in paths:
        panel = result.panel
        if panel is None:
            import pandas as pd

            panel = pd.DataFrame(columns=[result.id_column, "column", "period_start"])
        files = write_panel(paths["panel"], panel, id_column=result.id_column)
        written += [(f"panel:{p.name}", p) for p in files]
        outputs["panel"] = paths["panel"]
        crash_point("after_panel")
    write_codebook(
        result,
        paths["codebook"],
        markdown_path=paths["codebook_md"],
        title=f"Codebook for {paths['table'].name}",
    )
    crash_point("after_codebook")
    geoms, crs = geometry if table_format(paths["table"]) == "gpkg" else (None, None)
    write_table(result.table, paths["table"], geometry=geoms, crs=crs)
    crash_point("after_table")
    written = [
        ("table", paths["table"]),
        ("codebook", paths["codebook"]),
        ("codebook_md", paths["codebook_md"]),
        *written,
    ]
    if hashes is not None:
        inputs = [{**item, "sha256": hashes(item["path"])} for item in inputs]
    write_manifest(
        paths["manifest"],
        recipe_fingerprint=recipe.fingerprint,
        recipe_file=recipe.source_file,
        inputs=inputs,
        outputs=written,
        layers={k: {n: v for n, v in m.items()} for k, m in result.layers.items()},
        started=started,
        base_dir=recipe.base_dir,
        extra=manifest_extra,
    )
    crash_point("after_manifest")
    return outputs
