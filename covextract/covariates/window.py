"""``before:`` — each record's per-period values combined over a window before its date."""

from __future__ import annotations

import warnings

import numpy as np

from covextract.covariates.base import Outcome, PlanContext
from covextract.covariates.series import SeriesCovariate, long_frame
from covextract.stats import registry

__all__ = ["WindowCovariate", "window_suffix", "WINDOW_QA_CODES"]

#: QA codes of windows before each record's date, for the codebook.
WINDOW_QA_CODES = {
    "no_date": "the record has no date, or one that cannot be read; no window",
    "window_outside_series": "the window reaches outside the series; value missing",
    "window_gap": "a period of the window is missing (a gap or nodata); sums and counts are "
    "missing, means, minima and maxima use the remaining periods",
    "after_visit": "the window includes days after the record's date (lag 0): exposure after "
    "the outcome",
}


def window_suffix(before) -> str:
    """Column part of a window: ``sum3m_lag1`` (3 months, 1 month lag), ``mean10d_lag0``."""
    if before.months is not None:
        return f"{before.combine}{before.months}m_lag{before.lag_months}"
    return f"{before.combine}{before.days}d_lag{before.lag_days}"


class WindowCovariate(SeriesCovariate):
    """One column per statistic: its per-period values combined over each record's window.

    Unnamed columns are ``<layer>_<stat>[_<anomaly tag>]_<window>`` (``rain_mean_sum3m_lag1``);
    with ``name:`` they are ``<name>_<stat>``. SPI windows add ``<column>_cat`` (the WMO class).
    """

    kind = "window"

    @classmethod
    def matches(cls, spec, layer) -> bool:
        return layer.is_series and spec.before is not None

    def resolve(self, ctx: PlanContext) -> bool:
        from covextract.core.messages import missing_column, user_stacklevel
        from covextract.errors import LagZeroWarning

        before = self.before = self.spec.before
        column = before.date or ctx.recipe.study.date
        if column is None:
            ctx.problem(
                "before: needs the record's date: set study.date or before.date",
                self.where("before"),
            )
            return False
        if ctx.table is not None and column not in ctx.table.frame.columns:
            key = self.where("before.date")
            ctx.problem(missing_column(column, ctx.table.frame.columns, key), key)
            return False
        self.date_column = column
        lag = before.lag_months if before.months is not None else before.lag_days
        if lag == 0:
            warnings.warn(
                f"{self.label()}: a window with lag 0 ends with the record's own month or day "
                "and so includes days after the visit (exposure after the outcome); the "
                "codebook says so and such records get the QA code after_visit",
                LagZeroWarning,
                stacklevel=user_stacklevel(),
            )
        self.suffix = window_suffix(before)
        combine = registry.get(before.combine, "window")
        step = self.series.step.text
        noun = "months" if before.months is not None or "month" in step else "periods"
        self.columns = []
        for s in self.stats:
            text, unit = self.inner(s)
            name = (
                f"{self.prefix}_{s.column}"
                if self.named
                else f"{self.prefix}_{self.stat_label(s)}_{self.suffix}"
            )
            threshold = None
            if before.threshold is not None:
                # the threshold is in the unit of the per-period value (mm, percent of normal)
                threshold = f"{before.threshold:g}" + (f" {unit}" if unit else "")
            col = self.column(
                name,
                combine,
                noun if before.combine == "count_above" else unit,
                window=self._window_text(),
                inner=text,
                periods=noun,
                threshold=threshold,
            )
            self.columns.append(col)
            if self.tag and self.tag.startswith("spi"):
                cat = registry.get("category", "anomaly")
                self.columns.append(self.column(f"{name}_cat", cat, "", column=name))
        return True

    def _window_text(self) -> str:
        """The window in words: its length, where it ends, and the date it is counted from."""
        b = self.before

        def n(count, word):
            return f"{count} {word}" + ("" if count == 1 else "s")

        if b.months is not None:
            end = (
                "the month of the record's date"
                if b.lag_months == 0
                else f"the month {n(b.lag_months, 'month')} before the month of the record's date"
            )
            return f"the {n(b.months, 'calendar month')} ending with {end} ({self.date_column})"
        end = (
            "the record's date"
            if b.lag_days == 0
            else f"the day {n(b.lag_days, 'day')} before the record's date"
        )
        return f"the {n(b.days, 'day')} ending with {end} ({self.date_column})"

    def assemble(self, plan, periods, vals, qa_pp) -> Outcome:
        from covextract.derive.time import window_values
        from covextract.io.tables import parse_record_dates

        units = plan.unit_sets[self.unit_key]
        n = len(units)
        qa = self.structural_qa(qa_pp, n)
        b = self.before
        dates = parse_record_dates(
            plan.table.frame, self.date_column, plan.recipe.study.date_format
        )
        values = {}
        value_cols = [c for c in self.columns if c.statistic.family == "window"]
        for s, col in zip(self.stats, value_cols, strict=True):
            out = window_values(
                long_frame(vals[s.name], periods),
                dates.to_numpy(),
                months=b.months,
                lag_months=b.lag_months,
                days=b.days,
                lag_days=b.lag_days,
                combine=b.combine,
                threshold=b.threshold,
            )
            values[col.name] = out["value"].to_numpy(dtype=np.float64)
            if self.tag and self.tag.startswith("spi"):
                from covextract.derive.spi import spi_category

                values[f"{col.name}_cat"] = spi_category(values[col.name])
            for i, codes in enumerate(out["qa"]):
                qa[i] = list(dict.fromkeys(qa[i] + list(codes)))
        valid = np.isfinite(values[value_cols[0].name]).astype(float)
        return Outcome(values, qa, valid)

    def method_text(self, plan) -> str:
        text = super().method_text(plan) + (
            f"; combined by {self.before.combine} over {self._window_text()}; a period longer "
            "than the window counts by its overlap with it"
        )
        lag = self.before.lag_months if self.before.months is not None else self.before.lag_days
        if lag == 0:
            text += "; lag 0: the window includes days after the record's date"
        return text

    def qa_codes(self) -> dict:
        return {**WINDOW_QA_CODES, **super().qa_codes()}
