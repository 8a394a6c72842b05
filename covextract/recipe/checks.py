"""Checks across the recipe's blocks, run on the raw data.

A covariate names a layer, its statistics depend on the layer's kind and on
the unit shape, and an output must not overwrite an input: these checks need
several blocks. They run on the raw mapping in the wrap validator of
:class:`covextract.recipe.model.Recipe`, so they still work, and are reported
together with pydantic's own errors, when other parts of the recipe are
invalid.
"""

from __future__ import annotations

from typing import Any

from pydantic_core import InitErrorDetails

from covextract.core.options import POINT_METHOD_NAMES
from covextract.recipe.common import KIND_CHOICES, SHAPE_KEYS, hint, issue, same_path, suffix_of
from covextract.recipe.stat_names import CHANGE_STATS, PROXY_STATS, THRESHOLD_STATS, stat_problem

__all__ = ["cross_check"]


def _point_mode(units: Any) -> bool | None:
    """Whether the recipe's units are points (True), areas (False) or unclear (None)."""
    if units is None:
        return False
    if not isinstance(units, dict):
        return None
    given = [k for k in SHAPE_KEYS if units.get(k) is not None]
    if len(given) > 1:
        return None
    if given == ["at_point"]:
        return True if units["at_point"] in POINT_METHOD_NAMES else None
    return False


def _check_covariate(
    i: int, cov: dict, kinds: dict | None, point_units: bool | None, at_point: Any
) -> list[InitErrorDetails]:
    issues: list[InitErrorDetails] = []
    loc = ("covariates", i)
    layer = cov.get("layer")
    kind = None
    if isinstance(layer, str) and kinds is not None:
        if layer in kinds:
            kind = kinds[layer]
        else:
            issues.append(
                issue(
                    loc + ("layer",),
                    f"unknown layer {layer!r}{hint(layer, kinds)} (layers in this recipe: "
                    + ", ".join(str(k) for k in kinds)
                    + ")",
                    layer,
                )
            )
    point = None if point_units is None else (point_units and cov.get("buffer_m") is None)
    proxies = [k for k in PROXY_STATS if cov.get(k) is not None]
    proxy = proxies[0] if proxies else None
    if len(proxies) > 1:
        issues.append(
            issue(
                loc + (proxies[1],),
                "give reallocate: or calibrate:, not both "
                "(use two covariates with different names)",
            )
        )
    if proxy is not None and kind == "categorical":
        issues.append(issue(loc + (proxy,), f"{proxy}: needs a continuous light layer", layer))
    if proxy is not None and point:
        issues.append(
            issue(
                loc + (proxy,),
                f"{proxy}: needs area units (buffers or boundaries), not values at points",
                None,
            )
        )
    stats = cov.get("stats")
    names = [s for s in stats if isinstance(s, str)] if isinstance(stats, list) else []
    if isinstance(stats, list):
        seen: set[str] = set()
        for j, stat in enumerate(stats):
            if not isinstance(stat, str):
                continue  # pydantic reports the type
            if stat in seen:
                issues.append(
                    issue(loc + ("stats", j), f"statistic {stat!r} is listed twice", stat)
                )
                continue
            seen.add(stat)
            if proxy is not None:
                if stat not in PROXY_STATS[proxy]:
                    issues.append(
                        issue(
                            loc + ("stats", j),
                            f"a covariate with {proxy}: gives "
                            f"stats: {list(PROXY_STATS[proxy])}; {stat!r} is not one"
                            " (put other statistics in a covariate of their own)",
                            stat,
                        )
                    )
            elif kind is not None:
                # With the unit shape unclear, report only names wrong either way.
                modes = (False, True) if point is None else (point,)
                problems = [stat_problem(stat, kind, mode) for mode in modes]
                if all(problems):
                    issues.append(issue(loc + ("stats", j), problems[0], stat))
    needing = [s for s in names if s in THRESHOLD_STATS]
    has_threshold = cov.get("threshold") is not None
    if needing and not has_threshold and not point:
        issues.append(
            issue(
                loc + ("threshold",),
                f"statistic {needing[0]} needs a threshold: add threshold: <value in the "
                "layer's unit> to this covariate",
            )
        )
    elif has_threshold and isinstance(stats, list) and not needing:
        issues.append(
            issue(
                loc + ("threshold",),
                "threshold is only used by "
                + " and ".join(THRESHOLD_STATS)
                + "; add one of them to stats or remove threshold",
                cov.get("threshold"),
            )
        )
    if kind == "categorical" and point and at_point == "bilinear":
        issues.append(
            issue(
                loc + ("layer",),
                f"layer {layer!r} holds class codes, which bilinear interpolation would mix; "
                "use units.at_point: nearest, or give this covariate a buffer_m",
                layer,
            )
        )
    return issues


def _labels_of(spec: Any) -> set:
    """Class and group labels of a layer's raw spec (what ``pairs:`` may name)."""
    if not isinstance(spec, dict):
        return set()
    # The raw data is not validated yet: a ``classes:`` or ``groups:`` that is
    # not a mapping is reported by the layer's model; here it adds no labels.
    classes = spec.get("classes")
    groups = spec.get("groups")
    labels = {str(v) for v in classes.values()} if isinstance(classes, dict) else set()
    labels |= {str(g) for g in groups} if isinstance(groups, dict) else set()
    return labels | {"other"}


def _check_change(i: int, cov: dict, layers: dict) -> list[InitErrorDetails]:
    """``since:`` / ``pairs:`` and the statistics that need them."""
    issues: list[InitErrorDetails] = []
    loc = ("covariates", i)
    stats = cov.get("stats") if isinstance(cov.get("stats"), list) else []
    wants = [s for s in stats if s in CHANGE_STATS]
    since = cov.get("since")
    pairs = cov.get("pairs")
    layer = cov.get("layer")
    spec = layers.get(layer) if isinstance(layer, str) else None
    kind = spec.get("kind", "continuous") if isinstance(spec, dict) else None
    if wants and since is None:
        issues.append(
            issue(
                loc + ("since",),
                f"statistic {wants[0]} compares with an earlier "
                "layer: add since: <name of the earlier categorical layer>",
            )
        )
    if since is not None:
        if kind is not None and kind != "categorical":
            issues.append(issue(loc + ("since",), "since: is for categorical layers only", since))
        if isinstance(since, str) and since not in layers:
            issues.append(
                issue(loc + ("since",), f"unknown layer {since!r}{hint(since, layers)}", since)
            )
        elif isinstance(since, str):
            other = layers[since]
            if isinstance(other, dict) and other.get("kind", "continuous") != "categorical":
                issues.append(
                    issue(
                        loc + ("since",),
                        f"layer {since!r} is not categorical; "
                        "transitions compare two categorical layers",
                        since,
                    )
                )
            elif (
                isinstance(spec, dict)
                and isinstance(other, dict)
                # A class table that is not a mapping is reported at the layer.
                and isinstance(spec.get("classes") or {}, dict)
                and isinstance(other.get("classes") or {}, dict)
                and ((spec.get("classes") or {}) != (other.get("classes") or {}))
            ):
                issues.append(
                    issue(
                        loc + ("since",),
                        f"layers {layer!r} and {since!r} have "
                        "different class tables; transitions need the same classes",
                        since,
                    )
                )
        if not wants:
            issues.append(
                issue(
                    loc + ("since",),
                    "since: is only used by transition and "
                    "net_change; add one of them to stats or remove since",
                    since,
                )
            )
    series = isinstance(spec, dict) and (
        spec.get("variable") is not None or "{" in str(spec.get("file") or "")
    )
    timed = [k for k in ("periods", "before", "trend", "change") if cov.get(k) is not None]
    if cov.get("anomaly") is not None and not ({"periods", "before"} & set(timed)):
        issues.append(
            issue(
                loc + ("anomaly",),
                "anomaly: turns the series into anomalies; "
                "add periods: (into the panel) or before: (a window before each "
                "visit) to say where they go",
            )
        )
    if timed and isinstance(spec, dict) and not series:
        issues.append(
            issue(
                loc + (timed[0],),
                f"{timed[0]}: needs a series layer; layer "
                f"{layer!r} is one raster (give it a file template with date "
                "fields and every:, or a NetCDF cube with variable:)",
                None,
            )
        )
    if series and not timed:
        issues.append(
            issue(
                loc + ("layer",),
                f"layer {layer!r} is a series: add periods: "
                "(values per period, into output.panel), before: (a window "
                "before each record's date) or trend: to this covariate",
                layer,
            )
        )
    if len(timed) >= 2:
        issues.append(
            issue(
                loc + (timed[1],),
                f"give one of periods:, before: or trend:, not {' and '.join(timed)} "
                "(use covariates with different names)",
            )
        )
    if isinstance(cov.get("periods"), str):
        from covextract.core.periods import parse_selection
        from covextract.errors import RecipeError

        try:
            parse_selection(cov["periods"])
        except RecipeError as exc:
            issues.append(issue(loc + ("periods",), exc.problems[0].message, cov["periods"]))
    weight_by = cov.get("weight_by")
    if isinstance(weight_by, str):
        other = layers.get(weight_by)
        if other is None:
            issues.append(
                issue(
                    loc + ("weight_by",),
                    f"unknown layer {weight_by!r}{hint(weight_by, layers)}",
                    weight_by,
                )
            )
        elif isinstance(other, dict) and other.get("kind", "continuous") != "continuous":
            issues.append(
                issue(
                    loc + ("weight_by",),
                    f"layer {weight_by!r} holds class codes; "
                    "weight_by needs a continuous layer such as population density",
                    weight_by,
                )
            )
        if kind == "categorical":
            issues.append(
                issue(loc + ("weight_by",), "weight_by applies to continuous layers", weight_by)
            )
    if "transition" in stats and not pairs:
        issues.append(
            issue(
                loc + ("pairs",),
                "statistic transition needs pairs: [[from, to], "
                "...] naming classes or groups (from may be any)",
            )
        )
    if pairs and "transition" not in stats:
        issues.append(issue(loc + ("pairs",), "pairs: is only used by transition", pairs))
    if isinstance(pairs, list) and isinstance(spec, dict):
        labels = _labels_of(spec)
        for j, pair in enumerate(pairs):
            if not (isinstance(pair, list) and len(pair) == 2):
                continue
            for k, label in enumerate(pair):
                if not isinstance(label, str):
                    continue
                if label == "any" and k == 0:
                    continue
                if label not in labels:
                    issues.append(
                        issue(
                            loc + ("pairs", j, k),
                            f"{label!r} is not a class or "
                            f"group of layer {layer!r}{hint(label, labels)}; known: "
                            + ", ".join(sorted(labels)),
                            label,
                        )
                    )
    return issues


def cross_check(data: dict) -> list[InitErrorDetails]:
    """Every problem that needs several blocks of the raw recipe ``data``."""
    issues: list[InitErrorDetails] = []
    study = data.get("study") if isinstance(data.get("study"), dict) else {}
    units = data.get("units")
    units_dict = units if isinstance(units, dict) else {}
    layers = data.get("layers")
    kinds = None
    if isinstance(layers, dict):
        kinds = {}
        for name, spec in layers.items():
            kind = spec.get("kind", "continuous") if isinstance(spec, dict) else None
            kinds[name] = kind if kind in KIND_CHOICES else None
    point_units = _point_mode(units)
    covariates = data.get("covariates")
    if isinstance(covariates, list):
        for i, cov in enumerate(covariates):
            if isinstance(cov, dict):
                issues += _check_covariate(i, cov, kinds, point_units, units_dict.get("at_point"))
                issues += _check_change(i, cov, layers if isinstance(layers, dict) else {})

    table = study.get("table")
    has_shape = any(units_dict.get(k) is not None for k in SHAPE_KEYS)
    if (
        isinstance(table, str)
        and suffix_of(table) == ".csv"
        and study.get("points") is None
        and units_dict.get("boundaries") is None
    ):
        issues.append(
            issue(
                ("study", "points"),
                "a CSV table has no geometry: add points: {x: <column>, y: <column>} to study, "
                "or units.boundaries to join polygons by id",
            )
        )
    if study.get("points") is not None and not has_shape and isinstance(covariates, list):
        bare = [
            f"covariates[{i}]"
            for i, cov in enumerate(covariates)
            if isinstance(cov, dict) and cov.get("buffer_m") is None
        ]
        if bare:
            issues.append(
                issue(
                    ("units",),
                    "the records are points (study.points) but no unit shape is given for "
                    + ", ".join(bare)
                    + ": set units.buffer_m (a buffer in metres around each point), "
                    "units.at_point (the value under each point) or buffer_m on each covariate",
                )
            )

    output = data.get("output")
    out_table = output.get("table") if isinstance(output, dict) else None
    if isinstance(out_table, str):
        inputs = [("study.table", table)]
        boundaries = units_dict.get("boundaries")
        if isinstance(boundaries, dict):
            inputs.append(("units.boundaries.file", boundaries.get("file")))
        for what, path in inputs:
            if isinstance(path, str) and same_path(path, out_table):
                issues.append(
                    issue(
                        ("output", "table"),
                        f"output.table is the same file as {what}; covextract never writes "
                        "over an input: choose another path",
                        out_table,
                    )
                )
    return issues
