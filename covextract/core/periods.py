"""The calendar of series: periods, their lengths and period selections.

Plain types with no I/O, shared by the recipe checks (``every:``,
``periods:``), the series index and the readers of series files and cubes.

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
import re
from dataclasses import dataclass

from covextract.errors import RasterError, RecipeError

__all__ = [
    "Period",
    "Step",
    "parse_every",
    "parse_selection",
    "check_starts",
    "period_gaps",
]

_DAY = dt.timedelta(days=1)


# --------------------------------------------------------------------- periods
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


def check_starts(step: Step, dated: list[tuple[dt.date, str]], what: str) -> None:
    """Check that every date starts a period of ``step`` counted from the first date.

    Only N-day composites can fail: months and years start on fixed days.

    Parameters
    ----------
    step : Step
        Length of the periods.
    dated : list of (datetime.date, str)
        Each date with the name of what it was read from (a file name, a time
        index), for the message.
    what : str
        What the dates are, for the message (``"series file"``).

    Raises
    ------
    RasterError
        Some dates fall inside a period; the message names them and the
        starts expected around them.
    """
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


def period_gaps(step: Step, periods: list[Period]) -> list[Period]:
    """Periods of ``step`` between the first and the last of ``periods`` that are missing."""
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
