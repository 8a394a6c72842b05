"""``covextract run RECIPE``: compute and write the covariates."""

from __future__ import annotations

from pathlib import Path

import typer

from covextract.cli.common import DEBUG_HELP, cli_errors


def run_command(
    recipe: Path = typer.Argument(..., metavar="RECIPE", help="The recipe file (YAML)."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bar or summary."),
    threads: int = typer.Option(
        None, "--threads", min=1, help="Local threads (default: one per core)."
    ),
    scheduler: str = typer.Option(
        None,
        "--scheduler",
        help="Run block tasks on an existing dask.distributed scheduler, tcp://HOST:PORT. "
        "Workers must see the same file paths.",
    ),
    overwrite: bool = typer.Option(
        False,
        "--overwrite",
        help="Replace existing output files that covextract did not write (inputs are never "
        "replaced).",
    ),
    debug: bool = typer.Option(False, "--debug", help=DEBUG_HELP),
) -> None:
    """Compute the covariates of RECIPE and write the table, codebook and manifest."""
    with cli_errors(debug):
        from covextract.cli.progress import make_progress
        from covextract.cli.summary import print_summary
        from covextract.run import run

        result = run(
            recipe,
            write=True,
            progress=make_progress(quiet=quiet),
            threads=threads,
            scheduler=scheduler,
            overwrite=overwrite,
        )
        if not quiet:
            print_summary(result)
