"""``refresh`` and ``status``: bring a recipe's outputs up to date, or say how they stand.

A refresh computes only the pieces that are new or changed (see
:mod:`covextract.run.incremental`, shared with ``run``): after a ``run`` a
refresh with nothing new computes nothing.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from pathlib import Path

from covextract.core.progress import Progress
from covextract.run.incremental import (
    LedgerRebuiltWarning,
    RefreshResult,
    execute_incremental,
    gaps_and_next,
    inputs_fingerprint,
    piece_state,
    plan_work,
)
from covextract.state.ledger import LEDGER_NAME, Ledger, LedgerCorruptError

__all__ = [
    "LedgerRebuiltWarning",
    "RefreshResult",
    "RefreshStatus",
    "STATES",
    "refresh",
    "refresh_status",
]


def refresh(
    recipe,
    *,
    progress: Progress | None = None,
    threads: int | None = None,
    scheduler: str | None = None,
    recompute: bool = False,
    overwrite: bool = False,
) -> RefreshResult:
    """Bring the outputs of a recipe up to date, computing only what is due.

    Parameters
    ----------
    recipe : path, dict or Recipe
    progress : Progress, optional
        As for :func:`covextract.run.run`.
    threads, scheduler : optional
        As for :func:`covextract.run.run` (they never change results, so
        they are not part of any fingerprint).
    recompute : bool
        Compute every piece again, whatever the ledger says.
    overwrite : bool
        Replace existing files that covextract did not write.

    Returns
    -------
    RefreshResult

    Raises
    ------
    covextract.state.lock.LockedError
        Another refresh (or run) holds the state folder.
    covextract.state.ledger.LedgerVersionError
        The ledger was written by another covextract version.
    """
    from covextract.run.plan import plan_recipe

    started = dt.datetime.now(dt.timezone.utc)
    plan = plan_recipe(recipe, overwrite=overwrite)
    progress = progress if progress is not None else Progress()
    from covextract.run.execute import note_compiling

    note_compiling(plan, progress)
    return execute_incremental(
        plan,
        started,
        progress=progress,
        threads=threads,
        scheduler=scheduler,
        recompute=recompute,
    )


# ------------------------------------------------------------------ status
STATES = {
    "computed": "computed, file in the state folder",
    "due": "not computed yet (new period, or its inputs or units changed)",
    "missing_on_disk": "in the ledger, but its piece file is gone; computed again",
    "gap": "no input file for this period (a gap inside the series)",
}
"""The states of a period in :class:`RefreshStatus`."""


@dataclass
class RefreshStatus:
    """What ``status`` shows: periods by state, last run, newer inputs, next periods.

    Attributes
    ----------
    layers : dict
        Layer name → list of ``(period label, state)`` in period order
        (states in :data:`STATES`; ``"all"`` is the label of a layer without
        periods). A period is ``computed`` when every covariate on that layer
        has it.
    last_run : covextract.state.ledger.Run or None
    newer_inputs : list of str
        Input files modified after the manifest was written.
    next_expected : dict
        Series layer → label of the period after its last one.
    ledger_problem : str or None
        Why the ledger could not be read (the next refresh rebuilds it).
    state_folder : Path
    outputs_problems : list of str
        Why the outputs on disk are not the complete set their manifest
        describes (a mixed set; the next refresh rewrites them); empty when
        they are, or when nothing was written yet.
    commit_pending : bool
        A run was killed while renaming the outputs into place; the next
        run or refresh completes it.
    """

    layers: dict
    last_run: object
    newer_inputs: list
    next_expected: dict
    ledger_problem: str | None
    state_folder: Path
    outputs_problems: list = field(default_factory=list)
    commit_pending: bool = False


def refresh_status(recipe) -> RefreshStatus:
    """The state of a recipe's refresh, without computing or reading any pixel or changing files.

    Input files whose size or modification time changed since they were last
    hashed are counted as changed (``due``) without being read.
    """
    from covextract.run.plan import input_files, plan_recipe

    plan = plan_recipe(recipe, outputs=False)
    state = Path(plan.output_paths["state"])
    works = plan_work(plan)
    ledger = None
    problem = None
    if (state / LEDGER_NAME).is_file():
        try:
            ledger = Ledger(state)
            ledger.check()
        except LedgerCorruptError as exc:
            problem = str(exc)
            if ledger is not None:
                ledger.close()
            ledger = None
    layers: dict = {}
    last_run = None
    try:
        per_layer: dict = {}
        for work in works:
            states = per_layer.setdefault(work.cov.layer_name, {})
            for task in work.tasks:
                state_name = "due"
                if ledger is not None:
                    # recorded hashes only: status never reads an input file
                    fp = inputs_fingerprint(task, ledger.recorded_hash)
                    state_name = piece_state(ledger, work, task, fp, state)
                key = (task.start, task.label)
                rank = ["computed", "missing_on_disk", "due"]
                old = states.get(key, "computed")
                states[key] = max(old, state_name, key=rank.index)
        for name, states in per_layer.items():
            series = plan.series.get(name)
            for gap in series.gaps if series is not None else []:
                states[(gap.start.isoformat(), gap.label)] = "gap"
            layers[name] = [(label, s) for (_, label), s in sorted(states.items())]
        if ledger is not None:
            last_run = ledger.last_run()
    finally:
        if ledger is not None:
            ledger.close()
    newer = []
    manifest = Path(plan.output_paths["manifest"])
    if manifest.is_file():
        written = manifest.stat().st_mtime_ns
        for item in input_files(plan):
            p = Path(item["path"])
            if p.exists() and p.stat().st_mtime_ns > written:
                newer.append(str(p))
    _, nxt = gaps_and_next(plan)
    from covextract.io.writers import read_journal
    from covextract.outputs.manifest import verify_outputs

    paths = plan.output_paths
    mixed = verify_outputs(manifest, base_dir=plan.recipe.base_dir, panel=paths.get("panel"))
    pending = read_journal(state) is not None
    return RefreshStatus(layers, last_run, newer, nxt, problem, state, mixed, pending)
