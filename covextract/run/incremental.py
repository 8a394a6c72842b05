"""Incremental execution shared by ``run`` and ``refresh``: pieces, ledger, outputs.

A refresh splits a recipe into *pieces* (:mod:`covextract.state.pieces`): one
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
One refresh at a time (:class:`~covextract.state.lock.StateLock`). A refresh
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
from covextract.state.ledger import LEDGER_NAME, Ledger, LedgerCorruptError, LedgerVersionError
from covextract.state.ledger import fingerprint as _fingerprint
from covextract.state.lock import EXIT_CODES, StateLock
from covextract.state.pieces import (
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
    "execute_incremental",
    "open_ledger",
    "plan_work",
    "piece_state",
    "inputs_fingerprint",
    "gaps_and_next",
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

    cov: object
    fingerprint: str
    units_fp: str
    per_period: bool
    tasks: list


def plan_work(plan) -> list[CovariateWork]:
    """The pieces of every covariate of a plan, with their covariate fingerprints."""
    works = []
    for cov in plan.covariates:
        units_fp = plan.unit_sets[cov.unit_key].fingerprint()
        fp = _fingerprint(cov.fingerprint(plan))
        if cov.per_period:
            tasks = [
                PieceTask(
                    start=p.start.isoformat(),
                    end=p.end.isoformat(),
                    label=p.label,
                    inputs=[(f"layer:{cov.layer_name}:{p.label}", cov.series.path(p))],
                    period=p,
                )
                for p in cov.all_periods()
            ]
            works.append(CovariateWork(cov, fp, units_fp, True, tasks))
            continue
        task = PieceTask(start=STATIC, end=STATIC, label="all", inputs=cov.piece_inputs(plan))
        works.append(CovariateWork(cov, fp, units_fp, False, [task]))
    return works


# ------------------------------------------------------------------ results
@dataclass
class RefreshResult:
    """What a refresh did.

    Attributes
    ----------
    status : str
        A key of :data:`~covextract.state.lock.EXIT_CODES`: ``success``,
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


def inputs_fingerprint(task, hashes) -> str | None:
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


def piece_state(ledger, work, task, inputs_fp, state) -> str:
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


def gaps_and_next(plan) -> tuple[dict, dict]:
    """Per series layer: the periods missing inside its span, and the next period expected."""
    missing, nxt = {}, {}
    used = {c.layer_name for c in plan.covariates}
    for name, series in plan.series.items():
        if name not in used or not series.periods:
            continue
        if series.gaps:
            missing[name] = [g.label for g in series.gaps]
        last = series.periods[-1]
        nxt[name] = series.step.period(series.step.next_start(last.start)).label
    return missing, nxt


def mixed_outputs(plan) -> list[str]:
    """Why the outputs on disk are not the complete set of their manifest (empty: they are)."""
    from covextract.outputs.manifest import verify_outputs

    paths = plan.output_paths
    return verify_outputs(
        paths["manifest"], base_dir=plan.recipe.base_dir, panel=paths.get("panel")
    )


def _outputs_current(plan, outputs_fp: str) -> bool:
    """True when the manifest records ``outputs_fp`` and every output still has its hash."""
    from covextract.io.paths import file_sha256

    manifest = plan.output_paths["manifest"]
    try:
        doc = json.loads(Path(manifest).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    if (doc.get("refresh") or {}).get("outputs_fingerprint") != outputs_fp:
        return False
    recorded = {item.get("role"): item.get("sha256") for item in doc.get("outputs", [])}
    current = output_files(plan)
    if set(recorded) != {role for role, _ in current}:
        return False
    for role, path in current:
        p = Path(path)
        if not p.exists() or file_sha256(p) != recorded[role]:
            return False
    return True


class _Pieces:
    """Loads the pieces that are done, computes and writes the due ones, one covariate at a time.

    Call :meth:`begin` for a covariate, then :meth:`period_values` (given to
    :func:`~covextract.run.execute.compute_covariate`) or :meth:`static_outcome`
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
        self.ids = self.plan.unit_sets[work.cov.unit_key].ids
        self.done_here: list = []

    def end(self) -> None:
        prefix = self.work.cov.prefix
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
        stats = [s.name for s in work.cov.stats]
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
        from covextract.covariates import Outcome

        work, ids = self.work, self.ids
        fields = self._load(
            task, lambda path: read_static_piece(path, covariate_fp=work.fingerprint, ids=ids)
        )
        return None if fields is None else Outcome(**fields)

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
    writing them, and after :func:`~covextract.io.writers.recover_commit`
    (a pending commit's temporaries are its new outputs). Looks only in the
    folders covextract writes: those of the table, codebook and manifest,
    the panel folder and its parent (staged panel folders
    ``.<panel>.<8 chars>.tmp`` or ``.old``), the state folder and its
    pieces; only names of the atomic writers' pattern are touched.
    """
    import shutil

    paths = plan.output_paths
    state = Path(paths["state"])
    folders = {Path(paths[k]).parent for k in ("table", "codebook", "manifest")} | {state}
    removed = []
    if "panel" in paths:
        panel = Path(paths["panel"])
        folders.add(panel)
        staged = re.compile(rf"^\.{re.escape(panel.name)}\.[A-Za-z0-9]{{8}}\.(tmp|old)$")
        if panel.parent.is_dir():
            for item in panel.parent.iterdir():
                if item.is_dir() and not item.is_symlink() and staged.match(item.name):
                    shutil.rmtree(item, ignore_errors=True)
                    removed.append(item)
    pieces = state / PIECES_DIR
    if pieces.is_dir():
        folders |= {p for p in pieces.iterdir() if p.is_dir()}
    for folder in sorted(folders):
        if not folder.is_dir():
            continue
        for item in folder.iterdir():
            if item.is_file() and _LEFTOVER.match(item.name):
                with contextlib.suppress(OSError):
                    item.unlink()
                    removed.append(item)
    return removed


# ------------------------------------------------------------------ execution
def execute_incremental(
    plan,
    started,
    *,
    progress,
    threads: int | None = None,
    scheduler: str | None = None,
    recompute: bool = False,
    skip_when_current: bool = True,
) -> RefreshResult:
    """Compute the due pieces of a plan, write every output, record the pieces.

    ``run`` calls this with ``recompute=True`` and ``skip_when_current=False``
    (everything computed and written); ``refresh`` with the defaults (only due
    pieces; nothing at all when nothing is due and the outputs match the
    manifest). Both leave the same state, so either can follow the other.

    Raises
    ------
    covextract.state.lock.LockedError
        Another refresh (or run) holds the state folder.
    covextract.state.ledger.LedgerVersionError
        The ledger was written by another covextract version.
    """
    state = Path(plan.output_paths["state"])
    try:
        with StateLock(state):
            return _locked(
                plan,
                state,
                started,
                progress=progress,
                threads=threads,
                scheduler=scheduler,
                recompute=recompute,
                skip_when_current=skip_when_current,
            )
    except OSError as exc:
        raise _write_failure(plan, exc) from None


def _write_failure(plan, exc: OSError):
    """A full disk, quota or permission error as one line naming the file; others unchanged."""
    from covextract.io.writers import WriteFailedError, disk_reason
    from covextract.outputs.guard import shown_path

    state = Path(plan.output_paths["state"])
    base = plan.recipe.base_dir
    if isinstance(exc, WriteFailedError):
        path = exc.path
    elif disk_reason(exc) is not None:
        path = Path(exc.filename or state)
    else:
        return exc
    try:
        in_state = Path(os.path.abspath(path)).is_relative_to(os.path.abspath(state))
    except (TypeError, ValueError):
        in_state = False
    if in_state:
        shown = f"the state folder {shown_path(state, base)}"
        where = "state folder (output.state)"
    else:
        shown, where = shown_path(path, base), "output folder"
    cause = exc.cause if isinstance(exc, WriteFailedError) else exc
    intact = exc.intact if isinstance(exc, WriteFailedError) else True
    return WriteFailedError(path, cause, shown=shown, intact=intact, where=where)


def _locked(
    plan, state, started, *, progress, threads, scheduler, recompute, skip_when_current
) -> RefreshResult:
    from covextract.io.writers import recover_commit

    recovered = recover_commit(state)
    leftovers = remove_leftovers(plan)
    ledger, note = open_ledger(state)
    with ledger:
        run_id = ledger.start_run()
        try:
            result = _execute(
                plan,
                ledger,
                started,
                progress=progress,
                threads=threads,
                scheduler=scheduler,
                recompute=recompute,
                skip_when_current=skip_when_current,
            )
        except BaseException as exc:
            with contextlib.suppress(Exception):
                ledger.finish_run(run_id, "error", {"error": str(exc)})
            raise
        if note:
            result.notes.insert(0, note)
        if recovered:
            result.notes.append(
                "completed the commit of the outputs that an interrupted run had begun"
            )
        if leftovers:
            result.notes.append(
                f"removed {len(leftovers)} temporary file(s) left by an interrupted run"
            )
        ledger.finish_run(run_id, result.status, result.summary())
    return result


def _execute(
    plan, ledger, started, *, progress, threads, scheduler, recompute, skip_when_current
) -> RefreshResult:
    from covextract.core.version import __version__
    from covextract.outputs.write import write_outputs
    from covextract.run.execute import Assembly, compute_covariate, execution_settings
    from covextract.state.cache import WeightCache

    recipe = plan.recipe
    state = Path(plan.output_paths["state"])
    hashes = ledger.file_hash
    works = plan_work(plan)
    # which pieces are due: no pixel is read for this
    decisions = []
    for work in works:
        per_task = []
        for task in work.tasks:
            fp = inputs_fingerprint(task, hashes)
            done = piece_state(ledger, work, task, fp, state) == "computed"
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
    missing, nxt = gaps_and_next(plan)
    any_due = any(not done for d in decisions for _, _, done in d)
    if skip_when_current and not any_due and _outputs_current(plan, outputs_fp):
        reused = {w.cov.prefix: len(w.tasks) for w in works}
        return RefreshResult("nothing_to_do", {}, reused, missing, nxt, False)
    mixed = mixed_outputs(plan)

    with execution_settings(recipe, threads, scheduler) as (threads, client):
        cache = WeightCache(state)
        pieces = _Pieces(plan, state)
        assembly = Assembly(plan)
        for work, decided in zip(works, decisions, strict=True):
            pieces.begin(work, decided)
            if work.per_period:
                outcome = compute_covariate(
                    plan,
                    work.cov,
                    cache,
                    progress=progress,
                    threads=threads,
                    client=client,
                    period_values=pieces.period_values,
                )
            else:
                outcome = pieces.static_outcome()
                if outcome is None:
                    outcome = compute_covariate(
                        plan, work.cov, cache, progress=progress, threads=threads, client=client
                    )
                    pieces.store_static(outcome)
            pieces.end()
            assembly.add(work.cov, outcome)
        crash_point("after_pieces")
        run_result = assembly.finish(cache=cache)
        from covextract.outputs.table import table_format
        from covextract.run.plan import gpkg_geometry, input_files

        paths = plan.output_paths
        run_result.outputs = write_outputs(
            run_result,
            paths,
            recipe,
            started,
            inputs=input_files(plan),
            geometry=gpkg_geometry(plan) if table_format(paths["table"]) == "gpkg" else None,
            manifest_extra={"refresh": {"outputs_fingerprint": outputs_fp}},
            hashes=hashes,
        )
        crash_point("before_ledger_commit")
        ledger.record(pieces.new_rows)
        crash_point("after_ledger_commit")
    status = "partial" if missing else "success"
    notes = pieces.notes
    if mixed:
        notes.append(
            "the outputs on disk were a mixed set ("
            + "; ".join(mixed[:3])
            + ("; ..." if len(mixed) > 3 else "")
            + "); they were all written again"
        )
    return RefreshResult(
        status, pieces.computed, pieces.reused, missing, nxt, True, run_result, notes
    )


def output_files(plan) -> list:
    """``(role, path)`` of every output file now on disk (the manifest excluded)."""
    from covextract.outputs.panel import panel_files

    paths = plan.output_paths
    files = [(k, paths[k]) for k in ("table", "codebook", "codebook_md")]
    if "panel" in paths:
        files += [(f"panel:{p.name}", p) for p in panel_files(paths["panel"])]
    return files
