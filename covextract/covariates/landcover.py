"""Land-cover statistics of a categorical layer: class shares, dominant class, diversity, change."""

from __future__ import annotations

import warnings

from covextract.covariates.base import ComputeContext, Covariate, Outcome, PlanContext
from covextract.stats import registry

__all__ = ["LandCoverCovariate", "code_text"]


def code_text(code: float) -> str:
    """A class code as the user wrote it (``11``, not ``11.0``)."""
    return str(int(code)) if float(code).is_integer() else repr(code)


class LandCoverCovariate(Covariate):
    """Columns of a categorical layer over each unit's area.

    ``share_<class>`` (one per class and group, plus ``share_other``),
    ``dominant``, ``classes_present``, ``shannon``, ``valid_share``; with
    ``since: <earlier layer>`` also ``net_<class>`` and, for each pair in
    ``pairs:``, ``<from>_to_<to>``.
    """

    kind = "landcover"

    @classmethod
    def matches(cls, spec, layer) -> bool:
        return (
            not layer.is_series
            and layer.kind == "categorical"
            and spec.reallocate is None
            and spec.calibrate is None
        )

    def plan(self, ctx: PlanContext) -> bool:
        from covextract.engine.categorical import ClassTable, PairedSource, categorical_columns
        from covextract.errors import RasterError

        if self.point:
            ctx.problem(
                f"layer {self.layer_name!r} holds class codes; class shares need an area: give "
                "this covariate a buffer_m, or use buffers or boundaries as units",
                self.where("layer"),
            )
            return False
        self.table = ClassTable.from_mapping(self.layer.classes or {})
        self.groups = {g: list(codes) for g, codes in (self.layer.groups or {}).items()}
        self.pairs = [tuple(p) for p in (self.spec.pairs or [])]
        self.since = self.spec.since
        self.earlier = None
        if self.since:
            later, earlier = ctx.sources.get(self.layer_name), ctx.sources.get(self.since)
            if later is not None and earlier is not None:
                try:
                    PairedSource(later, earlier)
                except RasterError as exc:
                    ctx.problem(exc, self.where("since"))
                    return False
            self.earlier = earlier
        self.suffixes = categorical_columns(self.spec.stats, self.table, self.groups, self.pairs)
        self.stats = [registry.get(s, "categorical") for s in dict.fromkeys(self.spec.stats)]
        legend = "; ".join(
            f"{code_text(c)} = {lbl}"
            for c, lbl in zip(self.table.codes, self.table.labels, strict=True)
        )
        groups = "; ".join(f"{g} = {', '.join(map(str, c))}" for g, c in self.groups.items())
        self.legend = f"class table: {legend}" + (f"; groups: {groups}" if groups else "")
        self.columns = []
        for suffix, stat_name in self.suffixes:
            stat = registry.get(stat_name, "categorical")
            name, fill = self._name_and_fill(suffix, stat_name)
            col = self.column(
                f"{self.prefix}_{name}",
                stat,
                self.layer_unit,
                since=self.since,
                layer=self.layer_name,
                **fill,
            )
            self.columns.append(col)
        return True

    def warn(self, outcome: Outcome, n_units: int, unit_qa=None) -> None:
        super().warn(outcome, n_units, unit_qa)
        if outcome.unknown_codes:
            from covextract.core.messages import user_stacklevel
            from covextract.errors import UnknownClassWarning

            codes = ", ".join(code_text(c) for c in outcome.unknown_codes[:10])
            # Name the share_other column only when this entry writes one (a change entry
            # without share: does not).
            other = f"{self.prefix}_share_other"
            where = f" in {other}" if any(c.name == other for c in self.columns) else ""
            warnings.warn(
                f"layer {self.layer_name!r} holds codes not in its class table ({codes}); they "
                f"are counted as 'other'{where}. Add them to classes: to name them.",
                UnknownClassWarning,
                stacklevel=user_stacklevel(),
            )

    def _name_and_fill(self, suffix: str, stat: str) -> tuple[str, dict]:
        if stat == "share":
            target = suffix[len("share_") :]
            return suffix, {"target": _target_text(target, self.groups)}
        if stat == "net_change":
            target = suffix[len("net_change_") :]
            return f"net_{target}", {"target": _target_text(target, self.groups)}
        if stat == "transition":
            a, b = suffix[len("transition_") :].split("_to_", 1)
            return f"{a}_to_{b}", {
                "source_class": _target_text(a, self.groups),
                "target_class": _target_text(b, self.groups),
            }
        return suffix, {}

    def method_text(self, plan) -> str:
        text = self.legend + "; codes not in the class table count as 'other'"
        if self.since:
            text += f"; change against layer {self.since!r} on pixels valid in both layers"
        return text

    def compute(self, ctx: ComputeContext) -> Outcome:
        from covextract.engine.zonal import zonal_units

        plan = ctx.plan
        src = self.source(plan)
        geoms = plan.unit_sets[self.unit_key].to_crs(src.grid.crs)
        res = zonal_units(
            src,
            geoms,
            list(self.spec.stats),
            progress=ctx.advance,
            categorical={
                "table": self.table,
                "groups": self.groups,
                "pairs": self.pairs,
                "earlier": self.earlier,
            },
            **self.engine_options(plan, ctx),
        )
        values = {
            col.name: res.values[suffix]
            for (suffix, _), col in zip(self.suffixes, self.columns, strict=True)
        }
        unknown = list(res.unknown_codes or [])
        return Outcome(
            values,
            res.qa,
            res.valid_share,
            weights_builds=res.weights_builds,
            workers=set(res.workers),
            unknown_codes=unknown,
        )


def _target_text(label: str, groups: dict) -> str:
    if label == "other":
        return "codes not in the class table ('other')"
    if label == "any":
        return "any class other than the target"
    if label in groups:
        return f"group {label} (codes {', '.join(map(str, groups[label]))})"
    return f"class {label}"
