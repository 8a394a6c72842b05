"""From a recipe to covariates: plan, check, compute, write.

The flow runs one way: recipe → study table and units → layers → weights →
per-unit statistics → columns → outputs. :func:`check_recipe` runs every
step that does not compute pixels and reports every problem; :func:`run`
computes and (by default) writes.
"""

from __future__ import annotations

import contextlib
import difflib
import warnings
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pandas as pd

from covextract.errors import (
    ColumnCollisionError,
    CovextractError,
    OutputError,
    RecipeError,
    RecipeProblem,
    UnitOutsideLayerWarning,
    UnknownClassWarning,
)
from covextract.stats.names import StatName, parse_stat

__all__ = [
    "Plan",
    "CovariatePlan",
    "CovariateOutcome",
    "RunResult",
    "plan_recipe",
    "check_recipe",
    "compute_covariate",
    "input_files",
    "run",
]


def _unit_qa_codes() -> dict:
    from covextract.units.build import QA_CODES

    return QA_CODES


@dataclass
class CovariatePlan:
    """One covariate, resolved: its layer, units, statistics and columns."""

    index: int
    spec: object
    layer_name: str
    prefix: str
    stats: list[StatName]
    rule: str
    area_weighting: str
    threshold: float | None
    unit_key: tuple
    columns: list[str]
    qa_column: str
    categorical: dict | None = None
    proxy: dict | None = None
    timed: dict | None = None


@dataclass
class Plan:
    """Everything a run needs, checked, before any pixel is read."""

    recipe: object
    table: object
    unit_sets: dict
    sources: dict
    covariates: list[CovariatePlan]
    output_paths: dict
    problems: list = field(default_factory=list)
    series: dict = field(default_factory=dict)
    layers: dict = field(default_factory=dict)


@dataclass
class RunResult:
    """What a run produced."""

    table: pd.DataFrame
    columns: list[str]
    codebook: list[dict]
    outputs: dict
    summary: dict


# --------------------------------------------------------------------- helpers
def _load(recipe):
    from covextract.recipe import load_recipe

    if hasattr(recipe, "covariates") and hasattr(recipe, "resolve"):
        return recipe
    return load_recipe(recipe)


def _radius_spec(buffer_m):
    """``(buffer_m, radius_column)`` from a recipe value (number or {column})."""
    if buffer_m is None:
        return None, None
    if isinstance(buffer_m, int | float):
        return float(buffer_m), None
    col = getattr(buffer_m, "column", None)
    if col is None and isinstance(buffer_m, dict):
        col = buffer_m.get("column")
    return None, col


def _unit_key(recipe, cov) -> tuple:
    if getattr(cov, "buffer_m", None) is not None:
        b, c = _radius_spec(cov.buffer_m)
        return ("buffer", b, c)
    u = recipe.units
    if u is None:
        return ("own",)
    if u.buffer_m is not None:
        b, c = _radius_spec(u.buffer_m)
        return ("buffer", b, c)
    if u.boundaries is not None:
        return ("boundaries",)
    if u.at_point is not None:
        return ("point", u.at_point)
    return ("own",)


def _points(recipe):
    p = recipe.study.points
    if p is None:
        return None
    return {"x": p.x, "y": p.y, "crs": p.crs}


def _build_unit_set(recipe, table, key, boundaries_cache):
    from covextract.io.tables import read_boundaries
    from covextract.units import build_units

    kw = {"id_column": recipe.study.id, "points": _points(recipe)}
    if key[0] == "buffer":
        kw["buffer_m"], kw["radius_column"] = key[1], key[2]
    elif key[0] == "boundaries":
        b = recipe.units.boundaries
        if "gdf" not in boundaries_cache:
            boundaries_cache["gdf"] = read_boundaries(
                recipe.resolve(b.file), id_column=b.id, layer=getattr(b, "layer", None)
            )
        kw["boundaries"] = boundaries_cache["gdf"]
        kw["boundary_id"] = "id"
        kw["points"] = None
    elif key[0] == "point":
        kw["at_point"] = key[1]
    return build_units(table, **kw)


def _output_paths(recipe) -> dict:
    out = recipe.output
    table = recipe.resolve(out.table)
    stem = table.with_suffix("")
    codebook = recipe.resolve(out.codebook) if out.codebook else Path(f"{stem}_codebook.csv")
    manifest = recipe.resolve(out.manifest) if out.manifest else Path(f"{stem}_manifest.json")
    state = recipe.resolve(out.state) if out.state else table.parent / ".covextract-state"
    return {
        "table": table,
        "codebook": codebook,
        "codebook_md": codebook.with_suffix(".md"),
        "manifest": manifest,
        "state": state,
    }


# ------------------------------------------------------------------------ plan
def plan_recipe(recipe, *, collect: bool = False) -> Plan:
    """Resolve a recipe into a :class:`Plan`, opening every input but reading no pixels.

    Parameters
    ----------
    recipe : path, dict or Recipe
        The recipe.
    collect : bool
        Collect every problem into ``plan.problems`` instead of raising at the
        first one (what ``covextract check`` does).

    Raises
    ------
    CovextractError
        On the first problem, unless ``collect``.
    """
    from covextract.io.tables import read_study_table

    recipe = _load(recipe)
    problems: list = []

    def problem(exc_or_msg, key=None):
        if not collect:
            if isinstance(exc_or_msg, BaseException):
                raise exc_or_msg
            raise RecipeError([RecipeProblem(exc_or_msg, key=key, file=_file(recipe))])
        if isinstance(exc_or_msg, RecipeError):
            problems.extend(exc_or_msg.problems)
        else:
            problems.append(
                RecipeProblem(str(exc_or_msg), key=key, file=_file(recipe), line=_line(recipe, key))
            )

    paths = _output_paths(recipe)
    table_path = recipe.resolve(recipe.study.table)
    table = None
    try:
        table = read_study_table(table_path, layer=getattr(recipe.study, "layer", None))
    except CovextractError as exc:
        problem(exc, "study.table")

    if table is not None:
        if paths["table"].resolve() == table_path.resolve():
            problem(
                OutputError(
                    f"output.table is the study table itself ({table_path}); covextract never "
                    "writes over its input. Choose another file name."
                ),
                "output.table",
            )
        gpkg_problem = _gpkg_problem(recipe, table, paths["table"])
        if gpkg_problem is not None:
            problem(gpkg_problem, "output.table")
        for name in (recipe.study.date,):
            if name and name not in table.frame.columns:
                problem(_missing_column(name, table.frame.columns, "study.date"), "study.date")
        for col in recipe.output.drop:
            if col not in table.frame.columns:
                problem(_missing_column(col, table.frame.columns, "output.drop"), "output.drop")

    # units
    unit_sets: dict = {}
    boundaries_cache: dict = {}
    keys = []
    for cov in recipe.covariates:
        k = _unit_key(recipe, cov)
        if k not in keys:
            keys.append(k)
    if table is not None:
        for k in keys:
            try:
                # Record the unit builder's warnings and re-emit them at the caller's
                # line, so they point at user code and each filter applies once there.
                with warnings.catch_warnings(record=True) as caught:
                    warnings.simplefilter("always")
                    unit_sets[k] = _build_unit_set(recipe, table, k, boundaries_cache)
                for w in caught:
                    warnings.warn(w.message, w.category, stacklevel=_user_stacklevel())
            except CovextractError as exc:
                problem(exc, "units")
                break

    # layers
    sources = {}
    series: dict = {}
    layer_sources: dict = {}
    used_layers = {c.layer for c in recipe.covariates}
    used_layers |= {c.since for c in recipe.covariates if getattr(c, "since", None)}
    used_layers |= {c.weight_by for c in recipe.covariates if getattr(c, "weight_by", None)}
    for name, layer in recipe.layers.items():
        if name not in used_layers:
            continue
        try:
            from covextract.sources.registry import open_source

            opened = open_source(name, layer, resolve=recipe.resolve, base_dir=recipe.base_dir)
            layer_sources[name] = opened
            if opened.is_series:
                series[name] = opened.source
                sources[name] = opened.source.source(opened.source.periods[0])
            else:
                sources[name] = opened.source
        except CovextractError as exc:
            problem(exc, f"layers.{name}.{'bands' if layer.bands else 'file'}")

    # covariates and their columns
    plans: list[CovariatePlan] = []
    owner: dict[str, str] = {}
    existing = set(table.frame.columns) if table is not None else set()
    for i, cov in enumerate(recipe.covariates):
        layer = recipe.layers[cov.layer]
        k = _unit_key(recipe, cov)
        point = k[0] == "point"
        categorical = None
        proxy = None
        timed = None
        if getattr(layer, "is_series", False):
            timed = _timed_config(recipe, cov, table, series.get(cov.layer), problem, i)
            if timed is None:
                continue
        if (
            getattr(cov, "reallocate", None) is not None
            or getattr(cov, "calibrate", None) is not None
        ):
            proxy = _proxy_config(recipe, cov, table, problem, i)
            if proxy is None:
                continue
            stats = proxy["stats"]
        elif getattr(layer, "kind", "continuous") == "categorical":
            if point:
                problem(
                    f"layer {cov.layer!r} holds class codes; class shares need an area: give "
                    "this covariate a buffer_m, or use buffers or boundaries as units",
                    f"covariates[{i}].layer",
                )
                continue
            categorical = _categorical_config(cov, layer, sources, problem, i)
            if categorical is None:
                continue
            stats = categorical["columns"]
        else:
            try:
                stats = [parse_stat(s, point=point) for s in cov.stats]
            except ValueError as exc:
                problem(str(exc), f"covariates[{i}].stats")
                continue
        prefix = cov.name or cov.layer
        rule = k[1] if point else cov.pixels
        if categorical is not None:
            columns = [f"{prefix}_{suffix}" for suffix, _ in stats]
        elif proxy is not None:
            columns = [f"{prefix}_{suffix}" for suffix in proxy["columns"]]
        elif timed is not None and timed["kind"] == "before":
            lab = [s.name + (f"_{timed['tag']}" if timed["tag"] else "") for s in stats]
            columns = [f"{prefix}_{x}_{timed['suffix']}" for x in lab]
            if timed["tag"] and timed["tag"].startswith("spi"):
                columns += [f"{c}_category" for c in columns]
        elif timed is not None and timed["kind"] == "change":
            columns = [f"{prefix}_{s.name}_change_{timed['tag']}" for s in stats]
            columns.append(f"{prefix}_relchange_{timed['tag']}")
        elif timed is not None and timed["kind"] == "trend":
            columns = [
                f"{prefix}_{s.name}_trend_{part}" for s in stats for part in ("ols", "sen", "p")
            ]
        elif timed is not None:
            columns = []
        else:
            columns = [f"{prefix}_{s.name}" for s in stats]
        qa_col = f"{prefix}_qa"
        where = f"covariates[{i}]"
        for col in columns + [qa_col]:
            if col in existing:
                problem(
                    ColumnCollisionError(
                        f"covariate {i + 1} (layer {cov.layer!r}) would write column {col!r}, "
                        "which the study table already has. Add name: to this covariate "
                        f"(for example name: {prefix}_env) to change its columns."
                    ),
                    where,
                )
                break
            if col in owner:
                problem(
                    ColumnCollisionError(
                        f"covariates {owner[col]} and {i + 1} would both write column {col!r}. "
                        f"Add a distinct name: to covariate {i + 1} (for example name: "
                        f"{prefix}_{i + 1})."
                    ),
                    where,
                )
                break
        for col in columns + [qa_col]:
            owner.setdefault(col, str(i + 1))
        plans.append(
            CovariatePlan(
                index=i,
                spec=cov,
                layer_name=cov.layer,
                prefix=prefix,
                stats=stats,
                rule=rule,
                area_weighting=_weighting_text(cov.area_weighting),
                threshold=cov.threshold,
                unit_key=k,
                columns=columns,
                qa_column=qa_col,
                categorical=categorical,
                proxy=proxy,
                timed=timed,
            )
        )

    # weights on the same grid
    for cp in plans:
        wb = getattr(cp.spec, "weight_by", None)
        if wb and cp.layer_name in sources and wb in sources:
            from covextract.sources.weighted import WeightedSource

            try:
                WeightedSource(sources[cp.layer_name], sources[wb])
            except CovextractError as exc:
                problem(exc, f"covariates[{cp.index}].weight_by")

    # units overlap each layer's extent
    for cp in plans:
        us = unit_sets.get(cp.unit_key)
        src = sources.get(cp.layer_name)
        if us is None or src is None:
            continue
        try:
            n_out = _count_outside(us, src.grid)
        except CovextractError as exc:
            problem(exc, f"covariates[{cp.index}]")
            continue
        n_geom = sum(g is not None for g in us.geometry)
        if n_geom and n_out == n_geom:
            problem(
                f"no unit overlaps layer {cp.layer_name!r} (grid bounds {src.grid.bounds} in "
                f"{src.grid.crs.to_string()}); check the layer file and the study's CRS",
                f"covariates[{cp.index}].layer",
            )
    return Plan(recipe, table, unit_sets, sources, plans, paths, problems, series, layer_sources)


def _user_stacklevel() -> int:
    """``stacklevel`` for :func:`warnings.warn` naming the first frame outside covextract.

    Counted from the function that calls this one (level 1), so a warning raised
    deep inside a run points at the user's ``run(...)`` or ``check_recipe(...)`` line.
    """
    import os
    import sys

    package = os.path.dirname(os.path.abspath(__file__)) + os.sep
    frame = sys._getframe(1)
    level = 1
    while frame is not None and os.path.abspath(frame.f_code.co_filename).startswith(package):
        frame = frame.f_back
        level += 1
    return level


def _timed_text(cp) -> str:
    t = cp.timed
    series = t["series"]
    first, last = t["periods"][0], t["periods"][-1]
    text = (
        f"series of {len(series.periods)} periods ({series.step.text}); statistics computed per "
        f"period with the same weights"
    )
    anomaly = t.get("anomaly")
    if anomaly is not None:
        if anomaly.kind == "spi":
            text += (
                f"; turned into the standardized precipitation index SPI-{anomaly.months} "
                f"(McKee et al. 1993; WMO-No. 1090): gamma (location 0) fitted per unit and "
                f"calendar month to the {anomaly.months}-month totals of {anomaly.baseline}, zeros "
                "mixed back in, standard normal quantile; _category columns give the WMO class "
                "(half-open intervals)"
            )
        else:
            what = {
                "difference": "value minus the baseline mean",
                "percent": "100 x value / baseline mean (missing where the normal is 0)",
                "zscore": "(value - baseline mean) / baseline sd (ddof 1)",
            }[anomaly.kind]
            text += f"; anomaly per unit and calendar month against {anomaly.baseline}: {what}"
    if t["kind"] == "change":
        c = t["spec"]
        return text + (
            f"; change from {c.from_} to {c.to} computed per pixel on pixels valid in both "
            f"(each side collapsed per pixel by {c.collapse} over its {len(t['earlier'])} and "
            f"{len(t['periods'])} periods; a pixel counts only where all are valid), then "
            "summarised over the unit (not the difference of two unit means); relchange = mean "
            "change / mean earlier value on the same pixels"
        )
    if t["kind"] == "trend":
        return text + (
            f"; trend per year of the unit's annual values over {t['spec'].periods} (a finer "
            "series is collapsed to annual means first, since seasonality and autocorrelation "
            "make monthly p-values far too small): _ols = ordinary least squares slope, _sen = "
            "Theil-Sen slope (Sen 1968), _p = Mann-Kendall p-value (tie-corrected); at least "
            f"{t['spec'].min_years} valid years"
        )
    if t["kind"] == "periods":
        return text + (
            f"; periods {first.label} to {last.label} written to the long panel "
            "(output.panel: unit_id, column, period_start, period_end, value)"
        )
    b = t["spec"]
    if b.months is not None:
        window = (
            f"the {b.months} calendar months ending {b.lag_months} month(s) before the month of "
            f"{t['date_column']}"
        )
        lag = b.lag_months
    else:
        window = f"the {b.days} days ending {b.lag_days} day(s) before {t['date_column']}"
        lag = b.lag_days
    text += (
        f"; combined by {b.combine}"
        + (f" (periods with value > {b.threshold!r})" if b.combine == "count_above" else "")
        + f" over {window}; a period longer than the window counts by its overlap with it"
    )
    if lag == 0:
        text += "; lag 0: the window includes days after the record's date"
    return text


def timed_periods(cp) -> list:
    """The periods whose per-period statistics a series covariate needs (not ``change:``)."""
    t = cp.timed
    return list(t.get("all_periods") or t["periods"])


def _engine_options(cp, units, cache, threads, client, **override) -> dict:
    """The keyword arguments every engine call of a covariate shares (``override`` wins)."""
    options = {
        "rule": cp.rule,
        "area_weighting": cp.area_weighting,
        "threshold": cp.threshold,
        "cache": cache,
        "units_fingerprint": units.fingerprint(),
        "threads": threads,
        "client": client,
    }
    options.update(override)
    return options


def _timed_period_stats(cp, units, geoms, periods, cache, advance, threads, client):
    """Per-period statistics of a series covariate: ``(values, qa_per_period, builds)``."""
    from covextract.timed import series_statistics

    return series_statistics(
        cp.timed["series"],
        periods,
        geoms,
        cp.stats,
        progress=advance,
        **_engine_options(cp, units, cache, threads, client),
    )


def _timed_assemble(cp, plan, units, periods, vals, qa_pp):
    """Panel rows and window, trend or anomaly columns from the per-period statistics."""
    from covextract.derive.time import window_values
    from covextract.engine.zonal import ZonalResult
    from covextract.timed import long_panel, parse_record_dates

    t = cp.timed
    n = len(units)
    vals = {k: np.array(v, dtype=np.float64, copy=True) for k, v in vals.items()}
    # Codes that describe the unit's place on the grid hold for every period; codes about
    # a period's pixels (nodata, low valid share) would wrongly flag records whose window
    # does not include that period, and missing periods in a window are window_gap.
    structural = {"outside_layer", "partly_outside", "missed_by_centers"}
    if t["kind"] == "periods":
        structural |= {"no_valid_pixel", "low_valid"}
    qa = [
        list(dict.fromkeys(c for per in qa_pp for c in per[i] if c in structural)) for i in range(n)
    ]
    labels = {s.name: s.name for s in cp.stats}
    if t.get("anomaly") is not None:
        for s in cp.stats:
            # per-period codes of the anomaly (a short baseline, a zero normal, the first
            # months without an N-month total) are not copied to the record: a missing
            # anomaly inside a record's window shows there as window_gap
            vals[s.name], _codes = _apply_anomaly(t["anomaly"], periods, vals[s.name])
            labels[s.name] = f"{s.name}_{t['tag']}"
    keep = t["periods"]
    if keep is not periods:
        idx = [periods.index(p) for p in keep]
        panel_vals = {k: v[:, idx] for k, v in vals.items()}
    else:
        panel_vals = vals
    panel = pd.concat(
        [
            long_panel(units.ids, f"{cp.prefix}_{labels[s.name]}", keep, panel_vals[s.name])
            for s in cp.stats
        ],
        ignore_index=True,
    )
    columns = {}
    valid = np.ones(n)
    if t["kind"] == "trend":
        from covextract.derive.time import trend

        for s in cp.stats:
            long = _long(vals[s.name], periods)
            out = trend(long, min_years=t["spec"].min_years).set_index("unit").reindex(range(n))
            base = f"{cp.prefix}_{s.name}_trend"
            columns[f"{base}_ols"] = out["ols_slope"].to_numpy(dtype=np.float64)
            columns[f"{base}_sen"] = out["sen_slope"].to_numpy(dtype=np.float64)
            columns[f"{base}_p"] = out["mk_p"].to_numpy(dtype=np.float64)
            for i, codes in enumerate(out["qa"]):
                if isinstance(codes, tuple | list):
                    qa[i] = list(dict.fromkeys(qa[i] + list(codes)))
        valid = np.isfinite(columns[cp.columns[0]]).astype(float)
    if t["kind"] == "before":
        before = t["spec"]
        dates = parse_record_dates(
            plan.table.frame, t["date_column"], plan.recipe.study.date_format
        )
        for s, col in zip(cp.stats, cp.columns, strict=False):
            long = _long(vals[s.name], periods)
            out = window_values(
                long,
                dates.to_numpy(),
                months=before.months,
                lag_months=before.lag_months,
                days=before.days,
                lag_days=before.lag_days,
                combine=before.combine,
                threshold=before.threshold,
            )
            columns[col] = out["value"].to_numpy(dtype=np.float64)
            if t["tag"] and t["tag"].startswith("spi"):
                from covextract.derive.spi import spi_category

                columns[f"{col}_category"] = spi_category(columns[col])
            for i, codes in enumerate(out["qa"]):
                qa[i] = list(dict.fromkeys(qa[i] + list(codes)))
        valid = np.isfinite(columns[cp.columns[0]]).astype(float)
    res = ZonalResult(values={}, qa=qa, valid_share=valid)
    return res, columns, panel


def _run_change(cp, units, geoms, cache, advance, threads, client):
    """Per-pixel change between two periods, summarised per unit."""
    from covextract.engine.zonal import zonal_units
    from covextract.sources.derived import ChangeSource, CollapsedSource

    t = cp.timed
    series, how = t["series"], t["spec"].collapse
    later = CollapsedSource([series.source(p) for p in t["periods"]], how)
    earlier = CollapsedSource([series.source(p) for p in t["earlier"]], how)
    kw = _engine_options(cp, units, cache, threads, client)
    # one pass for the requested statistics and the mean change the relative change needs
    stats = list(cp.stats)
    if not any(s.name == "mean" for s in stats):
        stats.append(parse_stat("mean"))
    res = zonal_units(ChangeSource(later, earlier), geoms, stats, progress=advance, **kw)
    base = zonal_units(
        ChangeSource(later, earlier, part="earlier"), geoms, [parse_stat("mean")], **kw
    )
    columns = {}
    for s, col in zip(cp.stats, cp.columns, strict=False):
        columns[col] = res.values[s.name]
    with np.errstate(invalid="ignore", divide="ignore"):
        rel = res.values["mean"] / base.values["mean"]
    columns[cp.columns[-1]] = np.where(np.isfinite(rel), rel, np.nan)
    res.weights_builds += base.weights_builds
    panel = pd.DataFrame(columns=["unit_id", "column", "period_start", "period_end", "value"])
    return res, columns, panel.iloc[0:0]


def _long(values: np.ndarray, periods) -> pd.DataFrame:
    """A (units x periods) array as the long panel the time functions take."""
    n, m = values.shape
    return pd.DataFrame(
        {
            "unit": np.repeat(np.arange(n), m),
            "start": np.tile(np.array([p.start for p in periods], dtype="datetime64[D]"), n),
            "end": np.tile(np.array([p.end for p in periods], dtype="datetime64[D]"), n),
            "value": values.reshape(-1),
        }
    )


def _apply_anomaly(spec, periods, values: np.ndarray):
    """Anomalies (or SPI) of each unit's series; returns the array and per-unit QA codes."""
    from covextract.derive.spi import spi
    from covextract.derive.time import anomalies

    n, m = values.shape
    y0, y1 = (int(x) for x in spec.baseline.split(".."))
    long = _long(values, periods)
    if spec.kind == "spi":
        out = spi(long, months=spec.months, baseline=(y0, y1), min_years=spec.min_years or 10)
        col = "value"
    else:
        out = anomalies(long, baseline=(y0, y1), min_years=spec.min_years or 5)
        col = {"difference": "anomaly", "percent": "percent_of_normal", "zscore": "zscore"}[
            spec.kind
        ]
    out = out.sort_values(["unit", "start"], kind="stable")
    result = out[col].to_numpy(dtype=np.float64).reshape(n, m)
    codes = [[] for _ in range(n)]
    for u, q in zip(out["unit"], out["qa"], strict=True):
        for c in q or ():
            if c not in codes[u]:
                codes[u].append(c)
    return result, codes


def _timed_config(recipe, cov, table, series, problem, i):
    """Periods or the window of a covariate on a series layer."""
    from covextract.errors import LagZeroWarning, RecipeError

    key = f"covariates[{i}]"
    if series is None:
        return None
    if recipe.layers[cov.layer].kind != "continuous":
        problem("series of categorical layers are not supported yet", f"{key}.layer")
        return None
    anomaly = getattr(cov, "anomaly", None)
    tag = None
    if anomaly is not None:
        tag = {"difference": "anom", "percent": "pct", "zscore": "z"}.get(
            anomaly.kind, f"spi{anomaly.months}"
        )
    if getattr(cov, "change", None) is not None:
        try:
            earlier = series.select(cov.change.from_)
            later = series.select(cov.change.to)
        except RecipeError as exc:
            problem(exc, f"{key}.change")
            return None
        tag = f"{cov.change.from_}_{cov.change.to}".replace("-", "_")
        return {
            "kind": "change",
            "periods": later,
            "earlier": earlier,
            "series": series,
            "spec": cov.change,
            "anomaly": None,
            "tag": tag,
        }
    if getattr(cov, "trend", None) is not None:
        try:
            periods = series.select(cov.trend.periods)
        except RecipeError as exc:
            problem(exc, f"{key}.trend.periods")
            return None
        return {
            "kind": "trend",
            "periods": periods,
            "series": series,
            "spec": cov.trend,
            "anomaly": None,
            "tag": None,
        }
    if cov.periods is not None:
        if recipe.output.panel is None:
            problem(
                "periods: writes a long panel: add output: {panel: <folder>} to the recipe",
                f"{key}.periods",
            )
            return None
        try:
            periods = series.select(cov.periods)
        except RecipeError as exc:
            problem(exc, f"{key}.periods")
            return None
        return {
            "kind": "periods",
            "periods": periods,
            "series": series,
            "anomaly": anomaly,
            "tag": tag,
            "all_periods": list(series.periods),
        }
    before = cov.before
    column = before.date or recipe.study.date
    if column is None:
        problem("before: needs the record's date: set study.date or before.date", f"{key}.before")
        return None
    if table is not None and column not in table.frame.columns:
        problem(
            _missing_column(column, table.frame.columns, f"{key}.before.date"),
            f"{key}.before.date",
        )
        return None
    lag = before.lag_months if before.months is not None else before.lag_days
    if lag == 0:
        warnings.warn(
            f"covariate {i + 1} ({cov.layer}): a window with lag 0 ends with the record's own "
            "month or day and so includes days after the visit (exposure after the outcome); "
            "the codebook says so and such records get the QA code after_visit",
            LagZeroWarning,
            stacklevel=_user_stacklevel(),
        )
    from covextract.timed import before_suffix

    return {
        "kind": "before",
        "spec": before,
        "date_column": column,
        "series": series,
        "periods": list(series.periods),
        "suffix": before_suffix(before),
        "anomaly": anomaly,
        "tag": tag,
    }


def _report_unknown_codes(name, layer, src) -> None:
    """Warn (at check time) about codes of a categorical raster missing from its class table."""
    from covextract.io.rasters import sample_values

    try:
        seen = sample_values(src)
    except Exception:  # noqa: BLE001 - a failed sample must not hide the real problems
        return
    known = {float(c) for c in (layer.classes or {})}
    unknown = [float(v) for v in seen if float(v) not in known]
    if unknown:
        warnings.warn(
            f"layer {name!r} holds codes not in its class table ("
            + ", ".join(_code_text(c) for c in unknown[:10])
            + f"{', ...' if len(unknown) > 10 else ''}); they will be counted as 'other'. "
            "Add them to classes: to name them.",
            UnknownClassWarning,
            stacklevel=_user_stacklevel(),
        )


def _categorical_config(cov, layer, sources, problem, i):
    """Class table, groups, pairs and earlier layer of a categorical covariate."""
    from covextract.engine.categorical import ClassTable, PairedSource
    from covextract.errors import RasterError
    from covextract.stats.categorical import categorical_columns

    table = ClassTable.from_mapping(layer.classes or {})
    groups = {g: list(codes) for g, codes in (layer.groups or {}).items()}
    pairs = [tuple(p) for p in (cov.pairs or [])]
    earlier = None
    if getattr(cov, "since", None):
        later_src, earlier = sources.get(cov.layer), sources.get(cov.since)
        if later_src is not None and earlier is not None:
            try:
                PairedSource(later_src, earlier)
            except RasterError as exc:
                problem(exc, f"covariates[{i}].since")
                return None
    return {
        "table": table,
        "groups": groups,
        "pairs": pairs,
        "since": getattr(cov, "since", None),
        "earlier": earlier,
        "columns": categorical_columns(cov.stats, table, groups, pairs),
    }


def _weighting_text(value) -> str:
    if value in (False, "off"):
        return "off"
    return "auto"


def _file(recipe):
    return str(recipe.source_file) if getattr(recipe, "source_file", None) else None


def _line(recipe, key):
    if key is None or not hasattr(recipe, "line_of"):
        return None
    try:
        return recipe.line_of(key)
    except Exception:  # noqa: BLE001 - a missing line number is not an error
        return None


def _missing_column(name, columns, key):
    hint = difflib.get_close_matches(name, [str(c) for c in columns], n=1)
    more = f" Did you mean {hint[0]!r}?" if hint else ""
    from covextract.errors import TableError

    return TableError(
        f"{key}: column {name!r} is not in the study table (columns: "
        f"{', '.join(map(str, columns))}).{more}"
    )


def _count_outside(units, grid) -> int:
    """Units with a geometry whose bounding box misses the grid."""
    from covextract.engine.zonal import _geometry_flags

    has, meets = _geometry_flags(units.to_crs(grid.crs), grid, len(units))
    return int((has & ~meets).sum())


# ----------------------------------------------------------------------- check
def series_report(plan) -> list[str]:
    """One line per series layer: periods found, gaps, and grids."""
    lines = []
    for name, s in plan.series.items():
        if not s.periods:
            continue
        grids = s.grids()
        gaps = ", ".join(p.label for p in s.gaps[:12]) + (" ..." if len(s.gaps) > 12 else "")
        line = (
            f"layer {name}: {len(s.periods)} periods of {s.step.text}, "
            f"{s.periods[0].label} to {s.periods[-1].label}; "
            + (f"{len(s.gaps)} gap(s): {gaps}" if s.gaps else "no gaps")
        )
        if len(grids) > 1:
            parts = [f"{len(ps)} on grid {fp[:8]} (from {ps[0].label})" for fp, ps in grids.items()]
            line += f"; {len(grids)} grids, each with its own weights: " + ", ".join(parts)
        lines.append(line)
    return lines


def check_recipe(recipe, *, report: list | None = None) -> list:
    """Validate a recipe and every input without computing; return all problems.

    An empty list means the recipe can run. Problems are
    :class:`~covextract.errors.RecipeProblem` objects (``str()`` gives the text).
    When ``report`` is a list, lines describing the series found (periods,
    gaps, grids) are appended to it.
    """
    try:
        plan = plan_recipe(recipe, collect=True)
    except RecipeError as exc:
        return list(exc.problems)
    for name, src in plan.sources.items():
        layer = plan.recipe.layers[name]
        if getattr(layer, "kind", "continuous") == "categorical":
            _report_unknown_codes(name, layer, src)
    if report is not None:
        report.extend(series_report(plan))
    return plan.problems


# ------------------------------------------------------------------------- run
def run(
    recipe,
    *,
    write: bool = True,
    progress: bool | object = False,
    threads: int | None = None,
    scheduler: str | None = None,
) -> RunResult:
    """Compute every covariate of a recipe; write the outputs unless ``write=False``.

    Parameters
    ----------
    recipe : path, dict or Recipe
        The recipe (a YAML path, a dict, or a loaded recipe).
    write : bool
        Write the table, codebook and manifest (atomically, manifest last).
    progress : bool or callable
        ``True`` shows a progress bar on the terminal; a callable receives
        ``(description, total_blocks)`` and returns an ``advance(n)`` function.
    threads : int, optional
        Local threads for block tasks (overrides ``execution.threads``).
    scheduler : str, optional
        Address of a running dask.distributed scheduler (``tcp://HOST:PORT``;
        overrides ``execution.scheduler``). Workers must see the same paths.

    Returns
    -------
    RunResult
        ``result.table`` is the study table with the new columns appended.
    """
    from covextract.engine.cache import WeightCache

    started = datetime.now(timezone.utc)
    plan = plan_recipe(recipe)
    recipe = plan.recipe
    cache = WeightCache(plan.output_paths["state"] if write else None)
    lock = contextlib.nullcontext()
    if write:
        from covextract.ops.lock import StateLock

        # the outputs and the state folder are shared with `refresh`: one writer at a time
        lock = StateLock(plan.output_paths["state"])
    with execution_settings(recipe, threads, scheduler) as (threads, client), lock:
        return _run_plan(
            plan,
            recipe,
            cache,
            started,
            write=write,
            progress=progress,
            threads=threads,
            client=client,
        )


@contextlib.contextmanager
def execution_settings(recipe, threads=None, scheduler=None):
    """``(threads, client)`` of a run: arguments first, then the recipe's ``execution``.

    ``client`` is a connected dask.distributed client when a scheduler is set
    (closed on exit), else None.
    """
    execution = getattr(recipe, "execution", None)
    threads = threads if threads is not None else getattr(execution, "threads", None)
    scheduler = scheduler if scheduler is not None else getattr(execution, "scheduler", None)
    client = None
    if scheduler:
        from covextract.engine.cluster import connect

        client = connect(scheduler)
    try:
        yield threads, client
    finally:
        if client is not None:
            client.close()


@dataclass
class CovariateOutcome:
    """What one covariate produced, before its QA column and codebook rows are made.

    ``columns`` maps new column names to per-unit arrays (unit order of the
    plan); ``zonal_qa`` holds the engine's QA codes per unit; ``panel`` the
    long-panel rows of a series covariate (None for the others). ``fit`` and
    ``dark_zones`` carry what a proxy covariate learnt (its codebook and summary
    need them).
    """

    columns: dict
    zonal_qa: list
    valid_share: np.ndarray
    panel: pd.DataFrame | None = None
    weights_builds: int = 0
    workers: set = field(default_factory=set)
    unknown_codes: list = field(default_factory=list)
    fit: dict | None = None
    dark_zones: list | None = None


def covariate_source(plan, cp):
    """The source a covariate reduces: its layer, weighted by ``weight_by`` when set."""
    src = plan.sources[cp.layer_name]
    weight_by = getattr(cp.spec, "weight_by", None)
    if weight_by:
        from covextract.sources.weighted import WeightedSource

        src = WeightedSource(src, plan.sources[weight_by])
    return src


def _advance_for(reporter, cp, src, geoms):
    from covextract.engine.zonal import estimate_entries

    est = int(estimate_entries(geoms, src.grid).sum())
    n_blocks = len(src.grid.block_windows())
    return reporter(f"{cp.prefix} ({cp.layer_name})", n_blocks if est else 0)


def compute_covariate(
    plan, cp, cache, *, reporter, threads=None, client=None, period_values=None
) -> CovariateOutcome:
    """Compute one covariate of a plan.

    Parameters
    ----------
    plan : Plan
    cp : CovariatePlan
    cache : WeightCache
    reporter : callable
        ``reporter(description, total_blocks) -> advance`` (or None).
    period_values : callable, optional
        For a series covariate (not ``change:``): ``period_values(periods,
        compute) -> (values, qa_per_period, builds)`` supplies the per-period
        statistics, calling ``compute(periods)`` for those it does not hold
        (the refresh keeps earlier periods on disk). Default: compute all.
    """
    from covextract.engine.zonal import zonal_units

    units = plan.unit_sets[cp.unit_key]
    src = covariate_source(plan, cp)
    geoms = units.to_crs(src.grid.crs)
    advance = _advance_for(reporter, cp, src, geoms)
    if cp.timed is not None:
        if cp.timed["kind"] == "change":
            res, values, panel = _run_change(cp, units, geoms, cache, advance, threads, client)
        else:

            def compute(periods):
                return _timed_period_stats(
                    cp, units, geoms, periods, cache, advance, threads, client
                )

            periods = timed_periods(cp)
            if period_values is None:
                vals, qa_pp, builds = compute(periods)
            else:
                vals, qa_pp, builds = period_values(periods, compute)
            res, values, panel = _timed_assemble(cp, plan, units, periods, vals, qa_pp)
            res.weights_builds = builds
        outcome = CovariateOutcome(values, res.qa, res.valid_share, panel=panel)
    elif cp.proxy is not None:
        res, values = _run_proxy(cp, src, geoms, cache, units, advance, threads, client)
        outcome = CovariateOutcome(
            values,
            res.qa,
            res.valid_share,
            fit=cp.proxy.get("fit"),
            dark_zones=cp.proxy.get("dark_zones"),
        )
    else:
        weight_by = getattr(cp.spec, "weight_by", None)
        res = zonal_units(
            src,
            geoms,
            list(cp.spec.stats) if cp.categorical is not None else cp.stats,
            progress=advance,
            categorical=_engine_categorical(cp),
            **_engine_options(
                cp,
                units,
                cache,
                threads,
                client,
                area_weighting="on" if weight_by else cp.area_weighting,
            ),
        )
        values = {
            col: res.values[s[0] if cp.categorical is not None else s.name]
            for s, col in zip(cp.stats, cp.columns, strict=True)
        }
        outcome = CovariateOutcome(values, res.qa, res.valid_share)
    outcome.weights_builds = res.weights_builds
    outcome.workers = set(res.workers)
    outcome.unknown_codes = list(res.unknown_codes or [])
    if advance is not None:
        advance(0, done=True)
    return outcome


class _Assembly:
    """Collects covariate outcomes in plan order and turns them into the outputs."""

    def __init__(self, plan) -> None:
        self.plan = plan
        self.columns: dict = {}
        self.codebook: list[dict] = []
        self.qa_counts: dict = {}
        self.n_missing: dict = {}
        self.weights_built = 0
        self.workers: set = set()
        self.fits: dict = {}
        self.panels: list = []

    def add(self, cp, outcome: CovariateOutcome) -> None:
        from covextract.engine.zonal import QA_CODES

        plan = self.plan
        units = plan.unit_sets[cp.unit_key]
        if cp.proxy is not None:
            # the codebook reads what the proxy learnt (also when it was loaded, not computed)
            if outcome.fit is not None:
                cp.proxy["fit"] = outcome.fit
            if outcome.dark_zones is not None:
                cp.proxy["dark_zones"] = outcome.dark_zones
            self.fits[cp.prefix] = outcome.fit or {}
        self.columns.update(outcome.columns)
        if outcome.panel is not None:
            self.panels.append(outcome.panel)
        self.weights_built += outcome.weights_builds
        self.workers |= outcome.workers
        if outcome.unknown_codes:
            warnings.warn(
                f"layer {cp.layer_name!r} holds codes not in its class table "
                f"({', '.join(_code_text(c) for c in outcome.unknown_codes[:10])}); they are "
                f"counted as 'other' in {cp.prefix}_share_other. Add them to classes: to name "
                "them.",
                UnknownClassWarning,
                stacklevel=_user_stacklevel(),
            )
        qa = []
        for unit_codes, zonal_codes in zip(units.qa, outcome.zonal_qa, strict=True):
            codes = list(dict.fromkeys(list(unit_codes) + list(zonal_codes)))
            qa.append(";".join(codes))
        if cp.columns:
            self.columns[cp.qa_column] = qa
        outside = sum("outside_layer" in q for q in outcome.zonal_qa)
        if outside:
            warnings.warn(
                f"{outside} of {len(units)} units lie wholly outside layer "
                f"{cp.layer_name!r}; their {cp.prefix} values are missing (QA code outside_layer)",
                UnitOutsideLayerWarning,
                stacklevel=_user_stacklevel(),
            )
        self.n_missing[cp.prefix] = int(np.sum(np.asarray(outcome.valid_share) == 0))
        for q in qa:
            for code in filter(None, q.split(";")):
                self.qa_counts[code] = self.qa_counts.get(code, 0) + 1
        self.codebook.extend(
            _codebook_rows(plan.recipe, cp, units, plan.sources[cp.layer_name], QA_CODES)
        )

    def finish(self, *, write, started, cache, manifest_extra=None, hashes=None) -> RunResult:
        from covextract.outputs.table import augment_table

        plan, recipe = self.plan, self.plan.recipe
        table = plan.table
        # Numbers stay numbers in the returned table and in Parquet/GeoPackage outputs;
        # write_table turns them into round-trip text only for a CSV file.
        augmented = augment_table(table.frame, self.columns, as_text=False)
        drop = [c for c in recipe.output.drop if c in augmented.columns]
        written = augmented.drop(columns=drop)
        outputs = {}
        panel = pd.concat(self.panels, ignore_index=True) if self.panels else None
        if write:
            outputs = _write_outputs(
                plan,
                written,
                self.codebook,
                started,
                panel=panel,
                manifest_extra=manifest_extra,
                hashes=hashes,
            )
        summary = {
            "units": len(table.frame),
            "layers": sorted({cp.layer_name for cp in plan.covariates}),
            "columns": list(self.columns),
            "units_without_values": self.n_missing,
            "qa_counts": self.qa_counts,
            "weights_built": self.weights_built,
            "weights_from_cache": cache.hits,
            "workers": sorted(self.workers),
            "proxy_fits": {k: v for k, v in self.fits.items() if v},
        }
        result = RunResult(written, list(self.columns), self.codebook, outputs, summary)
        result.panel = panel
        return result


def _run_plan(plan, recipe, cache, started, *, write, progress, threads, client) -> RunResult:
    reporter = _progress_factory(progress)
    assembly = _Assembly(plan)
    for cp in plan.covariates:
        outcome = compute_covariate(
            plan, cp, cache, reporter=reporter, threads=threads, client=client
        )
        assembly.add(cp, outcome)
    return assembly.finish(write=write, started=started, cache=cache)


def _progress_factory(progress):
    if callable(progress):
        return progress
    if not progress:
        return lambda desc, total: None
    from covextract.cli.progress import rich_progress

    return rich_progress()


def _codebook_rows(recipe, cp: CovariatePlan, units, src, qa_codes) -> list[dict]:
    from covextract.outputs.codebook import RULE_TEXT, STAT_DEFINITIONS

    layer = recipe.layers[cp.layer_name]
    nodata_text = _nodata_text(src, layer)
    if cp.spec is not None and getattr(cp.spec, "weight_by", None):
        nodata_text += (
            f"; weighted by layer {cp.spec.weight_by!r} (weight = coverage x pixel area x its "
            "value); pixels where it is missing or negative are excluded and lower valid_share"
        )
    base = {
        "layer": cp.layer_name,
        "pixel_rule": RULE_TEXT.get(cp.rule, cp.rule),
        "area_weighting": (
            "on (grid pixel area varies)"
            if cp.area_weighting == "auto" and src.grid.area_varies
            else ("off" if cp.area_weighting == "off" else "auto: not needed, pixel area constant")
        ),
        "unit_shape": units.description,
        "nodata_handling": nodata_text,
        "source_file": _shareable_path(src.path, recipe),
        "source": getattr(layer, "source", None) or "",
        "version": getattr(layer, "version", None) or "",
        "citation": getattr(layer, "citation", None) or "",
        "license": getattr(layer, "license", None) or "",
    }
    unit = getattr(layer, "unit", None) or ""
    rows = []
    if cp.timed is not None:
        base = {**base, "nodata_handling": base["nodata_handling"] + "; " + _timed_text(cp)}
    if cp.categorical is not None:
        rows = _categorical_codebook_rows(cp, base, layer)
    elif cp.proxy is not None:
        rows = _proxy_codebook_rows(cp, base, layer)
    plain = cp.categorical is None and cp.proxy is None
    described = cp.columns
    if cp.timed is not None and cp.timed["kind"] == "periods":
        # no table columns: describe the long panel's column names instead
        described = [f"{cp.prefix}_{s.name}" for s in cp.stats]
    pairs = list(zip(cp.stats if plain else [], described, strict=False))
    if plain and cp.timed is not None and len(described) > len(cp.stats):
        # trend (3 columns per statistic) and SPI (a value and a category column)
        pairs = [
            (
                next(
                    (s for s in cp.stats if col.startswith(f"{cp.prefix}_{s.name}_")),
                    StatName("relchange", "relchange"),
                ),
                col,
            )
            for col in described
        ]
    for s, col in pairs:
        text = STAT_DEFINITIONS.get(s.kind, s.kind).format(
            q=_q_text(s.q), threshold=cp.threshold, method=cp.rule
        )
        if s.kind in ("count",):
            u = "pixels"
        elif s.kind in ("valid_share", "share_above"):
            u = "share 0-1"
        elif s.kind in ("area_km2", "area_above"):
            u = "km2"
        elif s.kind == "density_total":
            u = f"{unit} x km2" if unit else "value x km2"
        elif s.kind == "sum":
            u = f"{unit} (summed over pixels)" if unit else ""
        else:
            u = unit
        rows.append(
            {
                **base,
                "column": col,
                "statistic": s.name,
                "definition": text,
                "unit_of_measure": u,
                "qa_codes": "",
            }
        )
    codes = {**_unit_qa_codes(), **qa_codes}
    if cp.timed is not None:
        from covextract.derive import time as _time
        from covextract.timed import WINDOW_QA_CODES

        codes.update(WINDOW_QA_CODES)
        if cp.timed["kind"] == "trend" or cp.timed.get("anomaly") is not None:
            codes.update({k: v for k, v in _time.QA_CODES.items() if k not in codes})
    if cp.proxy is not None:
        from covextract.derive import population

        codes.update(
            population.REALLOCATION_QA_CODES
            if cp.proxy["kind"] == "reallocate"
            else population.CALIBRATION_QA_CODES
        )
    if not cp.columns:
        return rows
    rows.append(
        {
            **base,
            "column": cp.qa_column,
            "statistic": "qa",
            "definition": "reason codes separated by ';', empty when all is well",
            "unit_of_measure": "text",
            "qa_codes": "; ".join(f"{k}: {v}" for k, v in codes.items()),
        }
    )
    return rows


def _source_text(src) -> str:
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


def _nodata_text(src, layer) -> str:
    """How missing values are handled, for the codebook."""
    if not layer.bands:
        return _source_text(src)
    inner = getattr(src, "source", src)
    parts = [f"band {name}: {_source_text(b)}" for name, b in inner.bands.items()]
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


def _proxy_config(recipe, cov, table, problem, i):
    """Zones and totals (reallocate) or known counts (calibrate) of a proxy covariate."""
    from covextract.errors import TableError
    from covextract.io.tables import read_boundaries, read_study_table

    if cov.reallocate is not None:
        spec = cov.reallocate
        key = f"covariates[{i}].reallocate"
        try:
            zones = read_boundaries(
                recipe.resolve(spec.zones.file), id_column=spec.zones.id, layer=spec.zones.layer
            )
            totals_table = read_study_table(recipe.resolve(spec.totals.file))
        except CovextractError as exc:
            problem(exc, key)
            return None
        frame = totals_table.frame
        for col in (spec.totals.id, spec.totals.column):
            if col not in frame.columns:
                problem(_missing_column(col, frame.columns, f"{key}.totals"), f"{key}.totals")
                return None
        ids = frame[spec.totals.id].astype(str).str.strip()
        if ids.duplicated().any():
            problem(
                TableError(
                    f"{key}.totals: zone ids listed twice in {spec.totals.file}: "
                    + ", ".join(sorted(set(ids[ids.duplicated()]))[:5])
                ),
                key,
            )
            return None
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
            return None
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
            return None
        return {
            "kind": "reallocate",
            "spec": spec,
            "zones": zones,
            "zone_ids": zone_ids,
            "totals": totals,
            "stats": ["allocated"],
            "columns": ["allocated"],
        }
    spec = cov.calibrate
    key = f"covariates[{i}].calibrate.known"
    if table is None:
        return None
    if spec.known not in table.frame.columns:
        problem(_missing_column(spec.known, table.frame.columns, key), key)
        return None
    raw = table.frame[spec.known]
    text = raw.astype(str).str.strip()
    known = pd.to_numeric(text.where(text != "", None), errors="coerce")
    bad = text[(text != "") & known.isna() & raw.notna()]
    if len(bad):
        problem(
            TableError(
                f"{key}: column {spec.known!r} has cells that are not numbers "
                f"(rows {', '.join(str(r + 1) for r in bad.index[:5])}: "
                f"{', '.join(repr(v) for v in bad.iloc[:5])}); leave unknown counts "
                "empty"
            ),
            key,
        )
        return None
    return {
        "kind": "calibrate",
        "spec": spec,
        "known": known.to_numpy(dtype=np.float64),
        "stats": ["predicted"],
        "columns": ["predicted", "lower", "upper"],
    }


def _run_proxy(cp, src, geoms, cache, units, advance, threads, client):
    """Compute a population-proxy covariate; returns (result-like, columns)."""
    from covextract.derive.population import calibrate, reallocate
    from covextract.engine.zonal import ZonalResult, zonal_units

    if cp.proxy["kind"] == "reallocate":
        spec = cp.proxy["spec"]
        zones = cp.proxy["zones"].to_crs(src.grid.crs)
        out = reallocate(
            src,
            np.array(list(zones.geometry), dtype=object),
            cp.proxy["totals"],
            geoms,
            by=spec.by,
            threshold=spec.threshold,
            rule=cp.rule,
            zone_ids=cp.proxy["zone_ids"],
            threads=threads,
            client=client,
            progress=advance,
        )
        cp.proxy["dark_zones"] = [cp.proxy["zone_ids"][j] for j in out.dark_zones]
        res = ZonalResult(
            values={},
            qa=out.qa,
            valid_share=np.asarray(out.valid_share),
            blocks_read=out.blocks_read,
            weights_built=True,
        )
        # the unit-by-zone pieces are rebuilt on every run (not cached yet)
        res.weights_builds = 0
        return res, {f"{cp.prefix}_allocated": np.asarray(out.values, dtype=np.float64)}
    spec = cp.proxy["spec"]
    light = zonal_units(
        src,
        geoms,
        [parse_stat(spec.light)],
        progress=advance,
        **_engine_options(cp, units, cache, threads, client, threshold=None),
    )
    x = light.values[spec.light]
    fit = calibrate(x, cp.proxy["known"])
    est, lo, hi, pqa = fit.predict(x)
    cp.proxy["fit"] = fit.summary()
    light.qa = [list(a) + list(b) for a, b in zip(light.qa, pqa, strict=True)]
    return light, {
        f"{cp.prefix}_predicted": est,
        f"{cp.prefix}_lower": lo,
        f"{cp.prefix}_upper": hi,
    }


def _proxy_codebook_rows(cp, base, layer) -> list[dict]:
    rows = []
    unit = "people (proxy, not a count)"
    if cp.proxy["kind"] == "reallocate":
        spec = cp.proxy["spec"]
        how = (
            "light x pixel area"
            if spec.by == "light"
            else f"lit area (pixels with light > {spec.threshold!r})"
        )
        dark = cp.proxy.get("dark_zones") or []
        text = (
            f"zone totals from {spec.totals.file} (column {spec.totals.column!r}) spread over "
            f"each zone of {spec.zones.file} in proportion to {how}, then summed over the "
            "unit (dasymetric reallocation; each zone's allocated pixels sum to its total, "
            "Tobler 1979). Zones without light spread their total evenly over their area"
            + (f" (here: {', '.join(dark)})" if dark else "")
            + ". A proxy: lights miss unlit settlements and saturate in towns"
        )
        rows.append(
            {
                **base,
                "column": cp.columns[0],
                "statistic": "allocated",
                "definition": text,
                "unit_of_measure": unit,
                "qa_codes": "",
            }
        )
        return rows
    spec = cp.proxy["spec"]
    fit = cp.proxy.get("fit", {})
    fit_text = ", ".join(
        f"{k} = {v:.6g}" if isinstance(v, float) else f"{k} = {v}" for k, v in fit.items()
    )
    common = (
        f"fit of log(known count in column {spec.known!r}) = a + b log(light {spec.light}) on "
        "units with a known count > 0 and light > 0 (unlit units are left out and get no "
        f"prediction); {fit_text}"
    )
    texts = {
        "predicted": "exp(a + b log light) x Duan (1983) smearing factor: " + common,
        "lower": "lower end of the 95 % prediction interval, exp of the log-scale OLS interval: "
        + common,
        "upper": "upper end of the 95 % prediction interval, exp of the log-scale OLS interval: "
        + common,
    }
    for col, suffix in zip(cp.columns, ("predicted", "lower", "upper"), strict=True):
        rows.append(
            {
                **base,
                "column": col,
                "statistic": suffix,
                "definition": texts[suffix],
                "unit_of_measure": unit,
                "qa_codes": "",
            }
        )
    return rows


def _engine_categorical(cp):
    if cp.categorical is None:
        return None
    c = cp.categorical
    return {
        "table": c["table"],
        "groups": c["groups"],
        "pairs": c["pairs"],
        "earlier": c["earlier"],
    }


def _code_text(code: float) -> str:
    return str(int(code)) if float(code).is_integer() else repr(code)


def _categorical_codebook_rows(cp, base, layer) -> list[dict]:
    from covextract.outputs.codebook import CATEGORICAL_DEFINITIONS

    c = cp.categorical
    legend = "; ".join(
        f"{_code_text(code)} = {lbl}"
        for code, lbl in zip(c["table"].codes, c["table"].labels, strict=True)
    )
    groups = "; ".join(f"{g} = {', '.join(map(str, codes))}" for g, codes in c["groups"].items())
    rows = []
    for (suffix, stat), col in zip(c["columns"], cp.columns, strict=True):
        target = suffix.split("_", 1)[1] if "_" in suffix and stat in ("share",) else ""
        if stat == "net_change":
            target = suffix[len("net_change_") :]
        text = CATEGORICAL_DEFINITIONS[stat].format(
            label=target,
            since=c.get("since") or "",
            pair=suffix[len("transition_") :].replace("_to_", " -> "),
        )
        text += f". Class table: {legend}" + (f"; groups: {groups}" if groups else "")
        unit = {
            "dominant": "class label",
            "classes_present": "classes",
            "shannon": "nats (natural log)",
        }.get(stat, "share 0-1")
        if stat == "net_change":
            unit = "share difference, -1 to 1"
        rows.append(
            {
                **base,
                "column": col,
                "statistic": stat,
                "definition": text,
                "unit_of_measure": unit,
                "qa_codes": "",
            }
        )
    return rows


def _shareable_path(path, recipe) -> str:
    """``path`` relative to the recipe's folder when inside it (no local folder names)."""
    import os

    try:
        rel = os.path.relpath(Path(path).resolve(), Path(recipe.base_dir).resolve())
    except ValueError:
        return str(path)
    return str(path) if rel.startswith("..") else rel


def _q_text(q):
    if q is None:
        return ""
    return str(int(q)) if float(q).is_integer() else str(q)


def input_files(plan: Plan) -> list[dict]:
    """Every input file of a plan as ``{"role", "path"}``, in a fixed order.

    The recipe, the study table, the boundaries, each layer's files (one per
    period for a series) and the zone and totals files of population proxies.
    """
    recipe = plan.recipe
    inputs = [{"role": "recipe", "path": recipe.source_file}] if recipe.source_file else []
    inputs.append({"role": "study_table", "path": plan.table.path})
    if recipe.units is not None and recipe.units.boundaries is not None:
        inputs.append({"role": "boundaries", "path": recipe.resolve(recipe.units.boundaries.file)})
    for opened in plan.layers.values():
        for role, path in opened.input_files():
            inputs.append({"role": role, "path": path})
    for cp in plan.covariates:
        spec = getattr(cp.spec, "reallocate", None)
        if cp.proxy is not None and spec is not None:
            inputs.append({"role": f"zones:{cp.prefix}", "path": recipe.resolve(spec.zones.file)})
            inputs.append({"role": f"totals:{cp.prefix}", "path": recipe.resolve(spec.totals.file)})
    seen, unique = set(), []
    for item in inputs:  # a series cube lists one file for every period
        key = (item["role"], str(item["path"]))
        if key not in seen:
            seen.add(key)
            unique.append(item)
    return unique


def _write_outputs(
    plan: Plan, table: pd.DataFrame, codebook, started, panel=None, manifest_extra=None, hashes=None
) -> dict:
    """Write panel, codebook, table and — last — the manifest, each file atomically.

    ``hashes(path) -> sha256`` may supply input fingerprints (the refresh keeps
    them in its ledger so unchanged inputs are not read again).
    """
    from covextract.crashpoints import crash_point
    from covextract.outputs.codebook import write_codebook
    from covextract.outputs.manifest import write_manifest
    from covextract.outputs.table import table_format, write_table

    paths = plan.output_paths
    recipe = plan.recipe
    geometry = crs = None
    if table_format(paths["table"]) == "gpkg":
        geometry, crs = _gpkg_geometry(plan)
    outputs = []
    result_paths = {k: paths[k] for k in ("table", "codebook", "codebook_md", "manifest")}
    if panel is not None and recipe.output.panel is not None:
        from covextract.timed import write_panel

        folder = recipe.resolve(recipe.output.panel)
        outputs += write_panel(folder, panel)
        result_paths["panel"] = folder
        crash_point("after_panel")
    write_codebook(
        codebook,
        paths["codebook"],
        markdown_path=paths["codebook_md"],
        title=f"Codebook for {paths['table'].name}",
    )
    crash_point("after_codebook")
    write_table(table, paths["table"], geometry=geometry, crs=crs)
    crash_point("after_table")
    outputs = [paths["table"], paths["codebook"], paths["codebook_md"], *outputs]
    layers = {
        name: {
            "crs": src.grid.crs.to_string(),
            "width": src.grid.width,
            "height": src.grid.height,
            "transform": list(src.grid.transform)[:6],
            "area_varies": bool(src.grid.area_varies),
        }
        for name, src in plan.sources.items()
    }
    inputs = input_files(plan)
    if hashes is not None:
        inputs = [{**item, "sha256": hashes(item["path"])} for item in inputs]
    write_manifest(
        paths["manifest"],
        recipe_fingerprint=recipe.fingerprint,
        recipe_file=recipe.source_file,
        inputs=inputs,
        outputs=outputs,
        layers=layers,
        started=started,
        extra=manifest_extra,
    )
    crash_point("after_manifest")
    return result_paths


def _gpkg_problem(recipe, table, path) -> OutputError | None:
    """Why a GeoPackage output cannot be written for this study table, or None.

    Checked while planning, so ``check`` reports it and a run stops before computing.
    """
    from covextract.outputs.table import table_format

    if table_format(path) != "gpkg" or table.geometry is not None:
        return None
    p = recipe.study.points
    if p is None:
        return OutputError(
            f"output.table {path.name} is a GeoPackage, which needs a geometry for each "
            "record, but the study table has neither geometries nor study.points. Write "
            ".csv or .parquet instead."
        )
    dropped = [c for c in (p.x, p.y) if c in set(recipe.output.drop)]
    if dropped:
        return OutputError(
            f"output.table {path.name} is a GeoPackage, which carries each record's location, "
            f"but output.drop removes the coordinate column(s) {', '.join(dropped)}. Write "
            ".csv or .parquet to share a table without locations, or keep the coordinates."
        )
    return None


def _gpkg_geometry(plan: Plan):
    table = plan.table
    if table.geometry is not None:
        return list(table.geometry), table.crs
    recipe = plan.recipe
    p = recipe.study.points
    error = _gpkg_problem(recipe, table, plan.output_paths["table"])
    if error is not None:
        raise error
    import shapely

    x = pd.to_numeric(table.frame[p.x], errors="coerce").to_numpy(float)
    y = pd.to_numeric(table.frame[p.y], errors="coerce").to_numpy(float)
    pts = [
        None if not (np.isfinite(a) and np.isfinite(b)) else shapely.Point(a, b)
        for a, b in zip(x, y, strict=True)
    ]
    return pts, p.crs
