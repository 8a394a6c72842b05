"""``covextract demo``: lay out the invented demo scenario and run it."""

from __future__ import annotations

from pathlib import Path

import typer

from covextract.cli.common import DEBUG_HELP, cli_errors


def demo_command(
    out: Path = typer.Option(
        None, "--out", help="Folder for the scenario and its outputs (default: a new folder here)."
    ),
    debug: bool = typer.Option(False, "--debug", help=DEBUG_HELP),
) -> None:
    """Copy the invented demo scenario to a folder, run its recipe and show the result."""
    with cli_errors(debug):
        from covextract.cli.summary import print_summary
        from covextract.demo import lay_out_demo
        from covextract.pipeline import run

        folder = lay_out_demo(out)
        typer.echo(f"demo scenario (invented data) laid out in {folder}")
        result = run(folder / "recipe.yaml", write=True, progress=True)
        print_summary(result)
