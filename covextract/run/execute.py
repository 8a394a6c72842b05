"""Compute a plan's covariates and gather them into a :class:`RunResult`.

``run`` and ``refresh`` both go through :func:`execute`: ``run`` computes
every piece, ``refresh`` only those that are due; both record their pieces in
the same state folder, so after a ``run`` a ``refresh`` with nothing new does
nothing.
"""

from __future__ import annotations

import contextlib
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone

import numpy as np
import pandas as pd

from covextract.core.progress import Progress
from covextract.covariates import ComputeContext, Outcome

__all__ = ["RunResult", "run", "execution_settings", "Assembly", "compute_covariate"]


@dataclass
class RunResult:
    """What a run produced.

    Attributes
    ----------
    table : pandas.DataFrame
        The study table with the new columns appended (``output.drop`` removed).
    columns : list of str
        The new table columns, in order.
    codebook : list of dict
        One row per new column (table and long panel), see
        :data:`covextract.outputs.codebook.CODEBOOK_FIELDS`.
    outputs : dict
        Written files by role (empty with ``write=False``).
    summary : dict
        Counts for the command line's summary.
    panel : pandas.DataFrame or None
        The long panel (``<id>``, column, period_start, period_end, value, qa).
    units : dict
        The unit sets (ids, geometries in their own CRS, QA) by unit key.
    layers : dict
        Per layer: grid metadata, unit, what it reads (``reads``), its band-math
        index (``index``, empty for none) and the recipe's source, version,
        citation, license.
    id_column : str
        The study's id column name.
    """

    table: pd.DataFrame
    columns: list[str]
    codebook: list[dict]
    outputs: dict
    summary: dict
    panel: pd.DataFrame | None = None
    units: dict = field(default_factory=dict)
    layers: dict = field(default_factory=dict)
    id_column: str = "id"


@contextlib.contextmanager
def execution_settings(recipe, threads=None, scheduler=None):
    """``(threads, client)`` of a run: arguments first, then the recipe's ``execution``.

    ``client`` is a connected dask.distributed client when a scheduler is set
    (closed on exit), else None.
    """
    execution = getattr(recipe, "execution", None)
    threads = threads if threads is not None else getattr(execution, "threads", None)
    scheduler = scheduler if scheduler is not None else getattr(execution, "scheduler", None)
    client = None
    if scheduler:
        from covextract.engine.cluster import connect

        client = connect(scheduler)
    try:
        yield threads, client
    finally:
        if client is not None:
            client.close()


def _blocks(cov, plan) -> int:
    from covextract.engine.zonal import estimate_entries

    src = cov.source(plan)
    geoms = plan.unit_sets[cov.unit_key].to_crs(src.grid.crs)
    est = int(estimate_entries(geoms, src.grid).sum())
    return len(src.grid.block_windows()) if est else 0


def compute_covariate(
    plan, cov, cache, *, progress: Progress, threads=None, client=None, period_values=None
) -> Outcome:
    """Compute one covariate of a plan, reporting its blocks to ``progress``."""
    progress.start(
        f"{cov.qa_column[:-3] or cov.prefix} (layer {cov.layer_name})", _blocks(cov, plan)
    )
    ctx = ComputeContext(
        plan,
        cache,
        threads=threads,
        client=client,
        advance=progress.advance,
        period_values=period_values,
    )
    try:
        return cov.compute(ctx)
    finally:
        progress.finish()


class Assembly:
    """Collects covariate outcomes in plan order and turns them into a :class:`RunResult`."""

    def __init__(self, plan) -> None:
        self.plan = plan
        self.values: dict = {}
        self.codebook: list[dict] = []
        self.qa_counts: dict = {}
        self.n_missing: dict = {}
        self.weights_built = 0
        self.workers: set = set()
        self.learnt: dict = {}
        self.panels: list = []

    def add(self, cov, outcome: Outcome) -> None:
        """Add one covariate's outcome (computed now or loaded from the state folder)."""
        units = self.plan.unit_sets[cov.unit_key]
        cov.warn(outcome, len(units), units.qa)
        self.values.update(outcome.values)
        if outcome.panel is not None:
            self.panels.append(outcome.panel)
        self.weights_built += outcome.weights_builds
        self.workers |= outcome.workers
        if outcome.learnt:
            self.learnt[cov.prefix] = outcome.learnt
        qa = [
            ";".join(dict.fromkeys(list(u) + list(z)))
            for u, z in zip(units.qa, outcome.qa, strict=True)
        ]
        if cov.qa_column:
            self.values[cov.qa_column] = qa
        self.n_missing[cov.prefix] = int(np.sum(np.asarray(outcome.valid_share) == 0))
        for q in qa:
            for code in filter(None, q.split(";")):
                self.qa_counts[code] = self.qa_counts.get(code, 0) + 1
        self.codebook.extend(cov.describe(self.plan, outcome.learnt))

    def finish(self, *, cache) -> RunResult:
        """The result: the augmented table, the panel, the codebook and the summary."""
        from covextract.outputs.table import augment_table

        plan, recipe = self.plan, self.plan.recipe
        frame = plan.table.frame
        # Numbers stay numbers in the returned table and in Parquet/GeoPackage outputs;
        # write_table turns them into round-trip text only for a CSV file.
        augmented = augment_table(frame, self.values, as_text=False)
        drop = [c for c in recipe.output.drop if c in augmented.columns]
        written = augmented.drop(columns=drop)
        id_column = recipe.study.id
        panel = None
        if self.panels:
            panel = pd.concat(self.panels, ignore_index=True).rename(columns={"unit": id_column})
        layers = {
            name: {
                "crs": src.grid.crs.to_string(),
                "width": src.grid.width,
                "height": src.grid.height,
                "transform": list(src.grid.transform)[:6],
                "area_varies": bool(src.grid.area_varies),
                "unit": recipe.layers[name].unit or "",
                # what the layer reads (no private folders) and its band-math index, for the
                # codebook's layer summary and the methods paragraph's references
                "reads": plan.layers[name].describe(),
                "index": recipe.layers[name].index or "",
                "source": recipe.layers[name].source or "",
                "version": recipe.layers[name].version or "",
                "citation": recipe.layers[name].citation or "",
                "license": recipe.layers[name].license or "",
            }
            for name, src in plan.sources.items()
        }
        table_columns = list(self.values)
        summary = {
            "units": len(frame),
            "layers": sorted({c.layer_name for c in plan.covariates}),
            "columns": table_columns,
            "value_columns": [c for c in table_columns if not c.endswith("_qa")],
            "qa_columns": [c.qa_column for c in plan.covariates if c.qa_column],
            "panel_columns": [
                col.name for c in plan.covariates for col in c.columns if col.where == "panel"
            ],
            "units_without_values": self.n_missing,
            "qa_counts": self.qa_counts,
            "weights_built": self.weights_built,
            "weights_loaded": getattr(cache, "loaded", getattr(cache, "hits", 0)),
            "weights_reused": getattr(cache, "reused", 0),
            "weights_from_cache": getattr(cache, "hits", 0),
            "workers": sorted(self.workers),
            "proxy_fits": {k: v["fit"] for k, v in self.learnt.items() if v.get("fit")},
        }
        return RunResult(
            written,
            table_columns,
            self.codebook,
            {},
            summary,
            panel=panel,
            units=dict(plan.unit_sets),
            layers=layers,
            id_column=id_column,
        )


def run(
    recipe,
    *,
    write: bool = True,
    progress: Progress | None = None,
    threads: int | None = None,
    scheduler: str | None = None,
    overwrite: bool = False,
) -> RunResult:
    """Compute every covariate of a recipe; write the outputs unless ``write=False``.

    Parameters
    ----------
    recipe : path, dict or Recipe
        The recipe (a YAML path, a dict, or a loaded recipe).
    write : bool
        Write the table, codebook, panel and manifest (atomically, manifest
        last) and record every computed piece in the state folder, so that a
        later ``refresh`` computes only what is new.
    progress : Progress, optional
        Receives progress events (see :class:`covextract.core.progress.Progress`);
        the command line passes one that draws a bar or prints log lines.
    threads : int, optional
        Local threads for block tasks (overrides ``execution.threads``).
    scheduler : str, optional
        Address of a running dask.distributed scheduler (``tcp://HOST:PORT``;
        overrides ``execution.scheduler``). Workers must see the same paths.
    overwrite : bool
        Replace existing files that covextract did not write (an output path
        that names an input is refused whatever this says).

    Returns
    -------
    RunResult
        ``result.table`` is the study table with the new columns appended.
    """
    from covextract.run.plan import plan_recipe

    progress = progress if progress is not None else Progress()
    started = datetime.now(timezone.utc)
    clock = time.perf_counter()
    plan = plan_recipe(recipe, outputs=write, overwrite=overwrite)
    note_compiling(plan, progress)
    if write:
        from covextract.run.incremental import execute_incremental

        result = execute_incremental(
            plan,
            started,
            progress=progress,
            threads=threads,
            scheduler=scheduler,
            recompute=True,
            skip_when_current=False,
        ).run
    else:
        from covextract.state.cache import WeightCache

        cache = WeightCache(None)
        with execution_settings(plan.recipe, threads, scheduler) as (threads, client):
            assembly = Assembly(plan)
            for cov in plan.covariates:
                outcome = compute_covariate(
                    plan, cov, cache, progress=progress, threads=threads, client=client
                )
                assembly.add(cov, outcome)
            result = assembly.finish(cache=cache)
    result.summary["seconds"] = round(time.perf_counter() - clock, 3)
    return result


def note_compiling(plan, progress: Progress) -> None:
    from covextract.engine.compile_state import kernels_need_compiling

    if kernels_need_compiling({c.rule for c in plan.covariates}):
        progress.note(
            "compiling the engine's kernels once for this installation (about 15 s; later "
            "runs skip this)"
        )
