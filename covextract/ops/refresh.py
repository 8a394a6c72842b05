"""``refresh``: compute only what is new or changed, then rebuild the outputs atomically.

A refresh splits a recipe into *pieces* (:mod:`covextract.ops.pieces`): one
per period for a covariate on a series layer (its per-period statistics; the
windows, anomalies and trends are derived from them again on every refresh,
which is cheap), one for any other covariate. A piece is due when the ledger
has no row for it, when the content of its input files or its unit set
changed, or when its file is missing. Due pieces are computed (weights come
from the cache), written atomically into the state folder, and then the
table, codebook, panel and manifest are rebuilt from all pieces, each renamed
into place; only after that are the new pieces committed to the ledger.

What is fingerprinted
---------------------
- Covariate (the ledger's ``covariate_fingerprint``): for a series covariate
  the layer definition and what the per-period statistics depend on (unit
  shape, statistics, pixel rule, area weighting, threshold); windows,
  anomalies and trends are left out, so changing a window recomputes no
  pixel. For other covariates the whole recipe entry and its layer
  definitions. The covextract version is part of both: results of another
  version are never mixed into one table. Execution settings (threads,
  scheduler) are not.
- Inputs: the SHA-256 of each input file's bytes, kept in the ledger with the
  file's size and modification time so unchanged files are not read again.
  One NetCDF cube is one file: rewriting it makes all its periods due.
- Units: :meth:`covextract.units.UnitSet.fingerprint`. New or changed units
  recompute every piece of the covariates on that unit set, not just the new
  units: units are reduced together, and only that keeps a refreshed table
  bit-identical to a full run.

Safety
------
One refresh at a time (:class:`~covextract.ops.lock.StateLock`). A refresh
killed at any point leaves every output file complete (the old one or the new
one) and the ledger without the rows of the unfinished run, so the next
refresh computes those pieces again. The manifest, written last, records a
fingerprint of everything the outputs were built from; a refresh with nothing
due and a matching manifest does nothing.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import json
import os
import re
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from covextract.crashpoints import crash_point
from covextract.errors import CovextractWarning
from covextract.ops.ledger import LEDGER_NAME, Ledger, LedgerCorruptError, LedgerVersionError
from covextract.ops.ledger import fingerprint as _fingerprint
from covextract.ops.lock import EXIT_CODES, StateLock
from covextract.ops.pieces import (
    PIECES_DIR,
    STATIC,
    PieceError,
    PieceWarning,
    ledger_rows_from_pieces,
    piece_path,
    read_period_piece,
    read_static_piece,
    write_period_piece,
    write_static_piece,
)

__all__ = [
    "LedgerRebuiltWarning",
    "RefreshResult",
    "RefreshStatus",
    "refresh",
    "refresh_status",
    "open_ledger",
    "plan_work",
]


class LedgerRebuiltWarning(CovextractWarning):
    """The ledger was unreadable and has been rebuilt from the pieces in the state folder."""


# ------------------------------------------------------------------ the work
@dataclass
class PieceTask:
    """One piece of a covariate: a period of its series, or the whole covariate."""

    start: str
    end: str
    label: str
    inputs: list  # [(role, path)]
    period: object = None


@dataclass
class CovariateWork:
    """The pieces of one covariate and the fingerprints they are filed under."""

    cp: object
    fingerprint: str
    units_fp: str
    per_period: bool
    tasks: list


def _layer_definition(recipe, name) -> dict:
    return recipe.layers[name].model_dump(mode="json")


def plan_work(plan) -> list[CovariateWork]:
    """The pieces of every covariate of a plan, with their covariate fingerprints."""
    from covextract import __version__
    from covextract.pipeline import timed_periods

    recipe = plan.recipe
    works = []
    for cp in plan.covariates:
        units = plan.unit_sets[cp.unit_key]
        base = {
            "covextract": __version__,
            "layer": _layer_definition(recipe, cp.layer_name),
            "units": list(cp.unit_key),
            "rule": cp.rule,
            "area_weighting": cp.area_weighting,
            "threshold": cp.threshold,
        }
        t = cp.timed
        if t is not None and t["kind"] != "change":
            series = t["series"]
            fp = _fingerprint(
                {**base, "kind": "period statistics", "stats": [s.name for s in cp.stats]}
            )
            tasks = [
                PieceTask(
                    start=p.start.isoformat(),
                    end=p.end.isoformat(),
                    label=p.label,
                    inputs=[(f"layer:{cp.layer_name}:{p.label}", series.path(p))],
                    period=p,
                )
                for p in timed_periods(cp)
            ]
            works.append(CovariateWork(cp, fp, units.fingerprint(), True, tasks))
            continue
        entry = {**base, "kind": "whole", "entry": cp.spec.model_dump(mode="json")}
        if t is not None:  # change between two selections of a series
            series = t["series"]
            inputs = [
                (f"layer:{cp.layer_name}:{p.label}", series.path(p))
                for p in [*t["earlier"], *t["periods"]]
            ]
        else:
            inputs = plan.layers[cp.layer_name].input_files()
        weight_by = getattr(cp.spec, "weight_by", None)
        if weight_by:
            entry["weight_by"] = _layer_definition(recipe, weight_by)
            inputs += plan.layers[weight_by].input_files()
        if cp.proxy is not None:
            spec = getattr(cp.spec, "reallocate", None)
            if spec is not None:
                inputs += [
                    ("zones", recipe.resolve(spec.zones.file)),
                    ("totals", recipe.resolve(spec.totals.file)),
                ]
            else:  # the known counts come from the study table
                inputs.append(("study_table", plan.table.path))
        task = PieceTask(start=STATIC, end=STATIC, label="all", inputs=inputs)
        works.append(CovariateWork(cp, _fingerprint(entry), units.fingerprint(), False, [task]))
    return works


# ------------------------------------------------------------------ results
@dataclass
class RefreshResult:
    """What a refresh did.

    Attributes
    ----------
    status : str
        A key of :data:`~covextract.ops.lock.EXIT_CODES`: ``success``,
        ``nothing_to_do`` or ``partial`` (computed what it could; some
        expected inputs are missing: gaps inside a series).
    computed : dict
        Covariate prefix → labels of the pieces computed (periods, or
        ``"all"`` for a covariate without periods).
    reused : dict
        Covariate prefix → number of pieces taken from the state folder.
    missing : dict
        Series layer → labels of the periods missing inside its span.
    next_expected : dict
        Series layer → label of the period after its last one.
    outputs_written : bool
        Whether the table, codebook, panel and manifest were rewritten.
    run : RunResult or None
        The table and codebook (None when there was nothing to do).
    notes : list of str
        Recoveries made on the way (rebuilt ledger, unreadable pieces).
    """

    status: str
    computed: dict
    reused: dict
    missing: dict
    next_expected: dict
    outputs_written: bool
    run: object = None
    notes: list = field(default_factory=list)

    @property
    def exit_code(self) -> int:
        """The documented exit status of the command line for this result."""
        return EXIT_CODES[self.status]

    def summary(self) -> dict:
        """A JSON-able summary (stored with the run in the ledger)."""
        return {
            "status": self.status,
            "computed": self.computed,
            "reused": self.reused,
            "missing": self.missing,
            "next_expected": self.next_expected,
            "outputs_written": self.outputs_written,
            "notes": self.notes,
        }


# ------------------------------------------------------------------ ledger
def open_ledger(state_folder) -> tuple[Ledger, str | None]:
    """Open and check the ledger; rebuild it from the pieces if it is corrupt.

    Returns
    -------
    (Ledger, str or None)
        The open ledger and, when it had to be rebuilt, what was done (also
        issued as a :class:`LedgerRebuiltWarning`). The broken file is kept
        beside it as ``ledger.sqlite.broken-<UTC time>``: nothing is lost.

    Raises
    ------
    LedgerVersionError
        The ledger was written by another covextract (another schema
        version): never rebuilt silently.
    """
    state_folder = Path(state_folder)
    try:
        ledger = Ledger(state_folder)
        try:
            ledger.check()
        except BaseException:
            ledger.close()
            raise
        return ledger, None
    except LedgerVersionError:
        raise
    except LedgerCorruptError as exc:
        path = state_folder / LEDGER_NAME
        stamp = dt.datetime.now(dt.timezone.utc).strftime("%Y%m%dT%H%M%SZ")
        broken = path.with_name(f"{path.name}.broken-{stamp}")
        os.replace(path, broken)
        rows, bad = ledger_rows_from_pieces(state_folder)
        Ledger.rebuild(path, rows)
        note = (
            f"the ledger {path} was unreadable ({exc.__class__.__name__}); it was rebuilt from "
            f"{len(rows)} piece file(s) in the state folder and the broken file kept as "
            f"{broken.name}"
            + (f"; {len(bad)} unreadable piece(s) will be computed again" if bad else "")
        )
        warnings.warn(note, LedgerRebuiltWarning, stacklevel=3)
        return Ledger(state_folder), note


def _inputs_fp(task, hashes) -> str | None:
    """Fingerprint of a piece's input files (None when ``hashes`` does not know one)."""
    known = [hashes(path) for _, path in task.inputs]
    if any(h is None for h in known):
        return None
    return _fingerprint([[role, h] for (role, _), h in zip(task.inputs, known, strict=True)])


def _row(work, task, inputs_fp, state) -> dict:
    return {
        "covariate_fingerprint": work.fingerprint,
        "period_start": task.start,
        "period_end": task.end,
        "inputs_fingerprint": inputs_fp,
        "units_fingerprint": work.units_fp,
        "output_file": str(piece_path(state, work.fingerprint, task.start).relative_to(state)),
    }


def _piece_state(ledger, work, task, inputs_fp, state) -> str:
    """``computed``, ``missing_on_disk`` (recorded, file gone) or ``due`` (see :data:`STATES`)."""
    row = ledger.done(work.fingerprint, task.start)
    if (
        inputs_fp is None
        or row is None
        or row.inputs_fingerprint != inputs_fp
        or row.units_fingerprint != work.units_fp
    ):
        return "due"
    exists = piece_path(state, work.fingerprint, task.start).is_file()
    return "computed" if exists else "missing_on_disk"


def _gaps_and_next(plan) -> tuple[dict, dict]:
    missing, nxt = {}, {}
    used = {cp.layer_name for cp in plan.covariates}
    for name, series in plan.series.items():
        if name not in used or not series.periods:
            continue
        if series.gaps:
            missing[name] = [g.label for g in series.gaps]
        last = series.periods[-1]
        nxt[name] = series.step.period(series.step.next_start(last.start)).label
    return missing, nxt


def _outputs_current(plan, outputs_fp: str) -> bool:
    from covextract.outputs.manifest import file_sha256

    manifest = plan.output_paths["manifest"]
    try:
        doc = json.loads(Path(manifest).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    if (doc.get("refresh") or {}).get("outputs_fingerprint") != outputs_fp:
        return False
    for item in doc.get("outputs", []):
        p = Path(item["path"])
        if not p.exists() or file_sha256(p) != item.get("sha256"):
            return False
    return True


class _Pieces:
    """Loads the pieces that are done, computes and writes the due ones, one covariate at a time.

    Call :meth:`begin` for a covariate, then :meth:`period_values` (given to
    :func:`~covextract.pipeline.compute_covariate`) or :meth:`static_outcome`
    / :meth:`store_static`, then :meth:`end`.
    """

    def __init__(self, plan, state: Path) -> None:
        self.plan, self.state = plan, state
        self.new_rows: list[dict] = []
        self.computed: dict = {}
        self.reused: dict = {}
        self.notes: list = []
        # (fingerprint, period start) -> (values, qa) computed by this refresh: two
        # covariates with the same per-period statistics share their pieces
        self._fresh: dict = {}

    def begin(self, work, decided) -> None:
        self.work, self.decided = work, decided
        self.ids = self.plan.unit_sets[work.cp.unit_key].ids
        self.done_here: list = []

    def end(self) -> None:
        prefix = self.work.cp.prefix
        if self.done_here:
            self.computed[prefix] = self.done_here
        self.reused[prefix] = len(self.work.tasks) - len(self.done_here)

    def _load(self, task, read):
        try:
            return read(piece_path(self.state, self.work.fingerprint, task.start))
        except PieceError as exc:
            msg = f"{exc}; it is computed again"
            self.notes.append(msg)
            warnings.warn(msg, PieceWarning, stacklevel=5)
            return None

    def _done(self, task, fp) -> None:
        self.new_rows.append(_row(self.work, task, fp, self.state))
        self.done_here.append(task.label)

    def period_values(self, periods, compute):
        """Per-period statistics from the pieces that are done, computing the others."""
        work, decided, ids = self.work, self.decided, self.ids
        stats = [s.name for s in work.cp.stats]
        n, m = len(ids), len(periods)
        if m != len(decided):
            raise RuntimeError("the periods of a covariate and its pieces are out of step")
        vals = {s: np.full((n, m), np.nan) for s in stats}
        qa_pp: list = [None] * m
        due = []
        for j, (task, fp, done) in enumerate(decided):
            got = self._fresh.get((work.fingerprint, task.start))
            if got is None and done:
                got = self._load(
                    task,
                    lambda path, task=task: read_period_piece(
                        path,
                        covariate_fp=work.fingerprint,
                        period_start=task.start,
                        ids=ids,
                        stats=stats,
                    ),
                )
            if got is None:
                due.append((j, task, fp))
                continue
            for s in stats:
                vals[s][:, j] = got[0][s]
            qa_pp[j] = got[1]
        builds = 0
        if due:
            cv, cq, builds = compute([task.period for _, task, _ in due])
            for k, (j, task, fp) in enumerate(due):
                one = {s: cv[s][:, k] for s in stats}
                write_period_piece(
                    self.state,
                    covariate_fp=work.fingerprint,
                    period_start=task.start,
                    period_end=task.end,
                    inputs_fp=fp,
                    units_fp=work.units_fp,
                    ids=ids,
                    values=one,
                    qa=cq[k],
                )
                self._done(task, fp)
                self._fresh[(work.fingerprint, task.start)] = (one, cq[k])
                for s in stats:
                    vals[s][:, j] = one[s]
                qa_pp[j] = cq[k]
        return vals, qa_pp, builds

    def static_outcome(self):
        """The stored outcome of a covariate without periods, or None when it is due."""
        task, _fp, done = self.decided[0]
        if not done:
            return None
        work, ids = self.work, self.ids
        return self._load(
            task, lambda path: read_static_piece(path, covariate_fp=work.fingerprint, ids=ids)
        )

    def store_static(self, outcome) -> None:
        """Write the piece of a covariate without periods that was just computed."""
        task, fp, _ = self.decided[0]
        write_static_piece(
            self.state,
            covariate_fp=self.work.fingerprint,
            inputs_fp=fp,
            units_fp=self.work.units_fp,
            ids=self.ids,
            outcome=outcome,
        )
        self._done(task, fp)


# mkstemp names of covextract's atomic writers: ".<final name>.<8 random chars>.tmp<suffix>"
_LEFTOVER = re.compile(r"^\..+\.[A-Za-z0-9_]{8}\.tmp(\.[A-Za-z0-9]+)?$")


def remove_leftovers(plan) -> list[Path]:
    """Remove the temporary files of atomic writes that a killed run left behind.

    Called with the state lock held, so no other covextract process is
    writing them. Looks only in the folders covextract writes: those of the
    table, codebook and manifest, the panel folder, the state folder and its
    pieces; only names of the atomic writers' pattern are touched.
    """
    paths = plan.output_paths
    state = Path(paths["state"])
    folders = {Path(paths[k]).parent for k in ("table", "codebook", "manifest")} | {state}
    if plan.recipe.output.panel is not None:
        folders.add(Path(plan.recipe.resolve(plan.recipe.output.panel)))
    pieces = state / PIECES_DIR
    if pieces.is_dir():
        folders |= {p for p in pieces.iterdir() if p.is_dir()}
    removed = []
    for folder in sorted(folders):
        if not folder.is_dir():
            continue
        for item in folder.iterdir():
            if item.is_file() and _LEFTOVER.match(item.name):
                with contextlib.suppress(OSError):
                    item.unlink()
                    removed.append(item)
    return removed


# ------------------------------------------------------------------ refresh
def refresh(
    recipe,
    *,
    progress: bool | object = False,
    threads: int | None = None,
    scheduler: str | None = None,
    recompute: bool = False,
) -> RefreshResult:
    """Bring the outputs of a recipe up to date, computing only what is due.

    Parameters
    ----------
    recipe : path, dict or Recipe
    progress : bool or callable
        As for :func:`covextract.pipeline.run`.
    threads, scheduler : optional
        As for :func:`covextract.pipeline.run` (they never change results,
        so they are not part of any fingerprint).
    recompute : bool
        Compute every piece again, whatever the ledger says.

    Returns
    -------
    RefreshResult

    Raises
    ------
    covextract.ops.lock.LockedError
        Another refresh (or run) holds the state folder.
    covextract.ops.ledger.LedgerVersionError
        The ledger was written by another covextract version.
    """
    from covextract.pipeline import plan_recipe

    started = dt.datetime.now(dt.timezone.utc)
    plan = plan_recipe(recipe)
    state = Path(plan.output_paths["state"])
    with StateLock(state):
        leftovers = remove_leftovers(plan)
        ledger, note = open_ledger(state)
        with ledger:
            run_id = ledger.start_run()
            try:
                result = _refresh(
                    plan,
                    ledger,
                    started,
                    progress=progress,
                    threads=threads,
                    scheduler=scheduler,
                    recompute=recompute,
                )
            except BaseException as exc:
                with contextlib.suppress(Exception):
                    ledger.finish_run(run_id, "error", {"error": str(exc)})
                raise
            if note:
                result.notes.insert(0, note)
            if leftovers:
                result.notes.append(
                    f"removed {len(leftovers)} temporary file(s) left by an interrupted run"
                )
            ledger.finish_run(run_id, result.status, result.summary())
    return result


def _refresh(plan, ledger, started, *, progress, threads, scheduler, recompute) -> RefreshResult:
    from covextract import __version__
    from covextract.engine.cache import WeightCache
    from covextract.pipeline import (
        _Assembly,
        _progress_factory,
        compute_covariate,
        execution_settings,
    )

    recipe = plan.recipe
    state = Path(plan.output_paths["state"])
    hashes = ledger.file_hash
    works = plan_work(plan)
    # which pieces are due: no pixel is read for this
    decisions = []
    for work in works:
        per_task = []
        for task in work.tasks:
            fp = _inputs_fp(task, hashes)
            done = _piece_state(ledger, work, task, fp, state) == "computed"
            per_task.append((task, fp, done and not recompute))
        decisions.append(per_task)
    outputs_fp = _fingerprint(
        {
            "covextract": __version__,
            "recipe": recipe.fingerprint,
            "study_table": hashes(plan.table.path),
            "pieces": [
                [w.fingerprint, t.start, fp, w.units_fp]
                for w, d in zip(works, decisions, strict=True)
                for t, fp, _ in d
            ],
        }
    )
    missing, nxt = _gaps_and_next(plan)
    any_due = any(not done for d in decisions for _, _, done in d)
    if not any_due and _outputs_current(plan, outputs_fp):
        reused = {w.cp.prefix: len(w.tasks) for w in works}
        return RefreshResult("nothing_to_do", {}, reused, missing, nxt, False)

    with execution_settings(recipe, threads, scheduler) as (threads, client):
        cache = WeightCache(state)
        pieces = _Pieces(plan, state)
        reporter = _progress_factory(progress)
        assembly = _Assembly(plan)
        for work, decided in zip(works, decisions, strict=True):
            pieces.begin(work, decided)
            if work.per_period:
                outcome = compute_covariate(
                    plan,
                    work.cp,
                    cache,
                    reporter=reporter,
                    threads=threads,
                    client=client,
                    period_values=pieces.period_values,
                )
            else:
                outcome = pieces.static_outcome()
                if outcome is None:
                    outcome = compute_covariate(
                        plan, work.cp, cache, reporter=reporter, threads=threads, client=client
                    )
                    pieces.store_static(outcome)
            pieces.end()
            assembly.add(work.cp, outcome)
        crash_point("after_pieces")
        run_result = assembly.finish(
            write=True,
            started=started,
            cache=cache,
            manifest_extra={"refresh": {"outputs_fingerprint": outputs_fp}},
            hashes=hashes,
        )
        crash_point("before_ledger_commit")
        ledger.record(pieces.new_rows)
        crash_point("after_ledger_commit")
    status = "partial" if missing else "success"
    return RefreshResult(
        status, pieces.computed, pieces.reused, missing, nxt, True, run_result, pieces.notes
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
    last_run : covextract.ops.ledger.Run or None
    newer_inputs : list of str
        Input files modified after the manifest was written.
    next_expected : dict
        Series layer → label of the period after its last one.
    ledger_problem : str or None
        Why the ledger could not be read (the next refresh rebuilds it).
    state_folder : Path
    """

    layers: dict
    last_run: object
    newer_inputs: list
    next_expected: dict
    ledger_problem: str | None
    state_folder: Path


def refresh_status(recipe) -> RefreshStatus:
    """The state of a recipe's refresh, without computing or reading any pixel or changing files.

    Input files whose size or modification time changed since they were last
    hashed are counted as changed (``due``) without being read.
    """
    from covextract.pipeline import input_files, plan_recipe

    plan = plan_recipe(recipe)
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
            states = per_layer.setdefault(work.cp.layer_name, {})
            for task in work.tasks:
                state_name = "due"
                if ledger is not None:
                    # recorded hashes only: status never reads an input file
                    fp = _inputs_fp(task, ledger.recorded_hash)
                    state_name = _piece_state(ledger, work, task, fp, state)
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
    _, nxt = _gaps_and_next(plan)
    return RefreshStatus(layers, last_run, newer, nxt, problem, state)
