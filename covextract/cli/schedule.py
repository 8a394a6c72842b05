"""``covextract schedule RECIPE``: print (or, when asked, install) a schedule for a recipe."""

from __future__ import annotations

import sys
from pathlib import Path

import typer

from covextract.cli.common import DEBUG_HELP, EXIT_ERROR, cli_errors


def schedule_command(
    recipe: Path = typer.Argument(..., metavar="RECIPE", help="The recipe file (YAML)."),
    day: int = typer.Option(
        1,
        "--day",
        help="Monthly: day of the month, 1-28. Weekly: weekday 0-6, 0 = Sunday. Daily: unused.",
    ),
    hour: int = typer.Option(3, "--hour", help="Hour, 0-23, local time."),
    minute: int = typer.Option(0, "--minute", help="Minute, 0-59."),
    every: str = typer.Option("month", "--every", help="Interval: month, week or day."),
    systemd: bool = typer.Option(
        False, "--systemd", help="Print a systemd service and timer instead of a crontab line."
    ),
    install: bool = typer.Option(
        False, "--install", help="Add the crontab line for the current user, after confirming."
    ),
    yes: bool = typer.Option(False, "--yes", "-y", help="With --install: do not ask."),
    debug: bool = typer.Option(False, "--debug", help=DEBUG_HELP),
) -> None:
    """Print a crontab line or systemd units that run `covextract refresh RECIPE`."""
    with cli_errors(debug):
        from covextract.errors import InputFileError
        from covextract.ops import schedule as sched

        if not recipe.is_file():
            raise InputFileError(f"recipe {recipe} not found; give the path to a recipe file.")
        log = sched.default_log(recipe)
        when = dict(day=day, hour=hour, minute=minute, every=every)
        if systemd:
            units = sched.systemd_units(python=sys.executable, recipe=recipe, log=log, **when)
            folder = "~/.config/systemd/user"
            for filename, text in units.items():
                typer.echo(f"# {folder}/{filename}")
                typer.echo(text)
            timer = next(n for n in units if n.endswith(".timer"))
            typer.echo("# Save both files there, then run:")
            typer.echo("systemctl --user daemon-reload")
            typer.echo(f"systemctl --user enable --now {timer}")
            typer.echo("# To run while you are logged out: loginctl enable-linger $USER")
            _note_log_folder(log)
            if install:
                typer.secho(
                    "error: --install adds crontab lines only; nothing was installed. "
                    "Install the systemd units by hand as shown above.",
                    err=True,
                    fg="red",
                )
                raise typer.Exit(EXIT_ERROR)
            return

        tag = sched.default_tag(recipe)
        line = sched.crontab_line(python=sys.executable, recipe=recipe, log=log, tag=tag, **when)
        typer.echo(line)
        if not install:
            typer.echo(
                "# Add this line with `crontab -e`, or run again with --install to add it "
                f"(it replaces an earlier line tagged covextract:{tag})."
            )
            _note_log_folder(log)
            return
        if not yes and not typer.confirm(
            "Add this line to your crontab (replacing only its own earlier line)?", default=False
        ):
            typer.echo("Nothing installed.", err=True)
            raise typer.Exit(EXIT_ERROR)
        # The scheduled redirect cannot create a missing folder; the log would be lost.
        log.parent.mkdir(parents=True, exist_ok=True)
        sched.install_crontab(line, tag)
        typer.echo(f"Installed for the current user; the output goes to {log}.")


def _note_log_folder(log: Path) -> None:
    if not log.parent.is_dir():
        typer.echo(
            f"# The log folder {log.parent} does not exist yet: create it "
            "(mkdir -p) before the first scheduled run, or the run's output is lost."
        )
