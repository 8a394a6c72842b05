"""``change:`` — change between two parts of a series, computed per pixel, summarised per unit."""

from __future__ import annotations

import numpy as np

from covextract.covariates.base import ComputeContext, Covariate, Outcome, PlanContext
from covextract.stats import registry
from covextract.stats.names import parse_stat

__all__ = ["ChangeCovariate"]


class ChangeCovariate(Covariate):
    """One column per statistic of the per-pixel change, and the relative change.

    Unnamed: ``<layer>_<stat>_change_<from>_<to>`` and ``<layer>_relchange_<from>_<to>``;
    named: ``<name>_<stat>`` and ``<name>_relchange``.
    """

    kind = "change"

    @classmethod
    def matches(cls, spec, layer) -> bool:
        return layer.is_series and spec.change is not None

    def plan(self, ctx: PlanContext) -> bool:
        from covextract.errors import RecipeError

        series = self.series = ctx.series.get(self.layer_name)
        if series is None:
            return False
        if self.layer.kind != "continuous":
            ctx.problem("series of categorical layers are not supported yet", self.where("layer"))
            return False
        try:
            self.stats = [parse_stat(s) for s in self.spec.stats]
        except ValueError as exc:
            ctx.problem(str(exc), self.where("stats"))
            return False
        c = self.spec.change
        try:
            self.earlier = series.select(c.from_)
            self.later = series.select(c.to)
        except RecipeError as exc:
            ctx.problem(exc, self.where("change"))
            return False
        self.suffix = f"change_{c.from_}_{c.to}".replace("-", "_")
        tail = "" if self.named else f"_{self.suffix}"
        how = (
            f"per-pixel change from {c.from_} to {c.to} (each side collapsed per pixel by "
            f"{c.collapse} over its {len(self.earlier)} and {len(self.later)} periods)"
        )
        self.columns = []
        for s in self.stats:
            col = self.column(f"{self.prefix}_{s.column}{tail}", s, self.layer_unit)
            # say first what is summarised (a change), then how (the statistic)
            col.definition = f"{how}, summarised over the unit by its {s.name}: {col.definition}"
            self.columns.append(col)
        rel_tail = "" if self.named else f"_{self.suffix[len('change_') :]}"
        rel = self.column(
            f"{self.prefix}_relchange{rel_tail}", registry.get("relchange", "change"), ""
        )
        rel.definition = f"{rel.definition}; the change is the {how}"
        self.columns.append(rel)
        return True

    def compute(self, ctx: ComputeContext) -> Outcome:
        from covextract.engine.zonal import zonal_units
        from covextract.sources.derived import ChangeSource, CollapsedSource

        plan = ctx.plan
        how = self.spec.change.collapse
        later = CollapsedSource([self.series.source(p) for p in self.later], how)
        earlier = CollapsedSource([self.series.source(p) for p in self.earlier], how)
        geoms = plan.unit_sets[self.unit_key].to_crs(later.grid.crs)
        kw = self.engine_options(plan, ctx)
        # one pass for the requested statistics and the mean change the relative change needs
        stats = list(self.stats)
        if not any(s.name == "mean" for s in stats):
            stats.append(parse_stat("mean"))
        res = zonal_units(ChangeSource(later, earlier), geoms, stats, progress=ctx.advance, **kw)
        base = zonal_units(
            ChangeSource(later, earlier, part="earlier"), geoms, [parse_stat("mean")], **kw
        )
        values = {
            c.name: res.values[s.name] for s, c in zip(self.stats, self.columns, strict=False)
        }
        with np.errstate(invalid="ignore", divide="ignore"):
            rel = res.values["mean"] / base.values["mean"]
        values[self.columns[-1].name] = np.where(np.isfinite(rel), rel, np.nan)
        return Outcome(
            values,
            res.qa,
            res.valid_share,
            weights_builds=res.weights_builds + base.weights_builds,
            workers=set(res.workers),
        )

    def piece_inputs(self, plan) -> list:
        return [
            (f"layer:{self.layer_name}:{p.label}", self.series.path(p))
            for p in [*self.earlier, *self.later]
        ]

    def method_text(self, plan) -> str:
        c = self.spec.change
        return (
            f"change from {c.from_} to {c.to} computed per pixel on pixels valid in both sides "
            f"(each side collapsed per pixel by {c.collapse}; a pixel counts only where all its "
            "periods are valid), then summarised over the unit (not the difference of two unit "
            "means)"
        )
