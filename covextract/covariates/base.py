"""The protocol every covariate kind implements, and what kinds share.

A covariate kind turns one recipe entry into columns. Each kind is one class
(a subclass of :class:`Covariate`) in its own module, registered in
:mod:`covextract.covariates`:

- :meth:`Covariate.plan` resolves the entry (periods, classes, zones...) and
  names its columns (:class:`Column`), reporting problems instead of raising;
- :meth:`Covariate.compute` produces per-unit values and QA codes
  (:class:`Outcome`) from the engine;
- :meth:`Covariate.describe` gives a codebook row for each column, its unit
  and definition taken from the registered statistic;
- :meth:`Covariate.fingerprint` says what makes its results stale, for
  ``refresh``.

Nothing outside a kind's module branches on what kind a covariate is.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from covextract.core.options import weighting_text
from covextract.covariates.naming import entry_label
from covextract.stats.registry import Statistic

__all__ = ["Column", "Outcome", "PlanContext", "ComputeContext", "Covariate"]


@dataclass
class Column:
    """One output column of a covariate, with what the codebook says of it.

    ``where`` is ``"table"`` for a column of the study table and ``"panel"``
    for a column of the long panel (one value per unit and period).
    """

    name: str
    statistic: Statistic
    definition: str
    unit: str
    where: str = "table"


@dataclass
class Outcome:
    """What one covariate produced, in the unit order of its unit set.

    ``values`` maps column names to per-unit arrays; ``qa`` holds per unit the
    QA codes (unit codes excluded: the run adds those); ``valid_share`` is 0
    for units without a value. ``panel`` holds long-panel rows for series,
    ``learnt`` what a proxy fitted (its codebook and summary read it).
    """

    values: dict
    qa: list
    valid_share: np.ndarray
    panel: pd.DataFrame | None = None
    weights_builds: int = 0
    workers: set = field(default_factory=set)
    unknown_codes: list = field(default_factory=list)
    learnt: dict = field(default_factory=dict)


@dataclass
class PlanContext:
    """What planning a covariate may look at: the recipe and every opened input.

    ``problem(exc_or_text, key)`` records a problem at a recipe key
    (``covariates[0].before``) and raises unless the plan collects them.
    """

    recipe: object
    table: object
    unit_sets: dict
    sources: dict
    series: dict
    problem: Callable


@dataclass
class ComputeContext:
    """What computing a covariate needs: the plan, the weights cache, execution settings.

    ``advance(n)`` counts finished raster blocks for the progress display.
    ``period_values`` (series kinds only) lets ``refresh`` supply per-period
    statistics it already holds (see :meth:`Covariate.period_values`).
    """

    plan: object
    cache: object
    threads: int | None = None
    client: object = None
    advance: Callable | None = None
    period_values: Callable | None = None


def unit_key(recipe, spec) -> tuple:
    """Which unit set a covariate uses: its own buffer, or the recipe's units."""
    from covextract.core.options import parse_buffer

    def radius(value) -> tuple:
        b = parse_buffer(value)
        return (b.radius_m, b.column)

    if getattr(spec, "buffer_m", None) is not None:
        return ("buffer", *radius(spec.buffer_m))
    u = recipe.units
    if u is None:
        return ("own",)
    if u.buffer_m is not None:
        return ("buffer", *radius(u.buffer_m))
    if u.boundaries is not None:
        return ("boundaries",)
    if u.at_point is not None:
        return ("point", u.at_point)
    return ("own",)


class Covariate:
    """Base class of covariate kinds: the recipe entry, its layer, units and columns.

    Subclasses set :attr:`kind` (a short name used in messages and
    fingerprints) and implement :meth:`matches`, :meth:`resolve`,
    :meth:`column_names` / :meth:`make_columns` and :meth:`compute`.

    Attributes
    ----------
    index : int
        Position in the recipe's ``covariates`` list, from 0 (messages count from 1).
    spec : recipe Covariate
        The recipe entry.
    layer_name, prefix : str
        The layer, and the first part of every column (``name:`` or the layer).
    stats : list of Statistic
        The statistics asked for, parsed.
    rule : str
        Pixel rule (``overlap``, ``center``, ``touched``) or point method.
    unit_key : tuple
        The unit set (see :func:`unit_key`).
    columns : list of Column
        Filled by :meth:`plan`.
    qa_column : str
        The covariate's QA column (set by the run's naming step).
    """

    kind = "covariate"
    #: True when results are stored per period (series kinds), for refresh.
    per_period = False

    def __init__(self, index: int, spec, recipe) -> None:
        self.index = index
        self.spec = spec
        self.layer_name = spec.layer
        self.layer = recipe.layers[spec.layer]
        self.named = spec.name is not None
        self.prefix = spec.name or spec.layer
        self.unit_key = unit_key(recipe, spec)
        self.point = self.unit_key[0] == "point"
        self.rule = self.unit_key[1] if self.point else spec.pixels
        self.area_weighting = weighting_text(spec.area_weighting)
        self.threshold = spec.threshold
        self.stats: list[Statistic] = []
        self.columns: list[Column] = []
        self.qa_column = ""

    # ------------------------------------------------------------- protocol
    @classmethod
    def matches(cls, spec, layer) -> bool:
        """True when this kind handles the recipe entry ``spec`` on ``layer``."""
        raise NotImplementedError

    def plan(self, ctx: PlanContext) -> bool:
        """Resolve the entry and name its columns; False when a problem stops it."""
        raise NotImplementedError

    def compute(self, ctx: ComputeContext) -> Outcome:
        """Values and QA codes of every column, in the unit set's order."""
        raise NotImplementedError

    def describe(self, plan, learnt: dict) -> list[dict]:
        """Codebook rows of every column, with unit, definition, method and sources."""
        from covextract.covariates.describe import codebook_rows

        return codebook_rows(self, plan, learnt)

    def method_text(self, plan) -> str:
        """Extra method text shared by every column of the covariate (may be empty)."""
        return ""

    def qa_codes(self) -> dict:
        """QA codes this kind may write, with their meaning (besides the engine's)."""
        return {}

    def extra_inputs(self, recipe) -> list:
        """Input files besides the layers' (``(role, path)``), for the manifest and refresh."""
        return []

    def piece_inputs(self, plan) -> list:
        """``(role, path)`` of every file the covariate's results depend on (refresh)."""
        files = []
        for name in self.layers_used():
            files += plan.layer_files(name)
        return files + self.extra_inputs(plan.recipe)

    def describe_learnt(self, learnt: dict) -> str:
        """Codebook text of what a run learnt (a fitted model, zones without light)."""
        return ""

    def warn(self, outcome: Outcome, n_units: int, unit_qa=None) -> None:
        """Warn about what the outcome shows (units outside the layer, unknown codes).

        ``unit_qa`` holds the unit set's own QA codes per unit (no location, no
        boundary), which explain an entirely missing covariate as well as the
        outcome's codes do.
        """
        import warnings

        from covextract.core.messages import user_stacklevel
        from covextract.errors import EmptyCovariateWarning, UnitOutsideLayerWarning

        outside = sum("outside_layer" in q for q in outcome.qa)
        if outside:
            warnings.warn(
                f"{outside} of {n_units} units lie wholly outside layer {self.layer_name!r}; "
                f"their {self.prefix} values are missing (QA code outside_layer)",
                UnitOutsideLayerWarning,
                stacklevel=user_stacklevel(),
            )
        empty = self.empty_text(outcome, unit_qa)
        if empty:
            warnings.warn(empty, EmptyCovariateWarning, stacklevel=user_stacklevel())

    def empty_text(self, outcome: Outcome, unit_qa=None) -> str:
        """The warning text when every value of every column is missing, else ``""``.

        Table columns are read from ``outcome.values``; a covariate that writes
        only to the long panel is judged by the panel's ``value`` column. The
        most common QA code (unit codes included) is named with its count and
        meaning, so the warning says why.
        """
        columns = [c.name for c in self.columns if c.name in outcome.values]
        if columns:
            arrays = [outcome.values[c] for c in columns]
        elif outcome.panel is not None and "value" in outcome.panel.columns:
            columns = sorted({c.name for c in self.columns if c.where == "panel"}) or [self.prefix]
            arrays = [outcome.panel["value"]]
        else:
            return ""
        for a in arrays:
            if len(a) == 0 or pd.Series(a).notna().any():
                return ""
        counts: dict = {}
        n_records = len(outcome.qa)
        units = unit_qa if unit_qa is not None else [()] * n_records
        for u, z in zip(units, outcome.qa, strict=False):
            codes = list(u) + (z.split(";") if isinstance(z, str) else list(z))
            for code in dict.fromkeys(filter(None, codes)):
                counts[code] = counts.get(code, 0) + 1
        if len(columns) == 1:
            what = f"every value of {columns[0]} is missing"
        else:
            shown = ", ".join(columns[:4]) + (
                f" and {len(columns) - 4} more" if len(columns) > 4 else ""
            )
            what = f"every value of its {len(columns)} columns ({shown}) is missing"
        text = f"covariate {self.index + 1} (layer {self.layer_name}): {what}"
        if counts:
            code, n = max(counts.items(), key=lambda kv: kv[1])
            meaning = self.qa_meaning(code)
            text += f"; most common reason: {code} ({n} of {n_records} records)"
            text += f": {meaning}" if meaning else ""
        else:
            text += "; no QA code explains it (check the layer's values, nodata and expression)"
        return text + ". Check the inputs before using this column."

    def qa_meaning(self, code: str) -> str:
        """What a QA code means, from this kind's codes, the engine's and the units'."""
        from covextract.engine.zonal import QA_CODES as ENGINE_CODES
        from covextract.units import QA_CODES as UNIT_CODES

        return {**UNIT_CODES, **ENGINE_CODES, **self.qa_codes()}.get(code, "")

    def fingerprint(self, plan) -> dict:
        """What the covariate's results depend on besides its input files and units."""
        from covextract.core.version import __version__

        return {
            "covextract": __version__,
            "kind": self.kind,
            "entry": self.spec.model_dump(mode="json"),
            "layers": {
                n: plan.recipe.layers[n].model_dump(mode="json") for n in self.layers_used()
            },
            "units": list(self.unit_key),
        }

    # ------------------------------------------------------------ helpers
    def where(self, key: str = "") -> str:
        """The recipe key of this entry (``covariates[2].before``)."""
        return f"covariates[{self.index}]" + (f".{key}" if key else "")

    def label(self) -> str:
        """How messages name this entry: ``the 3rd covariate (layer 'rain')``, counted from 1."""
        return entry_label(self.index, self.layer_name)

    def layers_used(self) -> list[str]:
        """Every layer the covariate reads, its own first."""
        names = [self.layer_name]
        for extra in (getattr(self.spec, "since", None), getattr(self.spec, "weight_by", None)):
            if extra and extra not in names:
                names.append(extra)
        return names

    def column(self, name: str, stat: Statistic, input_unit: str, where="table", **fill) -> Column:
        """A :class:`Column` with the statistic's unit and filled definition."""
        fill.setdefault("threshold", self.threshold)
        return Column(
            name,
            stat,
            stat.define(rule=self.rule, **fill),
            stat.unit(input_unit),
            where,
        )

    def engine_options(self, plan, ctx: ComputeContext, **override) -> dict:
        """Keyword arguments every engine call of this covariate shares (``override`` wins)."""
        units = plan.unit_sets[self.unit_key]
        options = {
            "rule": self.rule,
            "area_weighting": self.area_weighting,
            "threshold": self.threshold,
            "cache": ctx.cache,
            "units_fingerprint": units.fingerprint(),
            "threads": ctx.threads,
            "client": ctx.client,
        }
        options.update(override)
        return options

    def source(self, plan):
        """The raster source the covariate reduces (its layer's)."""
        return plan.sources[self.layer_name]

    @property
    def layer_unit(self) -> str:
        """The unit of the layer's physical values, as the recipe states it."""
        return self.layer.unit or ""
