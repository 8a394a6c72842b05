"""Schedule ``covextract refresh RECIPE``: a crontab line or a systemd service and timer.

The scheduled command is :data:`VERB`: ``refresh`` computes only the periods
that are new or whose inputs changed (:mod:`covextract.ops.refresh`) and
exits with a documented status (:data:`covextract.state.lock.EXIT_CODES`).

Nothing here installs anything except :func:`install_crontab`, which the
command calls only after the user has seen the line and confirmed.

Conventions
-----------
- Every path in the scheduled command is absolute: the recipe and the log are
  resolved (``Path.resolve``); the interpreter is made absolute *without*
  following symlinks, because a virtual environment's ``python`` is a symlink
  to the base interpreter and resolving it would lose the environment's
  packages.
- ``every="month"``: ``day`` is the day of the month, 1 to 28. Days 29 to 31
  are refused because some months lack them (cron would skip those months;
  systemd's ``*-*-31`` likewise fires only in 31-day months).
- ``every="week"``: ``day`` is the weekday, 0 to 6 with 0 = Sunday, as cron
  counts (common practice: crontab(5)).
- ``every="day"``: ``day`` is ignored.
- Times are local time of the machine that runs cron or systemd.
- Invalid settings raise :class:`covextract.errors.RecipeError` (a
  ``ValueError``) whose single problem names the setting as its key: the
  schedule is a setting of how the recipe is run, there is no narrower
  existing class, and the command line prints it as one clean error line.
"""

from __future__ import annotations

import hashlib
import os
import re
import shlex
import subprocess
from pathlib import Path

from covextract.errors import OutputError, RecipeError, RecipeProblem

__all__ = [
    "EVERY",
    "crontab_line",
    "default_log",
    "default_tag",
    "install_crontab",
    "refresh_command",
    "systemd_units",
]

#: The intervals a schedule can have.
EVERY = ("month", "week", "day")

#: The command a schedule runs: the incremental ``refresh``.
VERB = "refresh"

#: Folder of the refresh state next to the recipe, and the log file in it.
STATE_FOLDER = ".covextract-state"
LOG_NAME = "refresh.log"

_TAG_RE = re.compile(r"^[A-Za-z0-9_.-]+$")
# cron's weekday numbers (0 = Sunday) to systemd's weekday names.
_ADVERB = {"month": "monthly", "week": "weekly", "day": "daily"}
_WEEKDAYS = ("Sun", "Mon", "Tue", "Wed", "Thu", "Fri", "Sat")


def _problem(message: str, key: str) -> RecipeError:
    return RecipeError([RecipeProblem(message, key=key)])


def default_log(recipe: str | os.PathLike) -> Path:
    """The default log file, ``refresh.log`` in the recipe's state folder (absolute).

    The state folder is the recipe's ``output.state`` (by default
    ``.covextract-state`` next to the study table). A file that does not load
    as a recipe gets ``<recipe folder>/.covextract-state/refresh.log``.
    """
    from covextract.errors import CovextractError

    try:
        from covextract.run.plan import load as _load
        from covextract.run.plan import output_paths as _output_paths

        return Path(_output_paths(_load(recipe))["state"]).resolve() / LOG_NAME
    except CovextractError:
        return Path(recipe).resolve().parent / STATE_FOLDER / LOG_NAME


def default_tag(recipe: str | os.PathLike) -> str:
    """A short tag for a recipe: the first 10 hex digits of the SHA-256 of its absolute path.

    The same recipe file always gets the same tag, so scheduling it again
    replaces its line instead of adding a second one.
    """
    text = str(Path(recipe).resolve())
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:10]


def _check_tag(tag: str, key: str = "tag") -> str:
    if not _TAG_RE.match(tag):
        raise _problem(
            f"{tag!r} is not a usable {key}: use only letters, digits, '_', '.' and '-'.", key
        )
    return tag


def _check_time(*, day: int, hour: int, minute: int, every: str) -> None:
    if every not in EVERY:
        raise _problem(f"unknown interval {every!r}; choose one of {', '.join(EVERY)}.", "every")
    if not 0 <= hour <= 23:
        raise _problem(f"{hour} is not an hour: use 0 to 23.", "hour")
    if not 0 <= minute <= 59:
        raise _problem(f"{minute} is not a minute: use 0 to 59.", "minute")
    if every == "month":
        if 29 <= day <= 31:
            raise _problem(
                f"{day} is not a day of every month, so a monthly run on it would be skipped "
                "in shorter months; choose day 28 or earlier.",
                "day",
            )
        if not 1 <= day <= 28:
            raise _problem(f"{day} is not a day of the month; choose 1 to 28.", "day")
    elif every == "week" and not 0 <= day <= 6:
        raise _problem(
            f"{day} is not a weekday: use 0 to 6 (0 = Sunday, 1 = Monday, ... 6 = Saturday).", "day"
        )


def _absolute(python: str, recipe: str | os.PathLike, log: str | os.PathLike):
    py = os.path.abspath(os.fspath(python))
    rec = str(Path(recipe).resolve())
    lg = str(Path(log).resolve())
    for key, value in (("python", py), ("recipe", rec), ("log", lg)):
        if "\n" in value or "\r" in value:
            raise _problem(
                f"the path {value!r} holds a line break, which no crontab or unit file can "
                "carry; move or rename the file.",
                key,
            )
    return py, rec, lg


def refresh_command(*, python: str, recipe: str | os.PathLike, log: str | os.PathLike) -> str:
    """The shell command a schedule runs, with absolute, shell-quoted paths.

    Returns ``<python> -m covextract run <recipe> >> <log> 2>&1``; the
    output of every run is appended to the log.
    """
    py, rec, lg = _absolute(python, recipe, log)
    q = shlex.quote
    return f"{q(py)} -m covextract {VERB} {q(rec)} >> {q(lg)} 2>&1"


def crontab_line(
    *,
    python: str,
    recipe: str | os.PathLike,
    log: str | os.PathLike,
    day: int = 1,
    hour: int = 3,
    minute: int = 0,
    every: str = "month",
    tag: str | None = None,
) -> str:
    r"""One crontab line that runs ``covextract run`` on the recipe.

    Parameters
    ----------
    python : str
        The interpreter to run (made absolute, symlinks kept).
    recipe, log : path
        The recipe file and the log file the output is appended to.
    day, hour, minute : int
        When to run, local time; see the module notes for ``day``.
    every : {"month", "week", "day"}
        The interval.
    tag : str, optional
        The name in the closing ``# covextract:<tag>`` comment that
        :func:`install_crontab` uses to find the line again; by default
        :func:`default_tag` of the recipe.

    Returns
    -------
    str
        The line without a newline. Every ``%`` is written ``\%``, because
        cron turns an unescaped ``%`` into a newline (crontab(5)).

    Examples
    --------
    >>> crontab_line(python="/env/bin/python", recipe="/srv/a.yaml", log="/srv/a.log",
    ...              day=5, tag="a")
    '0 3 5 * * /env/bin/python -m covextract run /srv/a.yaml >> /srv/a.log 2>&1 # covextract:a'
    """
    _check_time(day=day, hour=hour, minute=minute, every=every)
    tag = _check_tag(default_tag(recipe) if tag is None else tag)
    if every == "month":
        when = f"{minute} {hour} {day} * *"
    elif every == "week":
        when = f"{minute} {hour} * * {day}"
    else:
        when = f"{minute} {hour} * * *"
    command = refresh_command(python=python, recipe=recipe, log=log).replace("%", "\\%")
    return f"{when} {command} # covextract:{tag}"


def _on_calendar(*, day: int, hour: int, minute: int, every: str) -> str:
    time = f"{hour:02d}:{minute:02d}:00"
    if every == "month":
        return f"*-*-{day:02d} {time}"
    if every == "week":
        return f"{_WEEKDAYS[day]} *-*-* {time}"
    return f"*-*-* {time}"


def _unit_escape(text: str) -> str:
    # In unit files '%' starts a specifier and '$' an environment variable
    # (systemd.unit(5), systemd.service(5)); doubling them keeps them literal.
    return text.replace("%", "%%").replace("$", "$$")


def systemd_units(
    *,
    python: str,
    recipe: str | os.PathLike,
    log: str | os.PathLike,
    day: int = 1,
    hour: int = 3,
    minute: int = 0,
    every: str = "month",
    name: str | None = None,
) -> dict[str, str]:
    """A oneshot service and its timer that run ``covextract refresh`` on the recipe.

    Parameters are those of :func:`crontab_line`; ``name`` (default
    :func:`default_tag` of the recipe) names the units.

    Returns
    -------
    dict
        ``{"covextract-<name>.service": text, "covextract-<name>.timer": text}``.
        The service runs the command through ``/bin/sh -c`` so the log
        redirect works, in the recipe's folder. The timer has
        ``Persistent=true``: a run missed while the machine was off happens
        at the next boot.
    """
    _check_time(day=day, hour=hour, minute=minute, every=every)
    name = _check_tag(default_tag(recipe) if name is None else name, key="name")
    command = refresh_command(python=python, recipe=recipe, log=log)
    folder = str(Path(recipe).resolve().parent)
    # Double quotes with C-style escapes are systemd's own quoting in ExecStart
    # (systemd.service(5), "Command lines").
    quoted = '"' + command.replace("\\", "\\\\").replace('"', '\\"') + '"'
    service_name = f"covextract-{name}.service"
    description = _unit_escape(f"covextract {VERB} of {Path(recipe).resolve()}")
    service = (
        "[Unit]\n"
        f"Description={description}\n"
        "\n"
        "[Service]\n"
        "Type=oneshot\n"
        f"WorkingDirectory={_unit_escape(folder)}\n"
        f"ExecStart=/bin/sh -c {_unit_escape(quoted)}\n"
    )
    timer = (
        "[Unit]\n"
        f"Description={description} ({_ADVERB[every]})\n"
        "\n"
        "[Timer]\n"
        f"OnCalendar={_on_calendar(day=day, hour=hour, minute=minute, every=every)}\n"
        "Persistent=true\n"
        f"Unit={service_name}\n"
        "\n"
        "[Install]\n"
        "WantedBy=timers.target\n"
    )
    return {service_name: service, f"covextract-{name}.timer": timer}


def _is_tagged(line: str, tag: str) -> bool:
    return re.search(r"#\s*covextract:" + re.escape(tag) + r"\s*$", line) is not None


def install_crontab(line: str, tag: str, *, crontab: str = "crontab", run=subprocess.run) -> str:
    """Put ``line`` into the current user's crontab, replacing only the line tagged ``tag``.

    Reads ``crontab -l`` (no crontab yet counts as empty), keeps every other
    line as it is, including lines of other covextract tags, replaces the
    first line ending in ``# covextract:<tag>`` (dropping any duplicates of
    it) or appends ``line`` when there is none, and writes the result with
    ``crontab -``.

    Parameters
    ----------
    line : str
        A line from :func:`crontab_line`; it must end with the tag comment.
    tag : str
        Its tag.
    crontab : str
        The crontab program.
    run : callable
        ``subprocess.run`` or a stand-in with the same signature.

    Returns
    -------
    str
        The crontab text now installed.

    Raises
    ------
    OutputError
        When the crontab cannot be read or written.
    """
    _check_tag(tag)
    if "\n" in line or not _is_tagged(line, tag):
        raise _problem(
            f"the crontab line must be one line ending in '# covextract:{tag}'; "
            "build it with crontab_line(..., tag=...).",
            "line",
        )
    try:
        listed = run([crontab, "-l"], capture_output=True, text=True)
    except OSError as exc:
        raise OutputError(
            f"cannot run {crontab!r} to read the crontab ({exc}); install cron, or use "
            "--systemd and install the units by hand."
        ) from exc
    if listed.returncode == 0:
        current = listed.stdout
    elif "no crontab" in (listed.stderr or "").lower():
        # cron's own wording for a user without a crontab (exit 1): an empty crontab.
        current = ""
    else:
        raise OutputError(
            f"'{crontab} -l' failed (exit {listed.returncode}): {(listed.stderr or '').strip()}; "
            "nothing was installed."
        )
    kept: list[str] = []
    replaced = False
    for old in current.splitlines():
        if _is_tagged(old, tag):
            if not replaced:
                kept.append(line)
                replaced = True
            continue
        kept.append(old)
    if not replaced:
        kept.append(line)
    new_text = "\n".join(kept) + "\n"
    try:
        written = run([crontab, "-"], input=new_text, capture_output=True, text=True)
    except OSError as exc:
        raise OutputError(f"cannot run {crontab!r} to write the crontab ({exc}).") from exc
    if written.returncode != 0:
        raise OutputError(
            f"'{crontab} -' refused the new crontab (exit {written.returncode}): "
            f"{(written.stderr or '').strip()}; the old crontab is unchanged."
        )
    return new_text
