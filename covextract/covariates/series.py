"""Covariates on series layers that work from per-period statistics.

:class:`SeriesCovariate` computes the spatial statistics once per period
(the same weights for every period of a grid) and, when the entry has
``anomaly:``, turns each unit's series into anomalies or SPI. Its subclasses
shape the result: :class:`PeriodsCovariate` (``periods:``) writes the long
panel; windows and trends live in :mod:`covextract.covariates.window` and
:mod:`covextract.covariates.trend`.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from covextract.covariates.base import ComputeContext, Covariate, Outcome, PlanContext
from covextract.stats import registry
from covextract.stats.names import parse_stat

__all__ = ["SeriesCovariate", "PeriodsCovariate", "long_frame", "panel_rows"]

#: Codes about a unit's place on the grid hold for every period.
STRUCTURAL_CODES = ("outside_layer", "partly_outside", "missed_by_centers")
_TAGS = {"difference": "anom", "percent": "pct", "zscore": "z"}
_ANOMALY_WORDS = {
    "difference": "anomaly (value minus normal)",
    "percent": "percent of normal",
    "zscore": "z-score against the normal",
}


def long_frame(values: np.ndarray, periods) -> pd.DataFrame:
    """A (units x periods) array as the long frame the time functions take."""
    n, m = values.shape
    return pd.DataFrame(
        {
            "unit": np.repeat(np.arange(n), m),
            "start": np.tile(np.array([p.start for p in periods], dtype="datetime64[D]"), n),
            "end": np.tile(np.array([p.end for p in periods], dtype="datetime64[D]"), n),
            "value": values.reshape(-1),
        }
    )


def panel_rows(ids, column: str, periods, values: np.ndarray, qa) -> pd.DataFrame:
    """Long-panel rows (``unit``, column, period_start, period_end, value, qa) of one column.

    ``qa[i][j]`` is the text of unit ``i``'s codes in period ``j``. The unit
    column is named ``unit`` here; the writer renames it to the study's id.
    """
    n, m = values.shape
    return pd.DataFrame(
        {
            "unit": np.repeat(np.asarray(ids, dtype=object), m),
            "column": column,
            "period_start": np.tile(np.array([p.start for p in periods], dtype="datetime64[D]"), n),
            "period_end": np.tile(np.array([p.end for p in periods], dtype="datetime64[D]"), n),
            "value": values.reshape(-1),
            "qa": np.asarray(qa, dtype=object).reshape(-1),
        }
    )


class SeriesCovariate(Covariate):
    """Base of the kinds that start from per-period statistics of a series layer."""

    per_period = True

    @classmethod
    def matches(cls, spec, layer) -> bool:
        return False  # an abstract base: its subclasses match

    def plan(self, ctx: PlanContext) -> bool:
        self.series = ctx.series.get(self.layer_name)
        if self.series is None:
            return False
        if self.layer.kind != "continuous":
            ctx.problem("series of categorical layers are not supported yet", self.where("layer"))
            return False
        try:
            self.stats = [parse_stat(s) for s in self.spec.stats]
        except ValueError as exc:
            ctx.problem(str(exc), self.where("stats"))
            return False
        self.anomaly = getattr(self.spec, "anomaly", None)
        self.tag = None
        self.transform = None
        if self.anomaly is not None:
            if self.anomaly.kind == "spi":
                self.tag = f"spi{self.anomaly.months}"
                self.transform = registry.get("spi", "anomaly")
            else:
                self.tag = _TAGS[self.anomaly.kind]
                self.transform = registry.get(self.tag, "anomaly")
        return self.resolve(ctx)

    def resolve(self, ctx: PlanContext) -> bool:
        """Kind-specific planning after the series and statistics are known."""
        raise NotImplementedError

    # ------------------------------------------------------------ per period
    def all_periods(self) -> list:
        """The periods whose per-period statistics the covariate needs."""
        return list(self.series.periods)

    def inner(self, stat) -> tuple[str, str]:
        """``(text, unit)`` of the per-period value a column is made from."""
        text = f"{stat.name} ({stat.define(threshold=self.threshold, rule=self.rule)})"
        unit = stat.unit(self.layer_unit)
        if self.transform is not None:
            months = self.anomaly.months
            text = (
                f"{self.transform.define(baseline=self.anomaly.baseline, months=months)}, "
                f"computed from the per-period {text}"
            )
            unit = self.transform.unit(unit)
        return text, unit

    def stat_label(self, stat) -> str:
        """The statistic's part of a column name (with the anomaly tag when there is one)."""
        return stat.column + (f"_{self.tag}" if self.tag else "")

    def per_period_statistics(self, ctx: ComputeContext, periods):
        """``(values, qa_per_period, builds)`` of the covariate's statistics over ``periods``."""
        from covextract.engine.zonal import zonal_units

        plan = ctx.plan
        units = plan.unit_sets[self.unit_key]
        # reproject only when a period's CRS differs from the previous one's
        # (a series on one grid reprojects once; a later period back on an
        # earlier CRS gets geometries in that CRS, not the last ones)
        geoms, geoms_crs = None, None
        n = len(units)
        out = {s.name: np.full((n, len(periods)), np.nan) for s in self.stats}
        qa_per_period, builds = [], 0
        options = self.engine_options(plan, ctx)
        for j, period in enumerate(periods):
            src = self.series.source(period)
            if geoms is None or src.grid.crs != geoms_crs:
                geoms, geoms_crs = units.to_crs(src.grid.crs), src.grid.crs
            res = zonal_units(src, geoms, self.stats, progress=ctx.advance, **options)
            builds += res.weights_builds
            for s in self.stats:
                out[s.name][:, j] = res.values[s.name]
            qa_per_period.append(res.qa)
        return out, qa_per_period, builds

    def compute(self, ctx: ComputeContext) -> Outcome:
        periods = self.all_periods()

        def compute(ps):
            return self.per_period_statistics(ctx, ps)

        if ctx.period_values is None:
            vals, qa_pp, builds = compute(periods)
        else:
            vals, qa_pp, builds = ctx.period_values(periods, compute)
        vals = {k: np.array(v, dtype=np.float64, copy=True) for k, v in vals.items()}
        if self.anomaly is not None:
            for s in self.stats:
                vals[s.name] = self._apply_anomaly(periods, vals[s.name])
        outcome = self.assemble(ctx.plan, periods, vals, qa_pp)
        outcome.weights_builds = builds
        return outcome

    def structural_qa(self, qa_pp, n: int, codes=STRUCTURAL_CODES) -> list:
        """Per unit, the per-period engine codes about its place on the grid."""
        return [
            list(dict.fromkeys(c for per in qa_pp for c in per[i] if c in codes)) for i in range(n)
        ]

    def assemble(self, plan, periods, vals, qa_pp) -> Outcome:
        """Columns and QA from the per-period values (anomalies already applied)."""
        raise NotImplementedError

    def _apply_anomaly(self, periods, values: np.ndarray) -> np.ndarray:
        """Anomalies or SPI of each unit's series (per-period codes are not kept).

        A missing anomaly inside a record's window shows there as ``window_gap``.
        """
        from covextract.derive.spi import spi
        from covextract.derive.time import anomalies

        spec = self.anomaly
        n, m = values.shape
        y0, y1 = (int(x) for x in spec.baseline.split(".."))
        long = long_frame(values, periods)
        if spec.kind == "spi":
            out = spi(long, months=spec.months, baseline=(y0, y1), min_years=spec.min_years or 10)
            col = "value"
        else:
            out = anomalies(long, baseline=(y0, y1), min_years=spec.min_years or 5)
            col = {"difference": "anomaly", "percent": "percent_of_normal", "zscore": "zscore"}[
                spec.kind
            ]
        out = out.sort_values(["unit", "start"], kind="stable")
        return out[col].to_numpy(dtype=np.float64).reshape(n, m)

    def method_text(self, plan) -> str:
        from covextract.sources.base import step_adjective

        s = self.series
        text = (
            f"statistics computed for each of the {len(s.periods)} {step_adjective(s.step)} "
            "periods of the series with the same weights"
        )
        a = self.anomaly
        if a is not None and a.kind == "spi":
            text += (
                f"; SPI-{a.months} of each unit's series: {a.months}-month totals, a gamma "
                "distribution fitted per calendar month over the baseline "
                f"{a.baseline} (fewer than {a.min_years or 10} valid baseline years: missing, "
                "QA short_baseline)"
            )
        elif a is not None:
            text += (
                f"; {_ANOMALY_WORDS[a.kind]} per unit and calendar month against the baseline "
                f"{a.baseline} (fewer than {a.min_years or 5} valid baseline years: missing, QA "
                "short_baseline)"
            )
        return text

    def qa_codes(self) -> dict:
        if self.anomaly is None:
            return {}
        from covextract.derive import time as _time

        return dict(_time.QA_CODES)

    def fingerprint(self, plan) -> dict:
        """Per-period pieces depend only on the layer, units and spatial statistics.

        Two covariates with the same per-period statistics share their pieces,
        and a change of window, anomaly or trend recomputes no period.
        """
        from covextract.core.version import __version__

        return {
            "covextract": __version__,
            "layer": plan.recipe.layers[self.layer_name].model_dump(mode="json"),
            "units": list(self.unit_key),
            "rule": self.rule,
            "area_weighting": self.area_weighting,
            "threshold": self.threshold,
            "kind": "period statistics",
            "stats": [s.name for s in self.stats],
        }


class PeriodsCovariate(SeriesCovariate):
    """``periods:`` — per-period values written to the long panel, no table columns.

    Panel column names are ``<prefix>_<stat>`` (with the anomaly tag, e.g.
    ``rain_mean_spi3``, when the entry has ``anomaly:``).
    """

    kind = "periods"

    @classmethod
    def matches(cls, spec, layer) -> bool:
        return layer.is_series and spec.periods is not None and _no_other_time_key(spec)

    def resolve(self, ctx: PlanContext) -> bool:
        from covextract.errors import RecipeError

        if ctx.recipe.output.panel is None:
            ctx.problem(
                "periods: writes a long panel: add output: {panel: <folder>} to the recipe",
                self.where("periods"),
            )
            return False
        try:
            self.periods = self.series.select(self.spec.periods)
        except RecipeError as exc:
            ctx.problem(exc, self.where("periods"))
            return False
        self.columns = []
        for s in self.stats:
            text, unit = self.inner(s)
            name = f"{self.prefix}_{self.stat_label(s)}"
            col = self.column(name, s, self.layer_unit, where="panel")
            col.definition, col.unit = f"per-period {text}", unit
            self.columns.append(col)
        return True

    def assemble(self, plan, periods, vals, qa_pp) -> Outcome:
        units = plan.unit_sets[self.unit_key]
        n = len(units)
        idx = [periods.index(p) for p in self.periods]
        qa_text = np.array(
            [[";".join(qa_pp[j][i]) for j in idx] for i in range(n)], dtype=object
        ).reshape(n, len(idx))
        panel = pd.concat(
            [
                panel_rows(units.ids, c.name, self.periods, vals[s.name][:, idx], qa_text)
                for s, c in zip(self.stats, self.columns, strict=True)
            ],
            ignore_index=True,
        )
        structural = (*STRUCTURAL_CODES, "no_valid_pixel", "low_valid")
        qa = self.structural_qa([qa_pp[j] for j in idx], n, structural)
        valid = np.isfinite(vals[self.stats[0].name][:, idx]).any(axis=1).astype(float)
        return Outcome({}, qa, valid, panel=panel)

    def method_text(self, plan) -> str:
        first, last = self.periods[0], self.periods[-1]
        return super().method_text(plan) + (
            f"; periods {first.label} to {last.label} ({len(self.periods)} periods) written to "
            "the long panel (output.panel), one row per unit, column and period"
        )


def _no_other_time_key(spec) -> bool:
    return spec.before is None and spec.trend is None and spec.change is None
