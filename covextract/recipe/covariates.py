"""The recipe's ``covariates:`` list: statistics of one layer per unit, and their options.

A covariate's own block checks live here; the checks that need the layer
it names or the unit shape are in :mod:`covextract.recipe.checks`.
"""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import (
    BeforeValidator,
    ConfigDict,
    Field,
    StringConstraints,
    field_validator,
    model_validator,
)

from covextract.core.options import (
    AREA_WEIGHTING_NAMES,
    DEFAULT_PIXEL_RULE,
    PIXEL_RULE_NAMES,
    OptionError,
    area_weighting_choice,
)
from covextract.recipe.common import (
    Column,
    Finite,
    Name,
    PathText,
    RecipeModel,
    issue,
    problem,
    raise_issues,
)
from covextract.recipe.study import Boundaries, BufferSpec

__all__ = [
    "Before",
    "Trend",
    "Change",
    "Anomaly",
    "Totals",
    "Reallocate",
    "Calibrate",
    "Covariate",
]


def _area_weighting(value):
    try:
        return area_weighting_choice(value)
    except OptionError as exc:
        raise problem(str(exc)) from None


class Before(RecipeModel):
    """A window of whole periods before each record's date.

    Parameters
    ----------
    date : str, optional
        Column of the record's date; default ``study.date``.
    months, lag_months : int
        The ``months`` months ending with the month ``lag_months`` before the
        record's month (``lag_months: 0`` ends with the record's own month).
    days, lag_days : int
        Instead of months: ``days`` days ending ``lag_days`` days before the date.
    combine : {"sum", "mean", "min", "max", "count_above"}
        How the periods' values combine; ``count_above`` needs ``threshold``.
    threshold : float, optional
        For ``count_above`` (strictly greater).
    """

    date: Column | None = None
    months: Annotated[int, Field(ge=1)] | None = None
    lag_months: Annotated[int, Field(ge=0)] = 0
    days: Annotated[int, Field(ge=1)] | None = None
    lag_days: Annotated[int, Field(ge=0)] = 0
    combine: Literal["sum", "mean", "min", "max", "count_above"] = "sum"
    threshold: Finite | None = None

    @model_validator(mode="after")
    def _one_length(self) -> Before:
        issues = []
        if (self.months is None) == (self.days is None):
            issues.append(
                issue(("months",), "give exactly one of months: or days: for the window's length")
            )
        if self.combine == "count_above" and self.threshold is None:
            issues.append(
                issue(
                    ("threshold",),
                    "combine: count_above needs threshold: (for "
                    "example 200 for months with more than 200 mm)",
                )
            )
        raise_issues("Before", issues)
        return self


def _year_range(value):
    """``"1991..2020"`` -> (1991, 2020)."""
    if isinstance(value, str) and ".." in value:
        a, b = value.split("..", 1)
        if a.strip().isdigit() and b.strip().isdigit() and int(a) <= int(b):
            return value
    raise problem(f"a range of years is written FIRST..LAST (1991..2020), got {value!r}")


class Trend(RecipeModel):
    """Linear trend of each unit's annual values.

    Parameters
    ----------
    periods : str
        Years of the trend, ``2001..2020``.
    min_years : int
        Fewer valid years give a missing trend (QA ``too_few_years``); default 5.
    """

    periods: Annotated[str, BeforeValidator(_year_range)]
    min_years: Annotated[int, Field(ge=3)] = 5


class Change(RecipeModel):
    """Change between two periods, computed per pixel, then summarised per unit.

    Parameters
    ----------
    from : str
        The earlier period (``2019``, ``2019-03``); on a finer series every
        period inside it is first collapsed per pixel.
    to : str
        The later period.
    collapse : {"mean", "sum", "max"}
        How a finer series is collapsed per pixel over each period; default mean.
    """

    model_config = ConfigDict(extra="forbid", strict=True, populate_by_name=True)

    from_: Annotated[str, StringConstraints(min_length=1), Field(alias="from")]
    to: Annotated[str, StringConstraints(min_length=1)]
    collapse: Literal["mean", "sum", "max"] = "mean"

    @field_validator("from_", "to", mode="before")
    @classmethod
    def _text(cls, value):
        return str(value) if isinstance(value, int) and not isinstance(value, bool) else value


class Anomaly(RecipeModel):
    """Anomalies against a baseline, per unit and calendar month.

    Parameters
    ----------
    baseline : str
        Baseline years, ``1991..2020``.
    kind : {"difference", "percent", "zscore", "spi"}
        value − normal; 100·value/normal; (value − normal)/sd; or the
        standardized precipitation index (needs ``months``).
    months : {1, 3, 6, 12}, optional
        SPI time scale.
    min_years : int, optional
        Fewest valid baseline years per calendar month (default 5 for
        anomalies, 10 for SPI, its minimum); fewer give missing values.
    """

    baseline: Annotated[str, BeforeValidator(_year_range)]
    min_years: Annotated[int, Field(ge=2)] | None = None
    kind: Literal["difference", "percent", "zscore", "spi"] = "difference"
    months: Literal[1, 3, 6, 12] | None = None

    @model_validator(mode="after")
    def _spi_scale(self) -> Anomaly:
        if self.kind == "spi" and self.months is None:
            raise_issues(
                "Anomaly",
                [
                    issue(
                        ("months",),
                        "kind: spi needs months: 1, 3, 6 or 12 (the time scale of the index)",
                    )
                ],
            )
        if self.kind != "spi" and self.months is not None:
            raise_issues(
                "Anomaly",
                [
                    issue(
                        ("months",),
                        "months: is the SPI time scale; use it with kind: spi",
                        self.months,
                    )
                ],
            )
        return self


class Totals(RecipeModel):
    """Known totals per zone (e.g. census counts by district).

    Parameters
    ----------
    file : str
        A CSV or Parquet table.
    id : str
        Column holding the zone id (matches ``zones.id``).
    column : str
        Column holding the total.
    """

    file: PathText
    id: Column
    column: Column


class Reallocate(RecipeModel):
    """Dasymetric reallocation of zone totals over light (a population proxy).

    Parameters
    ----------
    zones : Boundaries
        Zone polygons with an id (``file``, ``id``, ``layer``).
    totals : Totals
        The known total of each zone.
    by : {"light", "lit_area"}
        Spread each total in proportion to light, or to lit area (pixels above
        ``threshold``); default light.
    threshold : float, optional
        Background light below which a pixel is unlit (``by: lit_area``).
    """

    zones: Boundaries
    totals: Totals
    by: Literal["light", "lit_area"] = "light"
    threshold: Finite | None = None

    @model_validator(mode="after")
    def _threshold_for_lit_area(self) -> Reallocate:
        if self.by == "lit_area" and self.threshold is None:
            raise_issues(
                "Reallocate",
                [issue(("threshold",), "by: lit_area needs threshold: <background light level>")],
            )
        return self


class Calibrate(RecipeModel):
    """Population proxy by a log–log fit of known counts on light.

    Parameters
    ----------
    known : str
        Study-table column with the known count of the units that have one
        (empty cells: unknown, predicted).
    light : {"density_total", "sum", "mean"}
        Which light statistic of the unit predicts; default density_total.
    """

    known: Column
    light: Literal["density_total", "sum", "mean"] = "density_total"


class Covariate(RecipeModel):
    """Statistics of one layer, summarised per unit.

    Parameters
    ----------
    layer : str
        Name of a layer in ``layers``.
    stats : list of str
        Statistic names (see :mod:`covextract.stats.names`; categorical
        layers take :data:`CATEGORICAL_STATS`).
    pixels : {"overlap", "center", "touched"}
        Which pixels count and with what weight; default overlap
        (the fraction of each pixel's area inside the unit).
    area_weighting : {"auto", "off"}
        ``auto`` weights pixels by their true ground area where it varies
        over the grid; default auto.
    buffer_m : float or ColumnBuffer, optional
        Buffer radius in metres replacing the unit shape for this covariate.
    name : str, optional
        Replaces the layer part of the output column names.
    threshold : float, optional
        Threshold of ``area_above`` and ``share_above``, in the layer's
        physical unit (after scale and offset).
    since : str, optional
        Categorical layers: the earlier layer (same grid) that ``transition``
        and ``net_change`` compare with.
    pairs : list of [from, to], optional
        Class or group labels of the transitions to report (``any`` as
        ``from``: any other class).
    weight_by : str, optional
        A continuous layer on the same grid (e.g. population density) that
        weights means, spreads and percentiles: weight = coverage × area ×
        that layer's value.
    periods : str, optional
        Series layers: the periods to compute into the long panel
        (``2019-01..2020-12``, open ended ``2019-01..``).
    before : Before, optional
        Series layers: combine the per-period statistics over a window before
        each record's date; one column per statistic.
    reallocate : Reallocate, optional
        Population proxy: zone totals spread over the layer's light; stat
        ``allocated``.
    calibrate : Calibrate, optional
        Population proxy: log–log fit on units with known counts; stat
        ``predicted`` (with ``_lower`` and ``_upper`` columns).
    """

    layer: str
    stats: Annotated[list[str], Field(min_length=1)]
    pixels: Literal[PIXEL_RULE_NAMES] = DEFAULT_PIXEL_RULE
    area_weighting: Annotated[Literal[AREA_WEIGHTING_NAMES], BeforeValidator(_area_weighting)] = (
        "auto"
    )
    buffer_m: BufferSpec | None = None
    name: Name | None = None
    threshold: Finite | None = None
    since: Name | None = None
    pairs: list[Annotated[list[Name], Field(min_length=2, max_length=2)]] | None = None
    weight_by: Name | None = None
    periods: Annotated[str, StringConstraints(min_length=1)] | None = None
    before: Before | None = None
    trend: Trend | None = None
    anomaly: Anomaly | None = None
    change: Change | None = None
    reallocate: Reallocate | None = None
    calibrate: Calibrate | None = None
