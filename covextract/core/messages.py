"""Helpers for messages and warnings that point at the user's own code and data."""

from __future__ import annotations

import difflib
import os
import sys

from covextract.errors import TableError

__all__ = ["user_stacklevel", "missing_column", "plural"]

_PACKAGE = os.path.dirname(os.path.dirname(os.path.abspath(__file__))) + os.sep


def user_stacklevel() -> int:
    """``stacklevel`` for :func:`warnings.warn` naming the first frame outside covextract.

    Counted from the function that calls this one (level 1), so a warning raised
    deep inside a run points at the user's ``run(...)`` or ``check_recipe(...)`` line.
    """
    frame = sys._getframe(1)
    level = 1
    while frame is not None and os.path.abspath(frame.f_code.co_filename).startswith(_PACKAGE):
        frame = frame.f_back
        level += 1
    return level


def missing_column(name, columns, key) -> TableError:
    """The error for a column the study table does not have, with a did-you-mean hint."""
    hint = difflib.get_close_matches(name, [str(c) for c in columns], n=1)
    more = f" Did you mean {hint[0]!r}?" if hint else ""
    return TableError(
        f"{key}: column {name!r} is not in the study table (columns: "
        f"{', '.join(map(str, columns))}).{more}"
    )


def plural(n: int, word: str, many: str | None = None) -> str:
    """``1 layer``, ``2 layers`` (``many`` for irregular plurals)."""
    return f"{n} {word if n == 1 else (many or word + 's')}"
