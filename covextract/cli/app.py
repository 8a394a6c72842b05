"""The ``covextract`` command: one small module per command, thin over the library.

Heavy libraries are imported inside the commands so ``covextract --help`` is
instant.
"""

from __future__ import annotations

import typer

from covextract.cli import check as _check
from covextract.cli import demo as _demo
from covextract.cli import describe as _describe
from covextract.cli import refresh as _refresh
from covextract.cli import run as _run
from covextract.cli import schedule as _schedule

app = typer.Typer(
    name="covextract",
    help=(
        "Environmental covariates from satellite rasters, summarised over the units of a "
        "health study (villages, survey clusters, facilities)."
    ),
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    # Plain help, as click formats it: typer 0.29's rich help prints a "<bool>" type
    # after every flag (including --help), which reads as if the flag took a value.
    # Plain text is also what a log or a pipe should get, and it needs no rich import.
    rich_markup_mode=None,
)

app.command("run")(_run.run_command)
app.command("check")(_check.check_command)
app.command("describe")(_describe.describe_command)
app.command("demo")(_demo.demo_command)
app.command("refresh")(_refresh.refresh_command)
app.command("status")(_refresh.status_command)
app.command("schedule")(_schedule.schedule_command)


def _print_versions(value: bool) -> None:
    # A parameter callback, not the group callback: click runs it while parsing,
    # so ``covextract --version`` works without a command.
    if value:
        from covextract.outputs.manifest import package_versions

        for name, value in package_versions().items():
            typer.echo(f"{name}: {value}")
        raise typer.Exit()


@app.callback()
def _main(
    version: bool = typer.Option(
        False,
        "--version",
        help="Print versions and exit.",
        is_eager=True,
        callback=_print_versions,
    ),
) -> None:
    """Environmental covariates from satellite rasters, summarised over study units."""


def main() -> None:
    """Entry point of the ``covextract`` script."""
    app()
