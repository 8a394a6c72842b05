"""What every command shares: clean errors, warnings on stderr, exit codes."""

from __future__ import annotations

import contextlib
import sys
import traceback
import warnings

import typer

#: Exit codes: 0 success; 1 an error covextract explains; 2 is typer's usage error.
EXIT_OK = 0
EXIT_ERROR = 1

DEBUG_HELP = "Show the full traceback of an error."


def counted(n: int, singular: str, plural: str | None = None) -> str:
    """``"1 layer"``, ``"2 layers"``, ``"0 layers"``: a count with its noun in the right number."""
    return f"{n} {singular if n == 1 else (plural or singular + 's')}"


def _show_warning(message, category, filename, lineno, file=None, line=None):
    name = getattr(category, "__name__", "Warning")
    typer.secho(f"warning ({name}): {message}", err=True, fg="yellow")


@contextlib.contextmanager
def cli_errors(debug: bool):
    """Turn covextract errors into one line on stderr and exit code 1."""
    from covextract.errors import CovextractError

    old = warnings.showwarning
    warnings.showwarning = _show_warning
    try:
        yield
    except CovextractError as exc:
        if debug:
            traceback.print_exc(file=sys.stderr)
        typer.secho(f"error: {exc}", err=True, fg="red")
        raise typer.Exit(EXIT_ERROR) from None
    finally:
        warnings.showwarning = old
