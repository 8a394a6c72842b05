"""``trend:`` — the per-year slope of each unit's annual values, with its significance."""

from __future__ import annotations

import numpy as np

from covextract.covariates.base import Outcome, PlanContext
from covextract.covariates.series import SeriesCovariate, long_frame
from covextract.stats import registry

__all__ = ["TrendCovariate"]

_PARTS = ("ols", "sen", "p")


class TrendCovariate(SeriesCovariate):
    """Three columns per statistic: OLS slope, Theil-Sen slope and Mann-Kendall p-value.

    Unnamed: ``<layer>_<stat>_trend_ols|sen|p``; named: ``<name>_<stat>_ols|sen|p``.
    """

    kind = "trend"

    @classmethod
    def matches(cls, spec, layer) -> bool:
        return layer.is_series and spec.trend is not None

    def resolve(self, ctx: PlanContext) -> bool:
        from covextract.errors import RecipeError

        try:
            self.periods = self.series.select(self.spec.trend.periods)
        except RecipeError as exc:
            ctx.problem(exc, self.where("trend.periods"))
            return False
        self.suffix = "trend"
        span = f"{self.spec.trend.periods} (at least {self.spec.trend.min_years} valid years)"
        self.columns = []
        for s in self.stats:
            text, unit = self.inner(s)
            base = f"{self.prefix}_{s.column}" + ("" if self.named else "_trend")
            for part in _PARTS:
                stat = registry.get(part, "trend")
                self.columns.append(
                    self.column(f"{base}_{part}", stat, unit, inner=text, span=span)
                )
        return True

    def all_periods(self) -> list:
        return list(self.periods)

    def assemble(self, plan, periods, vals, qa_pp) -> Outcome:
        from covextract.derive.time import trend

        n = len(plan.unit_sets[self.unit_key])
        qa = self.structural_qa(qa_pp, n)
        values = {}
        names = iter(c.name for c in self.columns)
        for s in self.stats:
            out = trend(long_frame(vals[s.name], periods), min_years=self.spec.trend.min_years)
            out = out.set_index("unit").reindex(range(n))
            for field in ("ols_slope", "sen_slope", "mk_p"):
                values[next(names)] = out[field].to_numpy(dtype=np.float64)
            for i, codes in enumerate(out["qa"]):
                if isinstance(codes, tuple | list):
                    qa[i] = list(dict.fromkeys(qa[i] + list(codes)))
        valid = np.isfinite(values[self.columns[0].name]).astype(float)
        return Outcome(values, qa, valid)

    def method_text(self, plan) -> str:
        return super().method_text(plan) + (
            f"; trend per year of the unit's annual values over {self.spec.trend.periods} (a "
            "finer series is collapsed to annual means first, since seasonality and "
            "autocorrelation make monthly p-values far too small)"
        )

    def qa_codes(self) -> dict:
        from covextract.derive import time as _time

        return dict(_time.QA_CODES)
