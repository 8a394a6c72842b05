"""``covextract refresh RECIPE`` and ``covextract status RECIPE``: the monthly operation."""

from __future__ import annotations

from pathlib import Path

import typer

from covextract.cli.common import DEBUG_HELP, cli_errors


def refresh_command(
    recipe: Path = typer.Argument(..., metavar="RECIPE", help="The recipe file (YAML)."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bar; summary only."),
    threads: int = typer.Option(
        None, "--threads", min=1, help="Local threads (default: one per core)."
    ),
    scheduler: str = typer.Option(
        None,
        "--scheduler",
        help="Run block tasks on an existing dask.distributed scheduler, tcp://HOST:PORT.",
    ),
    recompute: bool = typer.Option(
        False, "--recompute", help="Compute every period again, whatever the ledger says."
    ),
    overwrite: bool = typer.Option(
        False,
        "--overwrite",
        help="Replace existing output files that covextract did not write (inputs are never "
        "replaced).",
    ),
    debug: bool = typer.Option(False, "--debug", help=DEBUG_HELP),
) -> None:
    """Compute only the periods of RECIPE that are new or changed, then rebuild the outputs.

    Exit status: 0 done, 3 nothing to do, 4 partial (some expected inputs are
    missing), 5 another refresh holds the state folder, 1 error.
    """
    code = 0
    with cli_errors(debug):
        from covextract.cli.progress import make_progress
        from covextract.ops.refresh import refresh
        from covextract.state.lock import EXIT_CODES, LockedError

        try:
            result = refresh(
                recipe,
                progress=make_progress(quiet=quiet),
                threads=threads,
                scheduler=scheduler,
                recompute=recompute,
                overwrite=overwrite,
            )
        except LockedError as exc:
            typer.secho(f"locked: {exc}", err=True, fg="yellow")
            raise typer.Exit(EXIT_CODES["locked"]) from None
        for line in refresh_lines(result):
            typer.echo(line)
        code = result.exit_code
    raise typer.Exit(code)


def refresh_lines(result) -> list[str]:
    """The summary of a refresh, one fact per line."""
    lines = []
    n = sum(len(v) for v in result.computed.values())
    if n:
        parts = [f"{k} {ranges_text(v)}" for k, v in result.computed.items()]
        lines.append(f"computed {n} piece(s): " + "; ".join(parts))
    else:
        lines.append("computed nothing new")
    lines.append(f"taken from the state folder: {sum(result.reused.values())} piece(s)")
    for layer, gaps in result.missing.items():
        lines.append(f"missing inputs of layer {layer} (gaps): {ranges_text(gaps)}")
    if result.next_expected:
        lines.append(
            "next period expected: "
            + ", ".join(f"{k} {v}" for k, v in result.next_expected.items())
        )
    for note in result.notes:
        lines.append(f"note: {note}")
    if result.outputs_written:
        out = result.run.outputs
        lines.append("outputs rewritten: " + ", ".join(str(p) for p in out.values()))
    else:
        lines.append("outputs unchanged: they are up to date")
    lines.append(f"result: {result.status} (exit {result.exit_code})")
    return lines


def ranges_text(labels) -> str:
    """``2019-01..2019-12, 2021-03``: runs of consecutive labels as given, with their count."""
    labels = list(labels)
    if not labels:
        return ""
    return f"{labels[0]}" if len(labels) == 1 else f"{labels[0]}..{labels[-1]} ({len(labels)})"


STATE_TEXT = {
    "computed": "computed",
    "due": "due (new, or input changed)",
    "missing_on_disk": "computed, piece missing on disk",
    "gap": "no input file (gap)",
}


def status_lines(status) -> list[str]:
    """What ``status`` prints: each layer's periods by state, last run, newer inputs, next."""
    lines = [f"state folder: {status.state_folder}"]
    if status.ledger_problem:
        lines.append(f"ledger unreadable (the next refresh rebuilds it): {status.ledger_problem}")
    for layer, periods in status.layers.items():
        runs: list = []  # consecutive periods in one state
        for label, state in periods:
            if runs and runs[-1][0] == state:
                runs[-1][1].append(label)
            else:
                runs.append((state, [label]))
        lines.append(f"layer {layer} ({len(periods)} period(s)):")
        for state, labels in runs:
            lines.append(f"  {STATE_TEXT[state]:<32} {ranges_text(labels)}")
    if status.commit_pending:
        lines.append(
            "outputs: a run was killed while putting them in place; the next run or refresh "
            "completes it"
        )
    elif status.outputs_problems:
        shown = "; ".join(status.outputs_problems[:3])
        more = "; ..." if len(status.outputs_problems) > 3 else ""
        lines.append(
            f"outputs: a mixed set, not the one their manifest describes ({shown}{more}); "
            "the next refresh writes them all again"
        )
    run = status.last_run
    if run is None:
        lines.append("last run: none yet")
    elif run.finished is None:
        lines.append(f"last run: started {run.started}, never finished (killed or still running)")
    else:
        lines.append(f"last run: {run.started} to {run.finished}, result {run.result}")
    if status.newer_inputs:
        lines.append(f"input files newer than the outputs ({len(status.newer_inputs)}):")
        lines.extend(f"  {p}" for p in status.newer_inputs[:20])
        if len(status.newer_inputs) > 20:
            lines.append(f"  ... and {len(status.newer_inputs) - 20} more")
    for layer, label in status.next_expected.items():
        lines.append(f"next period expected for layer {layer}: {label}")
    return lines


def status_command(
    recipe: Path = typer.Argument(..., metavar="RECIPE", help="The recipe file (YAML)."),
    debug: bool = typer.Option(False, "--debug", help=DEBUG_HELP),
) -> None:
    """Show which periods of RECIPE are computed, due or missing, and the last refresh."""
    with cli_errors(debug):
        from covextract.ops.refresh import refresh_status

        for line in status_lines(refresh_status(recipe)):
            typer.echo(line)
