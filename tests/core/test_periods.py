"""The calendar of series: period lengths, periods and period selections.

Every expected period is worked out by hand from the calendar.
"""

from __future__ import annotations

import datetime as dt

import pytest

from covextract.core.periods import Period, Step, parse_every, parse_selection
from covextract.errors import RecipeError

D = dt.date


# ------------------------------------------------------------------- steps
@pytest.mark.parametrize(
    ("text", "step"),
    [
        ("month", Step("month")),
        ("year", Step("year")),
        ("day", Step("day")),
        ("1 day", Step("day")),
        ("16 days", Step("day", 16)),
        ("  8   Days ", Step("day", 8)),
        ("16 days restarting each year", Step("day", 16, True)),
    ],
)
def test_parse_every_accepts(text, step):
    assert parse_every(text) == step


@pytest.mark.parametrize(
    "text", ["fortnight", "2 months", "0 days", 16, "day restarting each year", ""]
)
def test_parse_every_rejects(text):
    with pytest.raises(RecipeError, match="every: .* month, year, day|every: .*"):
        parse_every(text)


def test_step_periods_by_hand():
    # 2020 is a leap year: February has 29 days.
    assert Step("month").period(D(2020, 2, 1)) == Period(D(2020, 2, 1), D(2020, 2, 29), "2020-02")
    assert Step("month").period(D(2019, 12, 1)) == Period(
        D(2019, 12, 1), D(2019, 12, 31), "2019-12"
    )
    assert Step("year").period(D(2021, 1, 1)) == Period(D(2021, 1, 1), D(2021, 12, 31), "2021")
    assert Step("day", 16).period(D(2020, 12, 18)) == Period(
        D(2020, 12, 18), D(2021, 1, 2), "2020-12-18"
    )
    # The last composite of a year that restarts on 1 January ends on 31 December.
    restart = Step("day", 16, True)
    assert restart.period(D(2021, 12, 19)) == Period(D(2021, 12, 19), D(2021, 12, 31), "2021-12-19")
    assert restart.next_start(D(2021, 12, 19)) == D(2022, 1, 1)


def test_parse_selection_intervals():
    assert parse_selection("2019-02") == (D(2019, 2, 1), D(2019, 2, 28))
    assert parse_selection("..2020") == (None, D(2020, 12, 31))
    assert parse_selection(D(2021, 5, 17)) == (D(2021, 5, 17), D(2021, 5, 17))
