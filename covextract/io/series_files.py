"""Series of raster files named by a path template, one file per period.

``rasters/rain_{year}{month:02d}.tif`` with ``every: month`` names one file
per month. :func:`discover_series` lists the folders the template names,
reads each matching name's date and gives a
:class:`~covextract.io.series.SeriesIndex` whose period sources are opened
on demand. Dates are read from names, never guessed by trying every date.
"""

from __future__ import annotations

import datetime as dt
import os
import re
import string
import threading
from dataclasses import dataclass
from pathlib import Path

from covextract.core.grid import Grid
from covextract.core.periods import Period, Step, check_starts, parse_every
from covextract.errors import InputFileError, RasterError, RecipeError
from covextract.io.rasters import RasterSource, open_layer
from covextract.io.series import SeriesIndex

__all__ = ["TEMPLATE_FIELDS", "template_fields", "discover_series"]

#: Date fields a path template may use.
TEMPLATE_FIELDS = ("year", "month", "day", "doy")

#: Digits a field needs at most (doy: day of the year, 1..366).
_FIELD_DIGITS = {"year": 4, "month": 2, "day": 2, "doy": 3}

#: How many names to show when listing files or problems in a message.
_SHOW = 8


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
    check_starts(step, [(d, p.name) for d, p in dated], "series file")
    paths = {step.period(d): p for d, p in dated}
    return SeriesIndex(step, _FileBackend(paths, dict(open_options or {})), origin=template)


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
