"""Codebook rows of a covariate: what every column holds, its unit, method and sources.

The texts of statistics come from the registry; a kind adds its method text
(:meth:`~covextract.covariates.base.Covariate.method_text`) and QA codes.
"""

from __future__ import annotations

__all__ = ["codebook_rows", "source_text"]


def _stored_text(src) -> str:
    nd = ", ".join(repr(v) for v in dict.fromkeys(src.nodata)) or "none declared"
    return (
        f"stored values {nd}, NaN"
        + (f" and values outside {list(src.valid_range)}" if src.valid_range else "")
        + " are missing; physical value = stored x "
        + f"{src.scale!r} + {src.offset!r}, applied before any statistic"
        + (
            f"; values above {src.ceiling!r} are set to {src.ceiling!r}"
            if getattr(src, "ceiling", None) is not None
            else ""
        )
    )


def nodata_text(src, layer) -> str:
    """How missing values are handled, for the codebook."""
    if not layer.bands:
        return _stored_text(src)
    inner = getattr(src, "source", src)
    parts = [f"band {name}: {_stored_text(b)}" for name, b in inner.bands.items()]
    text = (
        f"index {layer.index or layer.expression!r} computed per pixel after each band's scale "
        "and fill; a pixel is missing where any band is missing or the formula is undefined "
        "(division by zero gives nodata, not inf). " + "; ".join(parts)
    )
    if layer.valid_range:
        text += f"; index values outside {list(layer.valid_range)} are missing"
    if layer.ceiling is not None:
        text += f"; index values above {layer.ceiling!r} are set to it"
    return text


def source_text(plan, name) -> str:
    """What a layer reads (file, bands, template and period range), no local folder names."""
    return plan.layers[name].describe()


def codebook_rows(cov, plan, learnt: dict) -> list[dict]:
    """One codebook row per column of ``cov`` (table and panel), then its QA column."""
    from covextract.core.options import rule_text
    from covextract.engine.zonal import QA_CODES
    from covextract.units.build import QA_CODES as UNIT_QA_CODES

    layer = cov.layer
    src = plan.sources[cov.layer_name]
    units = plan.unit_sets[cov.unit_key]
    weighting = (
        "on (grid pixel area varies)"
        if cov.area_weighting == "auto" and src.grid.area_varies
        else ("off" if cov.area_weighting == "off" else "auto: not needed, pixel area constant")
    )
    method = "; ".join(t for t in (cov.method_text(plan), cov.describe_learnt(learnt)) if t)
    base = {
        "layer": cov.layer_name,
        "pixel_rule": rule_text(cov.rule),
        "area_weighting": weighting,
        "unit_shape": units.description,
        "nodata_handling": nodata_text(src, layer),
        "method": method,
        "source_file": source_text(plan, cov.layer_name),
        "source": layer.source or "",
        "version": layer.version or "",
        "citation": layer.citation or "",
        "license": layer.license or "",
    }
    # not written to the CSV: what the methods paragraph and the Markdown need
    spec = cov.spec
    roles = {
        getattr(spec, "since", None): "its earlier layer (since)",
        getattr(spec, "weight_by", None): "its weight layer (weight_by)",
    }
    base["reads"] = {n: roles.get(n, "its layer") for n in cov.layers_used()}
    base["covariate"] = cov.prefix
    transform = getattr(cov, "transform", None)
    rows = []
    for col in cov.columns:
        rows.append(
            {
                **base,
                "column": col.name,
                "output": "long panel" if col.where == "panel" else "table",
                "statistic": col.statistic.name,
                "definition": col.definition,
                "unit_of_measure": col.unit,
                "qa_codes": "",
                "cites": _cites(col.statistic, transform),
            }
        )
    if cov.qa_column:
        codes = {**UNIT_QA_CODES, **QA_CODES, **cov.qa_codes()}
        rows.append(
            {
                **base,
                "column": cov.qa_column,
                "output": "table",
                "statistic": "qa",
                "definition": "reason codes separated by ';', empty when all is well",
                "unit_of_measure": "none (text codes)",
                "qa_codes": "; ".join(f"{k}: {v}" for k, v in codes.items()),
            }
        )
    panel = [c.name for c in cov.columns if c.where == "panel"]
    if panel:
        # The long panel has one qa column for all its rows; each covariate with panel
        # columns describes it for its own rows (column "qa", output "long panel").
        rows.append(
            {
                **base,
                "column": "qa",
                "output": "long panel",
                "statistic": "qa",
                "definition": "reason codes of the unit in that period, separated by ';', empty "
                f"when all is well; in the long panel's rows of {', '.join(panel)}",
                "unit_of_measure": "none (text codes)",
                "qa_codes": "; ".join(f"{k}: {v}" for k, v in QA_CODES.items()),
                "panel_columns": panel,
            }
        )
    return rows


#: Statistic (or series transform) -> key of the published method it uses, for the
#: references of the codebook's methods paragraph.
_CITED = {
    "ols": "sen",
    "sen": "sen",
    "p": "sen",
    "shannon": "shannon",
    "spi": "spi",
    "category": "spi",
    "allocated": "allocated",
    "predicted": "predicted",
    "lower": "predicted",
    "upper": "predicted",
}


def _cites(stat, transform) -> tuple:
    keys = [_CITED.get(stat.name)]
    if transform is not None:
        keys.append(_CITED.get(transform.name))
    return tuple(dict.fromkeys(k for k in keys if k))
