"""Population proxies from night lights: dasymetric reallocation and log-log calibration."""

from __future__ import annotations

import numpy as np
import pandas as pd

from covextract.covariates.base import ComputeContext, Covariate, Outcome, PlanContext
from covextract.errors import CovextractError, TableError
from covextract.stats import registry
from covextract.stats.names import parse_stat

__all__ = ["ReallocateCovariate", "CalibrateCovariate"]

_PROXY = "a proxy, not a count: lights miss unlit settlements and saturate in towns"


class ReallocateCovariate(Covariate):
    """``<prefix>_allocated``: zone totals spread over pixels by light, summed per unit."""

    kind = "reallocate"

    @classmethod
    def matches(cls, spec, layer) -> bool:
        return spec.reallocate is not None

    def plan(self, ctx: PlanContext) -> bool:
        from covextract.core.messages import missing_column
        from covextract.io.tables import read_boundaries, read_study_table

        spec = self.rspec = self.spec.reallocate
        key = self.where("reallocate")
        recipe, problem = ctx.recipe, ctx.problem
        try:
            zones = read_boundaries(
                recipe.resolve(spec.zones.file), id_column=spec.zones.id, layer=spec.zones.layer
            )
            totals_table = read_study_table(recipe.resolve(spec.totals.file), what="totals table")
        except CovextractError as exc:
            problem(exc, key)
            return False
        frame = totals_table.frame
        for col in (spec.totals.id, spec.totals.column):
            if col not in frame.columns:
                problem(missing_column(col, frame.columns, f"{key}.totals"), f"{key}.totals")
                return False
        ids = frame[spec.totals.id].astype(str).str.strip()
        if ids.duplicated().any():
            problem(
                TableError(
                    f"{key}.totals: zone ids listed twice in {spec.totals.file}: "
                    + ", ".join(sorted(set(ids[ids.duplicated()]))[:5])
                ),
                key,
            )
            return False
        values = pd.to_numeric(frame[spec.totals.column], errors="coerce")
        lookup = dict(zip(ids, values, strict=True))
        zone_ids = [str(z) for z in zones["id"]]
        missing = [z for z in zone_ids if z not in lookup or not np.isfinite(lookup[z])]
        if missing:
            problem(
                TableError(
                    f"{key}: zones without a usable total in {spec.totals.file} (column "
                    f"{spec.totals.column!r}): {', '.join(missing[:5])}"
                    + (f" and {len(missing) - 5} more" if len(missing) > 5 else "")
                    + ". Every zone needs a number; remove zones that have none from the zone file."
                ),
                key,
            )
            return False
        totals = np.array([lookup[z] for z in zone_ids], dtype=np.float64)
        if (totals < 0).any():
            bad = [z for z, t in zip(zone_ids, totals, strict=True) if t < 0]
            problem(
                TableError(
                    f"{key}: negative totals for zones {', '.join(bad[:5])}; totals "
                    "are counts and cannot be negative"
                ),
                key,
            )
            return False
        self.zones, self.zone_ids, self.totals = zones, zone_ids, totals
        stat = registry.get("allocated", "proxy")
        self.stats = [stat]
        how = (
            "light x pixel area"
            if spec.by == "light"
            else f"lit area (pixels with light > {spec.threshold!r})"
        )
        unit = (
            getattr(spec.totals, "unit", None)
            or f"as column {spec.totals.column!r} of the totals file"
        )
        col = self.column(f"{self.prefix}_allocated", stat, unit, how=how)
        col.definition += (
            f"; totals from {spec.totals.file} (column {spec.totals.column!r}), zones from "
            f"{spec.zones.file}; zones without light spread their total evenly over their area; "
            + _PROXY
        )
        self.columns = [col]
        return True

    def compute(self, ctx: ComputeContext) -> Outcome:
        from covextract.derive.reallocation import reallocate

        plan = ctx.plan
        src = self.source(plan)
        geoms = plan.unit_sets[self.unit_key].to_crs(src.grid.crs)
        zones = self.zones.to_crs(src.grid.crs)
        out = reallocate(
            src,
            np.array(list(zones.geometry), dtype=object),
            self.totals,
            geoms,
            by=self.rspec.by,
            threshold=self.rspec.threshold,
            rule=self.rule,
            zone_ids=self.zone_ids,
            threads=ctx.threads,
            client=ctx.client,
            progress=ctx.advance,
        )
        dark = [self.zone_ids[j] for j in out.dark_zones]
        # the unit-by-zone pieces are rebuilt on every run (not cached yet)
        return Outcome(
            {self.columns[0].name: np.asarray(out.values, dtype=np.float64)},
            out.qa,
            np.asarray(out.valid_share),
            learnt={"dark_zones": dark},
        )

    def method_text(self, plan) -> str:
        return "dasymetric reallocation of zone totals by night-time light"

    def describe_learnt(self, learnt: dict) -> str:
        """Codebook text of what the run found (zones without light)."""
        dark = learnt.get("dark_zones") or []
        return f"zones without light: {', '.join(dark)}" if dark else ""

    def qa_codes(self) -> dict:
        from covextract.derive.reallocation import REALLOCATION_QA_CODES

        return dict(REALLOCATION_QA_CODES)

    def extra_inputs(self, recipe) -> list:
        """The zone and totals files, for the manifest and fingerprints."""
        return [
            (f"zones:{self.prefix}", recipe.resolve(self.rspec.zones.file)),
            (f"totals:{self.prefix}", recipe.resolve(self.rspec.totals.file)),
        ]


class CalibrateCovariate(Covariate):
    """``<prefix>_predicted``, ``_lower``, ``_upper``: counts predicted from light (log-log fit)."""

    kind = "calibrate"

    @classmethod
    def matches(cls, spec, layer) -> bool:
        return spec.calibrate is not None

    def plan(self, ctx: PlanContext) -> bool:
        from covextract.core.messages import missing_column

        spec = self.cspec = self.spec.calibrate
        key = self.where("calibrate.known")
        table = ctx.table
        if table is None:
            return False
        if spec.known not in table.frame.columns:
            ctx.problem(missing_column(spec.known, table.frame.columns, key), key)
            return False
        raw = table.frame[spec.known]
        text = raw.astype(str).str.strip()
        known = pd.to_numeric(text.where(text != "", None), errors="coerce")
        bad = text[(text != "") & known.isna() & raw.notna()]
        if len(bad):
            ctx.problem(
                TableError(
                    f"{key}: column {spec.known!r} has cells that are not numbers "
                    f"(rows {', '.join(str(r + 1) for r in bad.index[:5])}: "
                    f"{', '.join(repr(v) for v in bad.iloc[:5])}); leave unknown counts "
                    "empty"
                ),
                key,
            )
            return False
        self.known = known.to_numpy(dtype=np.float64)
        self.light = parse_stat(spec.light)
        self.stats = [registry.get(p, "proxy") for p in ("predicted", "lower", "upper")]
        unit = getattr(spec, "unit", None) or f"as column {spec.known!r} of the study table"
        self.fit_text = (
            f"the fit of log(known count in column {spec.known!r}) = a + b log(light "
            f"{spec.light} of layer {self.layer_name!r}) on units with a known count > 0 and "
            "light > 0 (unlit units get no prediction)"
        )
        self.columns = [
            self.column(f"{self.prefix}_{s.name}", s, unit, fit=self.fit_text) for s in self.stats
        ]
        for col in self.columns:
            col.definition += "; " + _PROXY
        return True

    def compute(self, ctx: ComputeContext) -> Outcome:
        from covextract.derive.calibration import calibrate
        from covextract.engine.zonal import zonal_units

        plan = ctx.plan
        src = self.source(plan)
        geoms = plan.unit_sets[self.unit_key].to_crs(src.grid.crs)
        light = zonal_units(
            src,
            geoms,
            [self.light],
            progress=ctx.advance,
            **self.engine_options(plan, ctx, threshold=None),
        )
        x = light.values[self.light.name]
        fit = calibrate(x, self.known)
        est, lo, hi, pqa = fit.predict(x)
        qa = [list(a) + list(b) for a, b in zip(light.qa, pqa, strict=True)]
        names = [c.name for c in self.columns]
        return Outcome(
            dict(zip(names, (est, lo, hi), strict=True)),
            qa,
            light.valid_share,
            weights_builds=light.weights_builds,
            workers=set(light.workers),
            learnt={"fit": fit.summary()},
        )

    def piece_inputs(self, plan) -> list:
        # the known counts come from the study table
        return [*super().piece_inputs(plan), ("study_table", plan.table.path)]

    def method_text(self, plan) -> str:
        return "log-log calibration of known counts on night-time light"

    def describe_learnt(self, learnt: dict) -> str:
        """Codebook text of the fitted coefficients."""
        fit = learnt.get("fit") or {}
        return "fitted: " + ", ".join(
            f"{k} = {v:.6g}" if isinstance(v, float) else f"{k} = {v}" for k, v in fit.items()
        )

    def qa_codes(self) -> dict:
        from covextract.derive.calibration import CALIBRATION_QA_CODES

        return dict(CALIBRATION_QA_CODES)
