"""Zonal statistics of a continuous layer over each unit, or its value under each point."""

from __future__ import annotations

from covextract.covariates.base import ComputeContext, Covariate, Outcome, PlanContext
from covextract.stats.names import parse_stat

__all__ = ["ZonalCovariate"]


class ZonalCovariate(Covariate):
    """``<prefix>_<stat>`` for each statistic of a continuous single-date layer.

    With ``weight_by: pop`` every pixel's weight is also multiplied by the
    value of layer ``pop`` (for example a population-weighted mean).
    """

    kind = "zonal"

    @classmethod
    def matches(cls, spec, layer) -> bool:
        return not layer.is_series and layer.kind == "continuous" and not _is_proxy(spec)

    def plan(self, ctx: PlanContext) -> bool:
        try:
            self.stats = [parse_stat(s, point=self.point) for s in self.spec.stats]
        except ValueError as exc:
            ctx.problem(str(exc), self.where("stats"))
            return False
        weight_by = self.spec.weight_by
        fill = {}
        if weight_by:
            wl = ctx.recipe.layers[weight_by]
            fill = {"weight": f"{weight_by} ({wl.unit})" if wl.unit else weight_by}
        self.columns = [self._column(f"{self.prefix}_{s.column}", s, **fill) for s in self.stats]
        if weight_by and self.layer_name in ctx.sources and weight_by in ctx.sources:
            from covextract.errors import CovextractError
            from covextract.sources.weighted import WeightedSource

            try:
                WeightedSource(ctx.sources[self.layer_name], ctx.sources[weight_by])
            except CovextractError as exc:
                ctx.problem(exc, self.where("weight_by"))
        return True

    def _column(self, name, stat, weight=None):
        col = self.column(name, stat, self.layer_unit)
        if weight and stat.family == "continuous" and stat.name not in ("count", "area_km2"):
            col.definition += (
                f"; every pixel's weight is also multiplied by its value in layer {weight} "
                "(pixels where that layer is missing or negative are left out)"
            )
        return col

    def source(self, plan):
        src = plan.sources[self.layer_name]
        if self.spec.weight_by:
            from covextract.sources.weighted import WeightedSource

            src = WeightedSource(src, plan.sources[self.spec.weight_by])
        return src

    def compute(self, ctx: ComputeContext) -> Outcome:
        from covextract.engine.zonal import zonal_units

        plan = ctx.plan
        src = self.source(plan)
        geoms = plan.unit_sets[self.unit_key].to_crs(src.grid.crs)
        weighting = "on" if self.spec.weight_by else self.area_weighting
        res = zonal_units(
            src,
            geoms,
            self.stats,
            progress=ctx.advance,
            **self.engine_options(plan, ctx, area_weighting=weighting),
        )
        values = {c.name: res.values[s.name] for s, c in zip(self.stats, self.columns, strict=True)}
        return Outcome(
            values,
            res.qa,
            res.valid_share,
            weights_builds=res.weights_builds,
            workers=set(res.workers),
        )


def _is_proxy(spec) -> bool:
    return spec.reallocate is not None or spec.calibrate is not None
