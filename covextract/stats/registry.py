"""The one registry of statistics: name, running sums, finish, definition, unit rule.

Every column covextract writes comes from one registered :class:`Statistic`.
The recipe's list of allowed statistics, the engine's finishing step and the
codebook's definition and unit all read this registry, so adding a statistic
is one :func:`register` call in one module.

Families
--------
``continuous``
    Zonal statistics of a continuous layer over an area (finished from the
    engine's per-unit sums, see :class:`covextract.engine.reduce.Accumulator`).
``point``
    The value under a point unit.
``categorical``
    Land-cover statistics from per-unit class areas (one statistic may give
    several columns: a share per class).
``window``, ``trend``, ``anomaly``, ``change``, ``proxy``
    Derived statistics of the covariate kinds (a window's combination of
    periods, a trend's slope, an SPI, a population proxy). They are
    finished by their kind; the registry gives their definitions and units.

Unit rules take the unit of what the statistic summarises (the layer's unit,
or for a window the unit of the per-period statistic) and return the unit of
the column; ``""`` means the input unit is unknown.
"""

from __future__ import annotations

import re
from collections.abc import Callable
from dataclasses import dataclass, replace

import numpy as np

__all__ = [
    "Statistic",
    "register",
    "registered",
    "get",
    "family",
    "LABEL",
    "FRACTION",
]

#: Unit text of a column holding a label (text), not a quantity.
LABEL = "none (a label)"
#: Unit text of a share between 0 and 1.
FRACTION = "fraction (0-1)"


@dataclass(frozen=True)
class Statistic:
    """One statistic: how it is named, computed, defined and measured.

    Attributes
    ----------
    name : str
        The spelling in a recipe (``mean``, ``q90``, ``q2.5``).
    kind : str
        The base statistic (``percentile`` for every ``qNN``).
    family : str
        See the module docstring.
    definition : str
        One sentence for the codebook; may use ``{q}`` and ``{threshold}``.
    unit_rule : callable
        ``unit_rule(input_unit) -> str``: the column's unit of measure.
    sums : tuple of str
        The running sums of the engine it needs (documentation and tests).
    finish : callable, optional
        ``finish(acc, ctx) -> ndarray`` for ``continuous`` and ``point``.
    q : float, optional
        The percentile (0-100) of ``median`` and ``qNN``.
    needs_threshold : bool
        True when the covariate must give ``threshold:``.
    """

    name: str
    kind: str
    family: str
    definition: str
    unit_rule: Callable[[str], str]
    sums: tuple = ()
    finish: Callable | None = None
    q: float | None = None
    needs_threshold: bool = False

    @property
    def needs_distribution(self) -> bool:
        """True when the statistic needs every (value, weight) pair of a unit."""
        return self.kind in ("median", "percentile")

    @property
    def column(self) -> str:
        """The statistic's part of a column name: a legal identifier (``q2.5`` → ``q2p5``)."""
        return self.name.replace(".", "p")

    def unit(self, input_unit: str | None) -> str:
        """The unit of measure of the column, from the unit of what it summarises."""
        return self.unit_rule(input_unit or "")

    def define(self, **values) -> str:
        """The definition with ``{q}``, ``{threshold}`` and other fields filled in."""
        fill = {"q": _q_text(self.q), "threshold": values.pop("threshold", None)}
        fill.update(values)
        return self.definition.format(**fill)

    def __repr__(self) -> str:
        return f"Statistic({self.name!r}, family={self.family!r})"


_REGISTRY: dict[tuple[str, str], Statistic] = {}
_PERCENTILE = re.compile(r"^q(\d{1,3}(?:[.p]\d+)?)$")


def register(stat: Statistic) -> Statistic:
    """Add a statistic to the registry (one per family and name)."""
    key = (stat.family, stat.name)
    if key in _REGISTRY:
        raise ValueError(f"statistic {stat.name!r} of family {stat.family!r} is registered twice")
    if not callable(stat.unit_rule):
        raise TypeError(f"statistic {stat.name!r} needs a unit rule")
    _REGISTRY[key] = stat
    return stat


def registered() -> list[Statistic]:
    """Every registered statistic, in registration order (percentiles as ``q{q}``)."""
    return list(_REGISTRY.values())


def family(name: str) -> list[Statistic]:
    """The registered statistics of one family, in registration order."""
    return [s for s in _REGISTRY.values() if s.family == name]


def get(name: str, family: str) -> Statistic:
    """The statistic ``name`` of ``family``; ``qNN`` gives a continuous percentile.

    Raises
    ------
    KeyError
        When no such statistic is registered.
    """
    stat = _REGISTRY.get((family, name))
    if stat is not None:
        return stat
    if family == "continuous":
        m = _PERCENTILE.match(name)
        if m:
            q = float(m.group(1).replace("p", "."))
            if not 0.0 <= q <= 100.0:
                raise KeyError(f"percentile {name!r} is out of range: use q0 to q100")
            return replace(_REGISTRY[("continuous", "q{q}")], name=name, q=q)
    raise KeyError(name)


def _q_text(q) -> str:
    if q is None:
        return ""
    return str(int(q)) if float(q).is_integer() else str(q)


# ----------------------------------------------------------------- unit rules
def _same(u: str) -> str:
    return u


def _fixed(text: str) -> Callable[[str], str]:
    def rule(_u: str) -> str:
        return text

    rule.__doc__ = f"Always {text!r}."
    return rule


def _times(factor: str) -> Callable[[str], str]:
    def rule(u: str) -> str:
        return f"{u} x {factor}" if u else f"layer unit x {factor}"

    return rule


def _per_year(u: str) -> str:
    return f"{u} per year" if u else "layer unit per year"


# ----------------------------------------------------- continuous: finishing
def _where_has(values):
    def finish(acc, ctx):
        return np.where(ctx.has, values(acc, ctx), np.nan)

    return finish


def _std(acc, ctx):
    with np.errstate(invalid="ignore", divide="ignore"):
        var = np.where(acc.w > 0, acc.m2 / acc.w, np.nan)
    return np.where(ctx.has, np.sqrt(np.maximum(var, 0.0)), np.nan)


def _share_above(acc, ctx):
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(ctx.has, acc.above_w[ctx.threshold] / acc.w, np.nan)


def _cv(acc, ctx):
    std = _std(acc, ctx)
    with np.errstate(invalid="ignore", divide="ignore"):
        cv = std / np.abs(acc.mean)
    return np.where(ctx.has & np.isfinite(cv), cv, np.nan)


_W = "w = coverage x true pixel area (coverage alone with area weighting off)"

for _stat in (
    Statistic(
        "count",
        "count",
        "continuous",
        "number of pixels with coverage >= 1e-10 and a valid value",
        _fixed("pixels"),
        sums=("count",),
        finish=lambda acc, ctx: acc.count.copy(),
    ),
    Statistic(
        "valid_share",
        "valid_share",
        "continuous",
        "share of the unit's weighted area with valid pixels; the part of the unit outside "
        "the raster counts as invalid",
        _fixed(FRACTION),
        sums=("w_all", "w_base"),
        finish=lambda acc, ctx: ctx.valid_share,
    ),
    Statistic(
        "sum",
        "sum",
        "continuous",
        "sum over pixels of coverage x value (the right total for per-pixel counts)",
        _times("pixels"),
        sums=("csum",),
        finish=_where_has(lambda acc, ctx: acc.csum),
    ),
    Statistic(
        "density_total",
        "density_total",
        "continuous",
        "sum over pixels of coverage x value x pixel ground area in km2 (the right total for "
        "densities such as people per km2 or radiance)",
        _times("km2"),
        sums=("dens",),
        finish=_where_has(lambda acc, ctx: acc.dens),
    ),
    Statistic(
        "area_km2",
        "area_km2",
        "continuous",
        "area of the unit on the raster grid: sum of coverage x true pixel area, in km2",
        _fixed("km2"),
        sums=("area_all",),
        finish=_where_has(lambda acc, ctx: acc.area_all),
    ),
    Statistic(
        "mean",
        "mean",
        "continuous",
        f"weighted mean of valid pixels, sum(w v) / sum(w), {_W}",
        _same,
        sums=("w", "mean"),
        finish=_where_has(lambda acc, ctx: acc.mean),
    ),
    Statistic(
        "std",
        "std",
        "continuous",
        f"weighted standard deviation of valid pixels, ddof = 0 (weights are areas), {_W}",
        _same,
        sums=("w", "mean", "m2"),
        finish=_std,
    ),
    Statistic(
        "cv",
        "cv",
        "continuous",
        "coefficient of variation: weighted standard deviation / |weighted mean| of valid "
        "pixels (missing where the mean is 0)",
        _fixed("none (ratio std / |mean|, may exceed 1)"),
        sums=("w", "mean", "m2"),
        finish=_cv,
    ),
    Statistic(
        "min",
        "min",
        "continuous",
        "smallest valid pixel value among covered pixels",
        _same,
        sums=("vmin",),
        finish=_where_has(lambda acc, ctx: acc.vmin),
    ),
    Statistic(
        "max",
        "max",
        "continuous",
        "largest valid pixel value among covered pixels",
        _same,
        sums=("vmax",),
        finish=_where_has(lambda acc, ctx: acc.vmax),
    ),
    Statistic(
        "median",
        "median",
        "continuous",
        "weighted median of valid pixels (weighted form of numpy's linear percentile)",
        _same,
        sums=("distribution",),
        finish=lambda acc, ctx: ctx.percentiles["median"],
        q=50.0,
    ),
    Statistic(
        "q{q}",
        "percentile",
        "continuous",
        "weighted {q}th percentile of valid pixels (weighted form of numpy's linear method)",
        _same,
        sums=("distribution",),
        finish=lambda acc, ctx: ctx.percentiles[None],
    ),
    Statistic(
        "area_above",
        "area_above",
        "continuous",
        "area of valid pixels with value > {threshold}: sum of coverage x true pixel area, km2",
        _fixed("km2"),
        sums=("above_area",),
        finish=_where_has(lambda acc, ctx: acc.above_area[ctx.threshold]),
        needs_threshold=True,
    ),
    Statistic(
        "share_above",
        "share_above",
        "continuous",
        "share of the valid weighted area with value > {threshold}",
        _fixed(FRACTION),
        sums=("above_w", "w"),
        finish=_share_above,
        needs_threshold=True,
    ),
    # ---------------------------------------------------------------- point
    Statistic(
        "value",
        "value",
        "point",
        "value of the raster at the point ({rule}); missing when no pixel it reads is valid",
        _same,
        sums=("w", "mean"),
        finish=_where_has(lambda acc, ctx: acc.mean),
    ),
    Statistic(
        "valid_share",
        "valid_share",
        "point",
        "share of the point's weight on valid pixels (nearest: 1 when its pixel is valid, else 0)",
        _fixed(FRACTION),
        sums=("w_all", "w_base"),
        finish=lambda acc, ctx: ctx.valid_share,
    ),
    # ---------------------------------------------------------- categorical
    Statistic(
        "share",
        "share",
        "categorical",
        "share of the unit's valid area in {target} (nodata excluded)",
        _fixed(FRACTION),
        sums=("class_areas",),
    ),
    Statistic(
        "dominant",
        "dominant",
        "categorical",
        "class with the largest share of the valid area; a tie goes to the lowest code",
        _fixed(LABEL),
        sums=("class_areas",),
    ),
    Statistic(
        "classes_present",
        "classes_present",
        "categorical",
        "number of classes with a positive share ('other' counts as one)",
        _fixed("classes"),
        sums=("class_areas",),
    ),
    Statistic(
        "shannon",
        "shannon",
        "categorical",
        "Shannon diversity -sum p ln p over the class shares (Shannon 1948)",
        _fixed("nats (natural logarithm)"),
        sums=("class_areas",),
    ),
    Statistic(
        "valid_share",
        "valid_share",
        "categorical",
        "share of the unit's area with a valid class code; the part outside the raster "
        "counts as invalid",
        _fixed(FRACTION),
        sums=("w_all", "class_areas"),
    ),
    Statistic(
        "transition",
        "transition",
        "categorical",
        "share of the unit's area that was {source_class} in layer {since} and is "
        "{target_class} in layer {layer}, on pixels valid in both",
        _fixed(FRACTION),
        sums=("class_pair_areas",),
    ),
    Statistic(
        "net_change",
        "net_change",
        "categorical",
        "share of {target} in layer {layer} minus its share in layer {since}, on pixels "
        "valid in both",
        _fixed("difference of fractions (-1 to 1)"),
        sums=("class_pair_areas",),
    ),
    # -------------------------------------------------- windows before a date
    Statistic(
        "sum",
        "sum",
        "window",
        "sum over {window} of the per-period {inner}",
        _same,
    ),
    Statistic(
        "mean",
        "mean",
        "window",
        "mean over {window} of the per-period {inner} (a period counts by its overlap)",
        _same,
    ),
    Statistic("min", "min", "window", "smallest over {window} of the per-period {inner}", _same),
    Statistic("max", "max", "window", "largest over {window} of the per-period {inner}", _same),
    Statistic(
        "count_above",
        "count_above",
        "window",
        "number of {periods} in {window} whose per-period {inner} is > {threshold}",
        lambda noun: noun or "periods",
    ),
    # ----------------------------------------------------------------- trend
    Statistic(
        "ols",
        "ols",
        "trend",
        "ordinary least squares slope per year of the unit's annual {inner} over {span}",
        _per_year,
    ),
    Statistic(
        "sen",
        "sen",
        "trend",
        "Theil-Sen slope per year (Sen 1968) of the unit's annual {inner} over {span}",
        _per_year,
    ),
    Statistic(
        "p",
        "p",
        "trend",
        "Mann-Kendall two-sided p-value (tie-corrected) of the unit's annual {inner} over {span}",
        _fixed("probability (0-1)"),
    ),
    # -------------------------------------------------------------- anomalies
    Statistic(
        "anom",
        "difference",
        "anomaly",
        "value minus the unit's mean for the same calendar month over {baseline}",
        _same,
    ),
    Statistic(
        "pct",
        "percent",
        "anomaly",
        "100 x value / the unit's mean for the same calendar month over {baseline} (missing "
        "where that mean is 0)",
        _fixed("percent of normal"),
    ),
    Statistic(
        "z",
        "zscore",
        "anomaly",
        "(value - the unit's mean for the same calendar month over {baseline}) / its standard "
        "deviation (ddof 1)",
        _fixed("none (standard deviations from the baseline mean)"),
    ),
    Statistic(
        "spi",
        "spi",
        "anomaly",
        "standardized precipitation index SPI-{months} (McKee et al. 1993; WMO-No. 1090): gamma "
        "distribution (location 0) fitted per unit and calendar month to the {months}-month "
        "totals over {baseline}, zeros mixed back in, standard normal quantile",
        _fixed("none (standard normal deviate)"),
    ),
    Statistic(
        "category",
        "category",
        "anomaly",
        "WMO class of the SPI in column {column} (half-open intervals): extremely wet >= 2, "
        "very wet [1.5, 2), moderately wet [1, 1.5), near normal (-1, 1), moderately dry "
        "(-1.5, -1], severely dry (-2, -1.5], extremely dry <= -2",
        _fixed(LABEL),
    ),
    # ---------------------------------------------------------------- change
    Statistic(
        "relchange",
        "relchange",
        "change",
        "relative change: the unit's mean per-pixel change divided by its mean earlier value on "
        "the same pixels (missing where that mean is 0)",
        _fixed("ratio (change / earlier value)"),
    ),
    # ----------------------------------------------------- population proxies
    Statistic(
        "allocated",
        "allocated",
        "proxy",
        "zone totals spread over each zone's pixels in proportion to {how}, then summed over "
        "the unit (dasymetric reallocation; each zone's pixels sum to its total, Tobler 1979)",
        _same,
    ),
    Statistic(
        "predicted",
        "predicted",
        "proxy",
        "exp(a + b log light) x Duan (1983) smearing factor, from {fit}",
        _same,
    ),
    Statistic(
        "lower",
        "lower",
        "proxy",
        "lower end of the 95 % prediction interval (exp of the log-scale OLS interval), from {fit}",
        _same,
    ),
    Statistic(
        "upper",
        "upper",
        "proxy",
        "upper end of the 95 % prediction interval (exp of the log-scale OLS interval), from {fit}",
        _same,
    ),
):
    register(_stat)
