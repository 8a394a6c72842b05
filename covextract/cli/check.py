"""``covextract check RECIPE``: validate a recipe and its inputs without computing."""

from __future__ import annotations

from pathlib import Path

import typer

from covextract.cli.common import DEBUG_HELP, EXIT_ERROR, cli_errors


def check_command(
    recipe: Path = typer.Argument(..., metavar="RECIPE", help="The recipe file (YAML)."),
    debug: bool = typer.Option(False, "--debug", help=DEBUG_HELP),
) -> None:
    """Check RECIPE and every input it names; list every problem found."""
    with cli_errors(debug):
        from covextract.run import check_recipe

        report: list = []
        problems = check_recipe(recipe, report=report)
        for line in report:
            typer.echo(line)
        if problems:
            typer.secho(f"{len(problems)} problem(s) found in {recipe}:", err=True, fg="red")
            for p in problems:
                typer.echo(f"  - {p}", err=True)
            raise typer.Exit(EXIT_ERROR)
        typer.echo(f"{recipe}: recipe and inputs look right; nothing was computed.")
