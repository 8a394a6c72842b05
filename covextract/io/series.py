"""Layer series: one raster per period found by a path template, or a NetCDF cube.

A series is a layer with a time axis. It comes either as separate rasters
whose names carry their date (``rasters/rain_{year}{month:02d}.tif`` with
``every: month``), found by :func:`discover_series`, or as one NetCDF file
with a time dimension, opened by :func:`open_cube`. Both give a
:class:`SeriesIndex`: the sorted :class:`Period` steps that exist, the gaps
between the first and the last, and for each period a raster source with the
engine's protocol (``grid``, ``read_block(window)``, ``to_values(stored)``,
picklable), so the engine never learns where a period's pixels came from.

Conventions
-----------
- Dates are calendar dates (:class:`datetime.date`); a period runs from its
  ``start`` to its ``end`` inclusive (whole days).
- Labels: ``"2021-03"`` for months, ``"2021"`` for years, the ISO start date
  (``"2021-03-17"``) for days and N-day composites.
- N-day composites (``every: 16 days``) are counted from the first file's
  date: every period starts a whole number of N days after it. Composites
  that start again on 1 January every year (``every: 16 days restarting each
  year``) end their last period of a year on 31 December, whatever its length.
"""

from __future__ import annotations

import datetime as dt
import math
import os
import re
import string
import threading
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from covextract.engine.grid import Grid
from covextract.errors import InputFileError, RasterError, RecipeError
from covextract.io.rasters import RasterSource, _check_path, open_layer

__all__ = [
    "TEMPLATE_FIELDS",
    "Period",
    "Step",
    "SeriesIndex",
    "CubeSource",
    "parse_every",
    "parse_selection",
    "template_fields",
    "discover_series",
    "open_cube",
]

#: Date fields a path template may use.
TEMPLATE_FIELDS = ("year", "month", "day", "doy")

#: Digits a field needs at most (doy: day of the year, 1..366).
_FIELD_DIGITS = {"year": 4, "month": 2, "day": 2, "doy": 3}

#: Calendars whose dates are the Gregorian calendar dates study records use.
_GREGORIAN = {"standard", "gregorian", "proleptic_gregorian"}

#: How many names to show when listing files or problems in a message.
_SHOW = 8

_DAY = dt.timedelta(days=1)


# --------------------------------------------------------------------- periods
@dataclass(frozen=True, order=True)
class Period:
    """One step of a series.

    Parameters
    ----------
    start : datetime.date
        First day of the period.
    end : datetime.date
        Last day of the period (inclusive).
    label : str
        ``"2021-03"`` (month), ``"2021"`` (year) or ``"2021-03-17"`` (day or
        N-day composite, its start date).
    """

    start: dt.date
    end: dt.date
    label: str

    def __post_init__(self):
        if self.end < self.start:
            raise ValueError(
                f"period {self.label!r} ends ({self.end}) before it starts ({self.start})"
            )

    @property
    def days(self) -> int:
        """Length in days (start and end included)."""
        return (self.end - self.start).days + 1

    def __str__(self) -> str:
        return self.label


@dataclass(frozen=True)
class Step:
    """The length of each period of a series.

    Parameters
    ----------
    unit : {"day", "month", "year"}
        Calendar unit.
    count : int
        Number of days per period (composites); 1 for months and years.
    restart_yearly : bool
        For N-day composites: periods start again on 1 January each year,
        and the last period of a year ends on 31 December.
    """

    unit: str
    count: int = 1
    restart_yearly: bool = False

    @property
    def text(self) -> str:
        """The step as written in a recipe (``"month"``, ``"16 days"``)."""
        if self.unit != "day" or self.count == 1:
            return self.unit
        return f"{self.count} days" + (" restarting each year" if self.restart_yearly else "")

    def __str__(self) -> str:
        return self.text

    @property
    def is_composite(self) -> bool:
        """True for N-day periods with N > 1."""
        return self.unit == "day" and self.count > 1

    def start_of(self, day: dt.date, anchor: dt.date | None = None) -> dt.date:
        """Start of the period that contains ``day``.

        ``anchor`` is a start of the series (its first period); continuous
        N-day composites need it.
        """
        if self.unit == "year":
            return dt.date(day.year, 1, 1)
        if self.unit == "month":
            return dt.date(day.year, day.month, 1)
        if self.count == 1:
            return day
        if self.restart_yearly:
            jan1 = dt.date(day.year, 1, 1)
            return jan1 + dt.timedelta(days=((day - jan1).days // self.count) * self.count)
        if anchor is None:
            raise ValueError("continuous N-day periods need the series' first start date")
        return anchor + dt.timedelta(days=((day - anchor).days // self.count) * self.count)

    def next_start(self, start: dt.date) -> dt.date:
        """Start of the period after the one starting on ``start``."""
        if self.unit == "year":
            return dt.date(start.year + 1, 1, 1)
        if self.unit == "month":
            return dt.date(start.year + start.month // 12, start.month % 12 + 1, 1)
        nxt = start + dt.timedelta(days=self.count)
        if self.restart_yearly and nxt.year != start.year:
            return dt.date(start.year + 1, 1, 1)
        return nxt

    def period(self, start: dt.date) -> Period:
        """Return the period starting on ``start`` (which must be a period start)."""
        end = self.next_start(start) - _DAY
        if self.unit == "year":
            label = f"{start.year:04d}"
        elif self.unit == "month":
            label = f"{start.year:04d}-{start.month:02d}"
        else:
            label = start.isoformat()
        return Period(start, end, label)


_EVERY = re.compile(
    r"(?:(?P<n>\d+)\s*)?(?P<unit>days?|months?|years?)(?P<restart>\s+restarting\s+each\s+year)?\Z"
)


def parse_every(text) -> Step:
    """Parse the length of a series' periods.

    Parameters
    ----------
    text : str or Step
        ``"month"``, ``"year"``, ``"day"``, or a number of days such as
        ``"16 days"`` (composites counted from the first file's date);
        ``"16 days restarting each year"`` for composites that start again
        on 1 January every year.

    Raises
    ------
    RecipeError
        The text is none of these.
    """
    if isinstance(text, Step):
        return text
    hint = (
        "write month, year, day, or a number of days such as '16 days' for composites "
        "(add 'restarting each year' when they start again on 1 January)"
    )
    if not isinstance(text, str):
        raise RecipeError(f"every: {text!r} is not a period length; {hint}")
    m = _EVERY.match(" ".join(text.lower().split()))
    if m is None:
        raise RecipeError(f"every: {text!r} is not a period length; {hint}")
    unit = m["unit"].rstrip("s")
    n = int(m["n"]) if m["n"] is not None else 1
    if unit != "day" and n != 1:
        raise RecipeError(
            f"every: {text!r}: only days can be counted (periods of several months or years "
            f"are not supported); {hint}"
        )
    if n < 1:
        raise RecipeError(f"every: {text!r}: the number of days must be at least 1")
    restart = m["restart"] is not None
    if restart and (unit != "day" or n == 1):
        raise RecipeError(
            f"every: {text!r}: 'restarting each year' only applies to composites of several days"
        )
    return Step(unit, n, restart)


# ------------------------------------------------------------------- templates
@dataclass(frozen=True)
class _Field:
    """One ``{name:spec}`` of a path template."""

    name: str
    width: int | None
    text: str

    def regex(self) -> str:
        digits = _FIELD_DIGITS[self.name]
        if self.name == "year":
            # Years are written with four digits however the field is padded
            # (years 1000-9999); fewer would let "{year}{month}" read 2020 as 20 and 20.
            return rf"(\d{{{max(self.width or 4, 4)}}})"
        if self.width is None:
            return rf"(\d{{1,{digits}}})"
        if self.width >= digits:
            return rf"(\d{{{self.width}}})"
        return rf"(\d{{{self.width},{digits}}})"


_SPEC = re.compile(r"(?P<zero>0?)(?P<width>[1-9]\d*)?d?\Z")


def _parse_template(template: str) -> list:
    """Literal strings and :class:`_Field` pieces of ``template``."""
    if not isinstance(template, str | os.PathLike):
        raise RecipeError(f"series template {template!r} is not a path")
    template = os.fspath(template)
    try:
        parsed = list(string.Formatter().parse(template))
    except ValueError as exc:
        raise RecipeError(
            f"series template {template!r} is not a valid template ({exc}); date fields are "
            "written in braces, such as {year} or {month:02d}; a literal brace is doubled ({{)"
        ) from None
    pieces: list = []
    allowed = ", ".join("{" + f + "}" for f in TEMPLATE_FIELDS)
    for literal, name, spec, conversion in parsed:
        if literal:
            pieces.append(literal)
        if name is None:
            continue
        shown = (
            "{"
            + name
            + (f"!{conversion}" if conversion else "")
            + (f":{spec}" if spec else "")
            + "}"
        )
        if name == "" or name.isdigit():
            raise RecipeError(
                f"series template {template!r}: {shown} has no field name; use one of {allowed}"
            )
        if name not in TEMPLATE_FIELDS:
            raise RecipeError(
                f"series template {template!r}: unknown field {shown}; the date fields are "
                f"{allowed}"
            )
        if conversion:
            raise RecipeError(
                f"series template {template!r}: {shown} has a conversion (!{conversion}), which "
                f"date fields do not take; write {{{name}}} or {{{name}:02d}}"
            )
        m = _SPEC.match(spec or "")
        if m is None or (m["width"] and not m["zero"]):
            raise RecipeError(
                f"series template {template!r}: format {shown} is not supported; date fields "
                f"take an optional zero-padded width, such as {{{name}:0{_FIELD_DIGITS[name]}d}}"
            )
        pieces.append(_Field(name, int(m["width"]) if m["width"] else None, shown))
    return pieces


def template_fields(template) -> set[str]:
    """Date fields that a path template uses.

    Parameters
    ----------
    template : str
        A path with date fields in Python format syntax, such as
        ``rain_{year}{month:02d}.tif`` or ``{year}_{doy:03d}.tif``. Fields are
        ``year``, ``month``, ``day`` and ``doy`` (day of the year, 1 = 1
        January); each takes an optional zero-padded width (``:02d``, ``:03d``).

    Returns
    -------
    set of str

    Raises
    ------
    RecipeError
        An unknown field, a positional ``{}``, a conversion, a format spec
        other than a zero-padded width, or unbalanced braces.
    """
    return {p.name for p in _parse_template(template) if isinstance(p, _Field)}


def _check_fields(fields: set[str], step: Step, template: str) -> None:
    """Check that every template field can be filled by ``step``, and enough of them."""
    every = f"every: {step.text}"
    if not fields:
        raise RecipeError(
            f"series template {template!r} has no date field, so it names one file, not a "
            "series; put {year} and, for monthly series, {month:02d} where the date is in "
            "the file names"
        )
    if "year" not in fields:
        raise RecipeError(
            f"series template {template!r} has no {{year}} field; the date of each file needs "
            "its year"
        )
    if step.unit == "year":
        extra = sorted(fields - {"year"})
        what = "a yearly series has one file per year"
    elif step.unit == "month":
        extra = sorted(fields & {"day", "doy"})
        what = "a monthly series has one file per month"
    else:
        extra = []
        what = ""
    if extra:
        names = " and ".join("{" + f + "}" for f in extra)
        finer = "every: day (or a number of days)" if step.unit == "month" else "every: month"
        raise RecipeError(
            f"series template {template!r} uses {names}, which {every} cannot fill: {what}. "
            f"Remove {names} from the template, or set {finer}."
        )
    if step.unit == "month" and "month" not in fields:
        raise RecipeError(
            f"series template {template!r} has no {{month}} field, which {every} needs to tell "
            "the months apart; add {month:02d}, or set every: year"
        )
    if step.unit == "day" and "doy" not in fields and not {"month", "day"} <= fields:
        raise RecipeError(
            f"series template {template!r} cannot tell days apart, which {every} needs: add "
            "{doy:03d} (day of the year) or both {month:02d} and {day:02d}"
        )


def _example_name(pieces: list) -> str:
    """Return a name the template makes, for messages (an invented date)."""
    day = dt.date(2021, 3, 17)
    return _render(
        pieces,
        {"year": day.year, "month": day.month, "day": day.day, "doy": day.timetuple().tm_yday},
    )


def _render(pieces: list, values: dict) -> str:
    out = []
    for p in pieces:
        if isinstance(p, _Field):
            out.append(f"{values[p.name]:0{p.width}d}" if p.width else str(values[p.name]))
        else:
            out.append(p)
    return "".join(out)


@dataclass
class _Component:
    """One path component of a template (between separators)."""

    text: str
    pieces: list
    regex: re.Pattern | None  # None for a literal component

    @classmethod
    def of(cls, text: str) -> _Component:
        pieces = _parse_template(text)
        if not any(isinstance(p, _Field) for p in pieces):
            return cls(text, pieces, None)
        rx = "".join(p.regex() if isinstance(p, _Field) else re.escape(p) for p in pieces)
        return cls(text, pieces, re.compile(rx + r"\Z"))

    def match(self, name: str, known: dict) -> dict | None:
        """Field values if ``name`` is exactly what the template makes for them."""
        m = self.regex.match(name)
        if m is None:
            return None
        values = dict(known)
        fields = [p for p in self.pieces if isinstance(p, _Field)]
        for f, text in zip(fields, m.groups(), strict=True):
            v = int(text)
            if values.setdefault(f.name, v) != v:
                return None  # the same field with two values ({year}/{year}{month:02d})
        # Unpadded fields can match padded digits ("03" for {month}); only the
        # name the template itself would write counts.
        return values if _render(self.pieces, values) == name else None


def _listdir(folder: Path) -> list[str] | None:
    try:
        return sorted(os.listdir(folder))
    except (FileNotFoundError, NotADirectoryError):
        return None
    except PermissionError as exc:
        raise InputFileError(
            f"folder {folder} of a series cannot be listed ({exc}); check its permissions"
        ) from exc


def _walk(base: Path, components: list[_Component]):
    """Files matching the template components below ``base`` and where matching stopped."""
    candidates = [(base, {})]
    misses = []
    for depth, comp in enumerate(components):
        last = depth == len(components) - 1
        found = []
        for folder, values in candidates:
            if comp.regex is None:
                path = folder / comp.text
                ok = path.is_file() if last else path.is_dir()
                if ok:
                    found.append((path, values))
                else:
                    misses.append((depth, folder, comp, last))
                continue
            entries = _listdir(folder)
            if entries is None:
                misses.append((depth, folder, comp, last))
                continue
            hits = 0
            for name in entries:
                got = comp.match(name, values)
                if got is None:
                    continue
                path = folder / name
                if path.is_file() if last else path.is_dir():
                    found.append((path, got))
                    hits += 1
            if not hits:
                misses.append((depth, folder, comp, last))
        candidates = found
    return candidates, misses


def _no_match_error(template: str, misses) -> InputFileError:
    depth, folder, comp, last = max(misses, key=lambda m: m[0])
    if comp.regex is None and not last and _listdir(folder) is not None:
        folder = folder / comp.text  # the literal folder the template names is missing
    entries = _listdir(folder)
    if entries is None:
        return InputFileError(
            f"no file matches the series template {template!r}: folder {folder.absolute()} "
            "does not exist. Check the path in the recipe; relative paths are relative to the "
            "recipe's folder."
        )
    if comp.regex is None:
        looked = f"there is no file {comp.text!r}"
    else:
        looked = (
            f"looked for names like {_example_name(comp.pieces)!r} (pattern {comp.text!r}, "
            f"regular expression {comp.regex.pattern!r})"
        )
    if entries:
        shown = ", ".join(entries[:_SHOW]) + (
            f", … ({len(entries)} entries)" if len(entries) > _SHOW else ""
        )
        holds = f"the folder holds: {shown}"
    else:
        holds = "the folder is empty"
    return InputFileError(
        f"no file matches the series template {template!r} in folder {folder.absolute()}: "
        f"{looked}; {holds}. Check the template's date fields and their zero padding "
        "({month:02d} writes March as 03)."
    )


def _date_of(values: dict, path: Path) -> dt.date:
    """Return the calendar date the field values of ``path`` name."""
    y = values["year"]
    try:
        if "doy" in values:
            doy = values["doy"]
            days_in_year = 366 if (y % 4 == 0 and (y % 100 != 0 or y % 400 == 0)) else 365
            if not 1 <= doy <= days_in_year:
                raise ValueError(f"day of the year {doy} is not in 1..{days_in_year}")
            day = dt.date(y, 1, 1) + dt.timedelta(days=doy - 1)
            for key in ("month", "day"):
                if key in values and values[key] != getattr(day, key):
                    raise ValueError(
                        f"{key} {values[key]} does not agree with day of the year {doy} ({day})"
                    )
            return day
        return dt.date(y, values.get("month", 1), values.get("day", 1))
    except ValueError as exc:
        shown = ", ".join(f"{k}={v}" for k, v in values.items())
        raise RasterError(
            f"series file {path} matches the template but its date fields ({shown}) name no "
            f"calendar date: {exc}. Rename or remove the file."
        ) from None


def _check_starts(step: Step, dated: list[tuple[dt.date, str]], what: str) -> None:
    """Every date must start a period of ``step`` counted from the first date."""
    if not step.is_composite:
        return
    anchor, first = min(dated)
    bad = [(d, name) for d, name in sorted(dated) if step.start_of(d, anchor) != d]
    if not bad:
        return
    lines = []
    for d, name in bad[:5]:
        prev = step.start_of(d, anchor)
        lines.append(f"{name} ({d}): expected {prev} or {step.next_start(prev)}")
    more = f" and {len(bad) - 5} more" if len(bad) > 5 else ""
    if step.restart_yearly:
        counted = f"counted from 1 January of each year ({step.count} days apart)"
    else:
        counted = f"{step.count} days apart counted from the first, {first} ({anchor})"
    hint = "Rename or remove these, or check every:."
    restart = Step("day", step.count, True)
    if not step.restart_yearly and all(restart.start_of(d) == d for d, _ in dated):
        hint = (
            f"The dates fit composites that start again on 1 January every year: set "
            f"every: '{restart.text}'."
        )
    raise RasterError(
        f"{what} dates must be starts of '{step.text}' periods, {counted}; these are not: "
        + "; ".join(lines)
        + more
        + f". {hint}"
    )


def discover_series(
    template, every, *, base_dir=None, open_options: dict | None = None
) -> SeriesIndex:
    """Find the files of a series named by a path template.

    The folders the template names are listed and each entry is matched
    against the template turned into a regular expression (dates are read
    from names, never guessed by trying every date). A name counts only when
    the template, filled with the date read from it, gives back exactly that
    name.

    Parameters
    ----------
    template : str
        Path with date fields (:func:`template_fields`), such as
        ``rasters/rain_{year}{month:02d}.tif``; fields may also stand in
        folder names (``{year}/ndvi_{year}_{doy:03d}.tif``).
    every : str or Step
        Period length (:func:`parse_every`). Monthly series may use only
        ``{year}`` and ``{month}``, yearly series only ``{year}``; daily and
        N-day series need ``{doy}`` or ``{month}`` and ``{day}``.
    base_dir : str or Path, optional
        Folder that relative templates start from (the recipe's folder);
        the current folder when omitted.
    open_options : dict, optional
        Keyword arguments for :func:`~covextract.io.rasters.open_layer` used
        when a period's file is opened (``band``, ``nodata``, ``scale``,
        ``offset``, ``valid_range``, ``crs``, ``ceiling``, ``name``).

    Returns
    -------
    SeriesIndex
        Files are not opened until a period's source or the grids are asked for.

    Raises
    ------
    RecipeError
        A bad template or step, or a template field the step cannot fill.
    InputFileError
        No file matches the template (the message names the folder, the
        pattern and a few of the files that are there).
    RasterError
        A file's name gives no calendar date, or its date is not a start of
        a period (composites: not a whole number of N days after the first).
    """
    step = parse_every(every)
    template = os.fspath(template)
    fields = template_fields(template)
    _check_fields(fields, step, template)
    parts = Path(template).parts
    if Path(template).is_absolute():
        base, parts = Path(parts[0]), parts[1:]
    else:
        base = Path(base_dir) if base_dir is not None else Path(".")
    components = [_Component.of(p) for p in parts]
    files, misses = _walk(base, components)
    if not files:
        raise _no_match_error(template, misses)
    dated = [(_date_of(values, path), path) for path, values in files]
    _check_starts(step, [(d, p.name) for d, p in dated], "series file")
    paths = {step.period(d): p for d, p in dated}
    return SeriesIndex(step, _FileBackend(paths, dict(open_options or {})), origin=template)


# ------------------------------------------------------------------ selection
_ENDPOINT = re.compile(r"(?P<y>\d{4})(?:-(?P<m>\d{1,2})(?:-(?P<d>\d{1,2}))?)?\Z")

_SPEC_HINT = (
    "write a year (2015), a month (2019-01) or a day (2019-01-05), or a range A..B of "
    "these with either end left open (2019-01..2020-12, 2019-01.., ..2020)"
)


def _endpoint(text: str, spec) -> tuple[dt.date, dt.date]:
    m = _ENDPOINT.match(text.strip())
    if m is None:
        raise RecipeError(f"periods {spec!r}: {text.strip()!r} is not a date; {_SPEC_HINT}")
    y = int(m["y"])
    try:
        if m["d"] is not None:
            day = dt.date(y, int(m["m"]), int(m["d"]))
            return day, day
        if m["m"] is not None:
            mo = int(m["m"])
            first = dt.date(y, mo, 1)
            return first, Step("month").next_start(first) - _DAY
        return dt.date(y, 1, 1), dt.date(y, 12, 31)
    except ValueError as exc:
        raise RecipeError(
            f"periods {spec!r}: {text.strip()!r} is no calendar date ({exc})"
        ) from None


def parse_selection(spec) -> tuple[dt.date | None, dt.date | None]:
    """Return the date interval a period selection names.

    Parameters
    ----------
    spec : str, int or datetime.date
        ``"2019-01..2020-12"``, ``"2019-01.."`` (open end), ``"..2020"``
        (open start), or one year, month or day (``"2015"``, ``2015``,
        ``"2019-03"``). Each end stands for its whole year, month or day.

    Returns
    -------
    (first day, last day)
        Inclusive; ``None`` for an open end.

    Raises
    ------
    RecipeError
        Not a selection, or a range that ends before it starts.
    """
    if isinstance(spec, dt.datetime):
        spec = spec.date()
    if isinstance(spec, dt.date):
        return spec, spec
    if isinstance(spec, bool) or not isinstance(spec, str | int):
        raise RecipeError(f"periods {spec!r} is not a period selection; {_SPEC_HINT}")
    text = str(spec).strip()
    if ".." not in text:
        return _endpoint(text, spec)
    left, sep, right = text.partition("..")
    if ".." in right:
        raise RecipeError(f"periods {spec!r} has more than one '..'; {_SPEC_HINT}")
    lo = _endpoint(left, spec)[0] if left.strip() else None
    hi = _endpoint(right, spec)[1] if right.strip() else None
    if lo is not None and hi is not None and hi < lo:
        raise RecipeError(f"periods {spec!r} ends before it starts; write the earlier end first")
    return lo, hi


# ----------------------------------------------------------------- the index
class SeriesIndex:
    """The periods of a series and a raster source for each.

    Attributes
    ----------
    step : Step
        Length of the periods.
    periods : list of Period
        Periods that have data, sorted by start.
    gaps : list of Period
        Periods of ``step`` between the first and the last period that have
        no data.
    origin : str
        The template or cube file the series comes from (for messages).
    """

    def __init__(self, step: Step, backend, *, origin: str):
        self.step = step
        self._backend = backend
        self.periods: list[Period] = sorted(backend.periods())
        self.gaps: list[Period] = _gaps(step, self.periods)
        self.origin = origin
        self._by_label = {p.label: p for p in self.periods}

    def __len__(self) -> int:
        return len(self.periods)

    def __repr__(self) -> str:
        span = f"{self.periods[0]}..{self.periods[-1]}" if self.periods else "empty"
        return (
            f"SeriesIndex({self.origin!r}, every {self.step.text}, {len(self.periods)} periods "
            f"{span}, {len(self.gaps)} gap(s))"
        )

    def _period(self, period) -> Period:
        found = self._by_label.get(period.label if isinstance(period, Period) else str(period))
        if found is None or (isinstance(period, Period) and found != period):
            span = f"{self.periods[0]} to {self.periods[-1]}" if self.periods else "none"
            gap = (
                " (it is a gap of the series)"
                if str(period) in {g.label for g in self.gaps}
                else ""
            )
            raise RasterError(
                f"period {str(period)!r} is not in the series {self.origin!r}{gap}; its periods "
                f"run {span}"
            )
        return found

    def source(self, period):
        """Raster source of one period.

        Parameters
        ----------
        period : Period or str
            A period of :attr:`periods`, or its label (``"2021-03"``).

        Returns
        -------
        RasterSource or CubeSource
            ``grid``, ``read_block(window)`` (stored values, north-up),
            ``to_values(stored)``; picklable.
        """
        return self._backend.source(self._period(period))

    def path(self, period) -> Path:
        """Return the file holding ``period``."""
        return self._backend.path(self._period(period))

    def where(self, period) -> str:
        """Where ``period`` is read from, for messages and codebooks."""
        return self._backend.where(self._period(period))

    def grids(self) -> dict[str, list[Period]]:
        """Periods grouped by grid.

        Returns
        -------
        dict
            Grid fingerprint (:attr:`Grid.fingerprint`) → the periods on that
            grid, in period order; grids ordered by their first period. Each
            group shares one weight build.
        """
        out: dict[str, list[Period]] = {}
        for p in self.periods:
            out.setdefault(self._backend.grid(p).fingerprint, []).append(p)
        return out

    def select(self, spec) -> list[Period]:
        """Periods of the series that start inside a selection.

        Parameters
        ----------
        spec : str, int or datetime.date
            See :func:`parse_selection`: ``"2019-01..2020-12"``,
            ``"2019-01.."``, ``"..2020"``, ``"2015"`` (on a monthly series,
            the twelve months of 2015). A period is selected when its start
            day falls in the interval, so a 16-day composite starting on
            27 December 2015 belongs to ``"2015"``.

        Returns
        -------
        list of Period
            In order; gaps are not included.

        Raises
        ------
        RecipeError
            A bad selection, or one that selects no period of the series.
        """
        lo, hi = parse_selection(spec)
        chosen = [
            p
            for p in self.periods
            if (lo is None or p.start >= lo) and (hi is None or p.start <= hi)
        ]
        if not chosen:
            span = f"{self.periods[0]} to {self.periods[-1]}" if self.periods else "no periods"
            raise RecipeError(
                f"periods {spec!r} selects none of the periods of series {self.origin!r} "
                f"(every {self.step.text}, {span}); choose dates inside the series"
            )
        return chosen


def _gaps(step: Step, periods: list[Period]) -> list[Period]:
    if not periods:
        return []
    have = {p.start for p in periods}
    out = []
    start, last = periods[0].start, periods[-1].start
    while start < last:
        if start not in have:
            out.append(step.period(start))
        start = step.next_start(start)
    return out


class _FileBackend:
    """Periods of a template series: one raster file each, opened on demand."""

    def __init__(self, paths: dict[Period, Path], options: dict):
        self._paths = paths
        self._options = options
        self._sources: dict[Period, RasterSource] = {}
        self._lock = threading.Lock()

    def periods(self):
        return list(self._paths)

    def path(self, period: Period) -> Path:
        return self._paths[period]

    def where(self, period: Period) -> str:
        return str(self._paths[period])

    def source(self, period: Period) -> RasterSource:
        with self._lock:
            src = self._sources.get(period)
        if src is None:
            src = open_layer(self._paths[period], **self._options)
            with self._lock:
                src = self._sources.setdefault(period, src)
        return src

    def grid(self, period: Period) -> Grid:
        return self.source(period).grid


# ------------------------------------------------------------------- the cube
class _CubeFile:
    """One variable of a NetCDF file, shared by the period sources of a cube.

    Rows and columns of the covextract grid map to the file's through
    ``row_index`` and ``col_index`` (flipped latitudes, rolled longitudes).
    The xarray dataset is opened once per process on first read and never
    pickled; reads go through xarray's lazy indexing, which holds its
    netCDF/HDF5 lock.
    """

    def __init__(self, path, engine, variable, dims, fixed, row_index, col_index):
        self.path = Path(path)
        self.engine = engine
        self.variable = variable
        self.time_dim, self.y_dim, self.x_dim = dims
        self.fixed = dict(fixed)
        self.row_index = np.asarray(row_index, dtype=np.int64)
        self.col_index = np.asarray(col_index, dtype=np.int64)
        self._ds = None
        self._lock = threading.Lock()

    def __getstate__(self):
        state = self.__dict__.copy()
        state["_ds"] = None  # file handles never travel between processes
        state.pop("_lock", None)
        return state

    def __setstate__(self, state):
        self.__dict__.update(state)
        self._lock = threading.Lock()

    def _variable(self):
        with self._lock:
            if self._ds is None:
                import xarray as xr

                self._ds = xr.open_dataset(
                    self.path,
                    engine=self.engine,
                    decode_times=False,
                    mask_and_scale=False,
                    cache=False,
                )
            return self._ds[self.variable]

    def read(self, time_index: int, window: tuple[int, int, int, int]) -> np.ndarray:
        r0, c0, h, w = window
        rows = self.row_index[r0 : r0 + h]
        cols = self.col_index[c0 : c0 + w]
        if rows.size != h or cols.size != w or r0 < 0 or c0 < 0:
            raise ValueError(f"window {window} is outside the cube's grid")
        var = self._variable()
        out = np.empty((h, w), dtype=var.dtype)
        for rsrc, rdst, rrev in _runs(rows):
            for csrc, cdst, crev in _runs(cols):
                sel = {self.time_dim: time_index, self.y_dim: rsrc, self.x_dim: csrc, **self.fixed}
                block = var.isel(sel).transpose(self.y_dim, self.x_dim).values
                out[rdst, cdst] = block[:: -1 if rrev else 1, :: -1 if crev else 1]
        return out

    def close(self) -> None:
        with self._lock:
            if self._ds is not None:
                self._ds.close()
                self._ds = None


def _runs(index: np.ndarray) -> list[tuple[slice, slice, bool]]:
    """Split file indices into contiguous runs: (file slice, output slice, reversed)."""
    out = []
    n = index.size
    start = 0
    while start < n:
        end = start + 1
        step = 1
        if end < n and abs(int(index[end]) - int(index[start])) == 1:
            step = int(index[end]) - int(index[start])
            while end < n and int(index[end]) - int(index[end - 1]) == step:
                end += 1
        lo, hi = int(index[start:end].min()), int(index[start:end].max())
        out.append((slice(lo, hi + 1), slice(start, end), step == -1 and end - start > 1))
        start = end
    return out


@dataclass
class CubeSource:
    """One time step of a NetCDF cube, with the engine's raster-source protocol.

    ``read_block(window)`` returns the stored (packed) numbers of the window
    on :attr:`grid`, north-up, whatever the file's latitude order or
    longitude range; ``to_values`` applies ``_FillValue``/``missing_value``,
    ``scale_factor``/``add_offset`` and the valid range exactly as for a
    GeoTIFF layer.

    netCDF and HDF5 reads hold a global lock (the libraries are not
    thread-safe), so blocks of a cube do not decode in parallel the way
    GeoTIFF blocks do; threads only overlap the reduction.

    Attributes
    ----------
    period : Period
        The period this time step holds.
    time_index : int
        0-based index along the file's time dimension.
    grid : Grid
        North-up lattice; longitudes in -180..180 when the file's 0..360
        grid covers the globe (see :func:`open_cube`).
    """

    cube: _CubeFile
    time_index: int
    period: Period
    grid: Grid
    dtype: str
    nodata: tuple[float, ...] = ()
    scale: float = 1.0
    offset: float = 0.0
    valid_range: tuple[float, float] | None = None
    ceiling: float | None = None

    @property
    def path(self) -> Path:
        """The cube file."""
        return self.cube.path

    @property
    def variable(self) -> str:
        """The variable read."""
        return self.cube.variable

    def read_block(self, window: tuple[int, int, int, int]) -> np.ndarray:
        """Read stored values of ``(row_off, col_off, rows, cols)`` on :attr:`grid`."""
        return self.cube.read(self.time_index, window)

    def to_values(self, stored: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Physical float64 values and the valid mask of a stored block."""
        # The GeoTIFF conversion itself, so a cube and the same numbers as
        # GeoTIFFs agree value for value.
        return RasterSource.to_values(self, stored)

    def close(self) -> None:
        """Close the cube's file handle in this process."""
        self.cube.close()


class _CubeBackend:
    def __init__(self, cube: _CubeFile, steps: dict[Period, int], grid: Grid, conv: dict):
        self._cube = cube
        self._steps = steps
        self._grid = grid
        self._conv = conv

    def periods(self):
        return list(self._steps)

    def path(self, period: Period) -> Path:
        return self._cube.path

    def where(self, period: Period) -> str:
        return (
            f"{self._cube.path} (variable {self._cube.variable}, {self._cube.time_dim} index "
            f"{self._steps[period]})"
        )

    def source(self, period: Period) -> CubeSource:
        return CubeSource(self._cube, self._steps[period], period, self._grid, **self._conv)

    def grid(self, period: Period) -> Grid:
        return self._grid


_ENGINES = ("netcdf4", "h5netcdf", "scipy")


def _open_dataset(path: Path, label: str):
    import xarray as xr

    installed = [e for e in _ENGINES if e in xr.backends.list_engines()]
    if not installed:
        raise InputFileError(
            f"{label} {path} cannot be read: no NetCDF reader is installed for xarray. Install "
            "netCDF4 (pip install netCDF4)."
        )
    errors = []
    for engine in installed:
        try:
            ds = xr.open_dataset(
                path, engine=engine, decode_times=False, mask_and_scale=False, cache=False
            )
        except Exception as exc:  # noqa: BLE001 - each engine fails in its own way
            errors.append(f"{engine}: {(str(exc).splitlines() or [type(exc).__name__])[0]}")
            continue
        return ds, engine
    raise InputFileError(
        f"{label} {path} cannot be opened as a NetCDF cube ({'; '.join(errors)}). Is it a "
        "NetCDF file?"
    )


def _looks(ds, dim: str) -> str | None:
    """'x', 'y' or 't' from a coordinate's CF attributes or name."""
    var = ds.variables.get(dim)
    attrs = var.attrs if var is not None else {}
    axis = str(attrs.get("axis", "")).upper()
    std = str(attrs.get("standard_name", "")).lower()
    units = str(attrs.get("units", "")).lower()
    name = dim.lower()
    if axis == "T" or std == "time" or " since " in units or name in ("time", "t"):
        return "t"
    if (
        axis == "X"
        or std in ("longitude", "projection_x_coordinate", "grid_longitude")
        or units in ("degrees_east", "degree_east", "degree_e", "degrees_e")
        or name in ("x", "lon", "longitude")
    ):
        return "x"
    if (
        axis == "Y"
        or std in ("latitude", "projection_y_coordinate", "grid_latitude")
        or units in ("degrees_north", "degree_north", "degree_n", "degrees_n")
        or name in ("y", "lat", "latitude")
    ):
        return "y"
    return None


def _axis(ds, dim: str, where: str) -> tuple[float, float, int]:
    """First centre, spacing and size of a regular coordinate."""
    var = ds.variables.get(dim)
    if var is None or var.ndim != 1:
        raise RasterError(
            f"{where}: dimension {dim!r} has no coordinate values, so the grid cannot be placed; "
            "the file needs 1-D coordinate variables for its spatial dimensions"
        )
    v = np.asarray(var.values, dtype=np.float64)
    if v.size < 2:
        raise RasterError(
            f"{where}: dimension {dim!r} has {v.size} value(s); a grid needs at least 2"
        )
    step = (v[-1] - v[0]) / (v.size - 1)
    # Coordinates stored as float32 carry rounding noise; 0.1 % of a pixel is
    # far below anything a real irregular grid shows.
    if not np.isfinite(step) or step == 0 or np.max(np.abs(np.diff(v) - step)) > 1e-3 * abs(step):
        raise RasterError(
            f"{where}: coordinate {dim!r} is not evenly spaced (a curvilinear or irregular grid); "
            "covextract needs a regular grid: regrid the cube first"
        )
    return float(v[0]), float(step), int(v.size)


def _cube_crs(ds, var, crs, where: str):
    from pyproj import CRS

    if crs is not None:
        try:
            return CRS.from_user_input(crs)
        except Exception as exc:  # noqa: BLE001 - pyproj raises its own error class
            raise RasterError(f"{where}: crs {crs!r} is not a CRS pyproj knows ({exc})") from None
    gm = var.attrs.get("grid_mapping") or var.encoding.get("grid_mapping")
    if gm:
        # CF also allows "name: coord coord ..." lists; the first mapping is used.
        name = str(gm).split(":")[0].split()[0]
        gvar = ds.variables.get(name)
        if gvar is None:
            raise RasterError(
                f"{where}: grid_mapping {gm!r} names a variable the file does not have; set crs: "
                "in the recipe"
            )
        try:
            return CRS.from_cf(dict(gvar.attrs))
        except Exception as exc:  # noqa: BLE001
            raise RasterError(
                f"{where}: grid mapping {name!r} cannot be read as a CRS ({exc}); set crs: in "
                "the recipe"
            ) from None
    looks_lonlat = any(
        _looks(ds, d) in ("x", "y") and d.lower().startswith(("lat", "lon")) for d in var.dims
    )
    example = (
        'crs: "EPSG:4326" if the coordinates are WGS84 degrees' if looks_lonlat else 'crs: "EPSG:…"'
    )
    raise RasterError(
        f"{where} has no CRS: the variable has no grid_mapping attribute. Add {example} to the "
        "layer in the recipe (crs= in open_cube), or add a CF grid mapping to the file."
    )


def _cf_dates(values, units, calendar, where: str):
    import cftime

    if not units or " since " not in str(units):
        raise RasterError(
            f"{where}: time values have no CF units such as 'days since 2000-01-01' (units: "
            f"{units!r}), so their dates are unknown"
        )
    try:
        return np.asarray(
            cftime.num2date(
                np.asarray(values),
                str(units),
                calendar=str(calendar),
                only_use_cftime_datetimes=True,
            ),
            dtype=object,
        )
    except Exception as exc:  # noqa: BLE001 - cftime raises ValueError or its own errors
        raise RasterError(
            f"{where}: time values cannot be read as dates (units {units!r}, calendar "
            f"{calendar!r}: {exc})"
        ) from None


def _midnight(c) -> bool:
    return c.hour == 0 and c.minute == 0 and c.second == 0 and c.microsecond == 0


def _exclusive_end(c):
    """Upper time bound as an exclusive midnight (inclusive bounds such as 23:59:59 round up)."""
    if _midnight(c):
        return c
    return c.replace(hour=0, minute=0, second=0, microsecond=0) + _DAY


def _calendar_date(c, where: str, calendar: str) -> dt.date:
    try:
        return dt.date(c.year, c.month, c.day)
    except ValueError:
        raise RasterError(
            f"{where}: {c.year:04d}-{c.month:02d}-{c.day:02d} of the {calendar} calendar is no "
            "calendar date; daily steps of this calendar cannot be matched to study dates"
        ) from None


def _classify_bounds(lo, hi, where: str) -> Step:
    """Return the step that time bounds describe."""
    ends = [_exclusive_end(h) for h in hi]
    if all(
        _midnight(a)
        and (a.month, a.day) == (1, 1)
        and (b.year, b.month, b.day) == (a.year + 1, 1, 1)
        for a, b in zip(lo, ends, strict=True)
    ):
        return Step("year")
    if all(
        _midnight(a)
        and a.day == 1
        and b.day == 1
        and (b.year * 12 + b.month) - (a.year * 12 + a.month) == 1
        for a, b in zip(lo, ends, strict=True)
    ):
        return Step("month")
    lengths = []
    for a, b in zip(lo, ends, strict=True):
        d = b - a
        lengths.append(d.days if d.seconds == 0 and d.microseconds == 0 and _midnight(a) else None)
    if None not in lengths:
        n = max(lengths)
        if all(x == n for x in lengths):
            return Step("day", n)
        if all(x == n or (b.month, b.day) == (1, 1) for x, b in zip(lengths, ends, strict=True)):
            return Step("day", n, restart_yearly=True)
    a, b = lo[0], hi[0]
    raise RasterError(
        f"{where}: the time bounds are not whole months, years, days or N-day periods (the "
        f"first runs from {a} to {b}); give every= ('month', '16 days', …) to say what each "
        "time step covers"
    )


def _infer_step(stamps, where: str) -> Step:
    """Return the step of time stamps without bounds: months, years or days only."""
    s = sorted(stamps)
    if len(s) < 2:
        raise RasterError(
            f"{where}: one time step and no time bounds, so the length of its period is unknown; "
            "give every= ('month', 'year', 'day', '16 days')"
        )
    gaps = [(b - a).total_seconds() / 86400 for a, b in zip(s, s[1:], strict=False)]
    years = {c.year for c in s}
    months = {(c.year, c.month) for c in s}
    days = {(c.year, c.month, c.day) for c in s}
    if len(years) == len(s) and min(gaps) >= 359:
        return Step("year")
    if len(months) == len(s) and min(gaps) >= 27:
        return Step("month")
    if len(days) == len(s) and 0.99 <= min(gaps) <= 1.01:
        return Step("day")
    raise RasterError(
        f"{where}: the time steps are neither months, years nor days apart and the file has no "
        "time bounds, so each step's period is unknown; add time bounds to the file or give "
        "every= ('16 days', …)"
    )


def _cube_periods(stamps, bounds, every, calendar: str, where: str) -> tuple[Step, list[Period]]:
    """Step and the period of each time index."""
    if bounds is not None:
        lo = [min(a, b) for a, b in bounds]
        hi = [max(a, b) for a, b in bounds]
        starts = lo
    else:
        lo = hi = None
        starts = list(stamps)
    if every is not None:
        step = parse_every(every)
    elif bounds is not None:
        step = _classify_bounds(lo, hi, where)
    else:
        step = _infer_step(starts, where)
    if step.unit == "day" and step.count > 1 and calendar not in _GREGORIAN:
        raise RasterError(
            f"{where}: {step.text} periods in the {calendar} calendar cannot be matched to "
            "calendar dates; only months, years and days can"
        )
    if step.unit == "day":
        dates = [
            _calendar_date(c, f"{where}, time index {i}", calendar) for i, c in enumerate(starts)
        ]
    else:
        # Months and years are matched by their calendar labels, so any
        # calendar works (a noleap February is February).
        dates = [dt.date(c.year, c.month if step.unit == "month" else 1, 1) for c in starts]
    _check_starts(
        step, [(d, f"time index {i}") for i, d in enumerate(dates)], f"{where}: time step"
    )
    anchor = min(dates)
    periods = [step.period(step.start_of(d, anchor)) for d in dates]
    seen: dict[Period, int] = {}
    for i, p in enumerate(periods):
        if p in seen:
            raise RasterError(
                f"{where}: time indexes {seen[p]} and {i} both fall in period {p.label} "
                f"(every {step.text}); give the right every=, or split the cube"
            )
        seen[p] = i
    return step, periods


def open_cube(
    path,
    *,
    variable: str,
    crs=None,
    time_name: str | None = None,
    every=None,
    nodata=None,
    scale: float | None = None,
    offset: float | None = None,
    valid_range=None,
    ceiling: float | None = None,
    name: str | None = None,
) -> SeriesIndex:
    """Open one variable of a NetCDF cube as a series.

    The file is opened with xarray (engine ``netcdf4``, else ``h5netcdf`` or
    ``scipy``, whichever is installed and reads it) without decoding, so
    blocks hold the stored numbers and :meth:`CubeSource.to_values` applies
    the CF packing (``_FillValue``, ``missing_value``, ``scale_factor``,
    ``add_offset``, ``valid_range`` / ``valid_min`` / ``valid_max`` in packed
    units).

    Time comes from the file: the time coordinate decoded with cftime in its
    own calendar (``noleap``, ``360_day``, … work), and its bounds (the
    ``bounds`` attribute, or a ``time_bnds`` / ``time_bounds`` variable) give
    each step's period: whole months, years, days or N-day periods. Without
    bounds, steps a month, a year or a day apart are recognised, each
    stamp belonging to the period that contains it (mid-month stamps are
    months). Months and years are matched by their labels in any calendar;
    days must be Gregorian calendar dates (a ``360_day`` 30 February is
    refused) and N-day periods need a Gregorian calendar.

    The grid is a covextract :class:`Grid`, north-up: ascending latitudes
    (south first) are flipped when blocks are read. A geographic grid given
    in 0..360 longitudes is converted to -180..180: a global grid is rolled
    (the columns east of 180° come first), a grid wholly east of 180° is
    shifted by -360°; so units at negative longitudes find their pixels.
    A regional grid that straddles 180° keeps its 0..360 coordinates (it
    cannot be rolled without a hole): units west of 180° then need
    longitudes above 180 to land on it. A global grid whose column edges do
    not fall on 180° keeps half a column beyond 180° on one side.

    netCDF/HDF5 reads hold a global lock, so a cube's blocks do not decode
    in parallel the way GeoTIFF blocks do.

    Parameters
    ----------
    path : str or Path
        NetCDF file (netCDF-4/HDF5 or netCDF-3).
    variable : str
        The data variable; its dimensions are time and two spatial
        dimensions (other dimensions must have length 1).
    crs : str, optional
        CRS of the grid; overrides the file's CF grid mapping (the
        variable's ``grid_mapping`` attribute, read by pyproj
        ``CRS.from_cf``). One of the two is required.
    time_name : str, optional
        The time dimension, when it is not recognisable (CF ``axis: T``,
        ``standard_name: time``, units "… since …", or named ``time``).
    every : str, optional
        Period length (:func:`parse_every`) when the file's bounds do not
        say it or are missing; each time stamp (or lower bound) then
        belongs to the period of ``every`` that contains it (N-day periods:
        that it starts).
    nodata, scale, offset, valid_range, ceiling :
        Override or add to the file's packing attributes, with the meaning
        of :func:`~covextract.io.rasters.open_layer` (``valid_range`` in
        physical units).
    name : str, optional
        Layer name, used in messages.

    Returns
    -------
    SeriesIndex
        Its sources are :class:`CubeSource` objects sharing one file handle
        per process.

    Raises
    ------
    InputFileError
        The file is missing or no installed engine reads it.
    RasterError
        No such variable, no time axis (the message lists the variable's
        dimensions), no CRS, an irregular grid, unreadable times, two time
        steps in one period.
    """
    path = Path(path)
    label = f"cube of layer {name!r}" if name else "cube"
    _check_path(path, label)
    ds, engine = _open_dataset(path, label)
    try:
        return _open_cube(
            ds,
            engine,
            path,
            label,
            variable,
            crs,
            time_name,
            every,
            nodata,
            scale,
            offset,
            valid_range,
            ceiling,
        )
    finally:
        ds.close()


def _open_cube(
    ds,
    engine,
    path,
    label,
    variable,
    crs,
    time_name,
    every,
    nodata,
    scale,
    offset,
    valid_range,
    ceiling,
) -> SeriesIndex:
    if variable not in ds.data_vars:
        names = ", ".join(repr(str(v)) for v in ds.data_vars) or "none"
        raise RasterError(
            f"{label} {path} has no variable {variable!r}; its data variables are: {names}. "
            "Set variable: to one of them."
        )
    var = ds[variable]
    where = f"{label} {path}, variable {variable!r}"
    dims = [str(d) for d in var.dims]
    shown_dims = ", ".join(f"{d} ({var.sizes[d]})" for d in dims) or "none"
    if time_name is not None:
        if time_name not in dims:
            raise RasterError(
                f"{where} has no dimension {time_name!r}: its dimensions are {shown_dims}"
            )
        tdim = time_name
    else:
        tdims = [d for d in dims if _looks(ds, d) == "t"]
        if not tdims:
            raise RasterError(
                f"{where} has no time axis: its dimensions are {shown_dims}. A series needs "
                "one; name it with time_name= if it is not recognised, or use the file as a "
                "single raster layer."
            )
        tdim = tdims[0]
    others = [d for d in dims if d != tdim]
    fixed = {}
    if len(others) > 2:
        fixed = {d: 0 for d in others if var.sizes[d] == 1}
        others = [d for d in others if d not in fixed]
    if len(others) != 2:
        raise RasterError(
            f"{where} has dimensions {shown_dims}; a cube needs time and exactly two spatial "
            "dimensions (others of length 1)"
        )
    kinds = [_looks(ds, d) for d in others]
    if kinds == ["x", "y"]:
        xdim, ydim = others
    else:
        ydim, xdim = others  # CF order (T, Y, X)

    x0, dx, width = _axis(ds, xdim, where)
    y0, dy, height = _axis(ds, ydim, where)
    grid_crs = _cube_crs(ds, var, crs, where)

    col_index = np.arange(width)
    x_flipped = dx < 0
    if x_flipped:
        col_index = col_index[::-1]
        x0, dx = x0 + dx * (width - 1), -dx
    row_index = np.arange(height)
    if dy > 0:  # south first: the grid is north-up, so rows are read bottom to top
        row_index = row_index[::-1]
        top = y0 + dy * (height - 1) + dy / 2
    else:
        top = y0 - dy / 2
    west = x0 - dx / 2
    rolled = False
    if grid_crs.is_geographic and west + dx * width > 180 + 1e-9 * dx:
        if west >= 180 - 1e-9 * dx:
            west -= 360.0
        elif abs(dx * width - 360.0) <= 1e-6 * 360.0:
            k = int(round((180.0 - west) / dx))
            k = min(max(k, 0), width)
            col_index = np.roll(col_index, -k)
            west = west + k * dx - 360.0
            rolled = k not in (0, width)
    from affine import Affine

    transform = Affine(dx, 0.0, west, 0.0, -abs(dy), top)
    chunks = var.encoding.get("chunksizes")
    chunk = dict(zip(dims, chunks, strict=False)) if chunks else {}
    block_rows = int(chunk.get(ydim, 1))
    block_cols = width if rolled or x_flipped else int(chunk.get(xdim, width))
    grid = Grid(transform, width, height, grid_crs, (block_rows, block_cols))

    conv = _packing(var, nodata, scale, offset, valid_range, ceiling)

    tvar = ds.variables.get(tdim)
    if tvar is None or tvar.ndim != 1:
        raise RasterError(f"{where}: time dimension {tdim!r} has no coordinate values")
    units = tvar.attrs.get("units")
    cal = str(tvar.attrs.get("calendar", "standard")).lower()
    stamps = _cf_dates(tvar.values, units, cal, f"{where}, time {tdim!r}")
    bname = tvar.attrs.get("bounds")
    if not bname:
        bname = next(
            (
                n
                for n in (f"{tdim}_bnds", f"{tdim}_bounds", "time_bnds", "time_bounds")
                if n in ds.variables
            ),
            None,
        )
    bounds = None
    if bname:
        bvar = ds.variables.get(bname)
        if bvar is None or bvar.shape != (tvar.size, 2):
            raise RasterError(
                f"{where}: time bounds {bname!r} are missing or not of shape (time, 2)"
            )
        bounds = _cf_dates(
            bvar.values,
            bvar.attrs.get("units", units),
            str(bvar.attrs.get("calendar", cal)).lower(),
            f"{where}, bounds {bname!r}",
        )
    step, periods = _cube_periods(stamps, bounds, every, cal, where)
    cube = _CubeFile(path, engine, variable, (tdim, ydim, xdim), fixed, row_index, col_index)
    steps = {p: i for i, p in enumerate(periods)}
    return SeriesIndex(step, _CubeBackend(cube, steps, grid, conv), origin=str(path))


def _scalar(v) -> float:
    arr = np.asarray(v, dtype=np.float64).ravel()
    return float(arr[0])


def _packing(var, nodata, scale, offset, valid_range, ceiling) -> dict:
    """Nodata, scale, offset and valid range of a variable (CF attributes, then overrides)."""
    attrs = var.attrs
    nd: list[float] = []
    for key in ("_FillValue", "missing_value"):
        if key in attrs:
            nd.extend(float(v) for v in np.asarray(attrs[key], dtype=np.float64).ravel())
    if nodata is not None:
        nd.extend(float(v) for v in (nodata if isinstance(nodata, list | tuple) else [nodata]))
    s = float(scale) if scale is not None else _scalar(attrs.get("scale_factor", 1.0))
    o = float(offset) if offset is not None else _scalar(attrs.get("add_offset", 0.0))
    vr = None
    if valid_range is not None:
        vr = (float(valid_range[0]), float(valid_range[1]))
    else:
        lo_hi = None
        if "valid_range" in attrs:
            r = np.asarray(attrs["valid_range"], dtype=np.float64).ravel()
            lo_hi = (float(r[0]), float(r[1]))
        elif "valid_min" in attrs or "valid_max" in attrs:
            lo_hi = (
                _scalar(attrs.get("valid_min", -math.inf)),
                _scalar(attrs.get("valid_max", math.inf)),
            )
        if lo_hi is not None:
            # CF states the valid range in packed (stored) units.
            ends = sorted(v * s + o for v in lo_hi)
            vr = (ends[0], ends[1])
    return {
        "dtype": str(var.dtype),
        "nodata": tuple(dict.fromkeys(nd)),
        "scale": s,
        "offset": o,
        "valid_range": vr,
        "ceiling": float(ceiling) if ceiling is not None else None,
    }
