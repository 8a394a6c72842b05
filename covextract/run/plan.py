"""From a recipe to a :class:`Plan`: every input opened and every column named, no pixel read.

:func:`plan_recipe` is shared by ``run``, ``refresh``, ``status`` and
``check``; :func:`check_recipe` collects every problem instead of stopping at
the first.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from pathlib import Path

from covextract.core.messages import missing_column, user_stacklevel
from covextract.covariates import Covariate, PlanContext, kind_for
from covextract.covariates.naming import assign_names, entry_label
from covextract.errors import (
    CovextractError,
    OutputError,
    RecipeError,
    RecipeProblem,
    UnknownClassWarning,
)

__all__ = [
    "Plan",
    "plan_recipe",
    "check_recipe",
    "series_report",
    "load",
    "output_paths",
    "input_files",
    "gpkg_geometry",
]


@dataclass
class Plan:
    """Everything a run needs, checked, before any pixel is read.

    ``covariates`` holds one :class:`~covextract.covariates.Covariate` per
    recipe entry that could be planned (all of them when ``problems`` is
    empty); ``sources`` the opened layers by name (a series layer: its first
    period), ``series`` the series indexes.
    """

    recipe: object
    table: object
    unit_sets: dict
    sources: dict
    covariates: list[Covariate]
    output_paths: dict
    problems: list = field(default_factory=list)
    series: dict = field(default_factory=dict)
    layers: dict = field(default_factory=dict)

    def layer_files(self, name: str) -> list:
        """``(role, path)`` of the files a layer reads (one per period for a series)."""
        return _layer_files(self, name)


def load(recipe):
    """A loaded recipe from a path, a dict or a loaded recipe."""
    from covextract.recipe import load_recipe

    if hasattr(recipe, "covariates") and hasattr(recipe, "resolve"):
        return recipe
    return load_recipe(recipe)


def output_paths(recipe) -> dict:
    """Where a recipe's outputs and state folder go (``table``, ``codebook``, ``manifest``...)."""
    out = recipe.output
    table = recipe.resolve(out.table)
    stem = table.with_suffix("")
    codebook = recipe.resolve(out.codebook) if out.codebook else Path(f"{stem}_codebook.csv")
    manifest = recipe.resolve(out.manifest) if out.manifest else Path(f"{stem}_manifest.json")
    state = recipe.resolve(out.state) if out.state else table.parent / ".covextract-state"
    paths = {
        "table": table,
        "codebook": codebook,
        "codebook_md": codebook.with_suffix(".md"),
        "manifest": manifest,
        "state": state,
    }
    if out.panel is not None:
        paths["panel"] = recipe.resolve(out.panel)
    return paths


def _build_unit_set(recipe, table, key, boundaries_cache):
    from covextract.io.tables import read_boundaries
    from covextract.units import build_units

    p = recipe.study.points
    points = None if p is None else {"x": p.x, "y": p.y, "crs": p.crs}
    kw = {"id_column": recipe.study.id, "points": points}
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


def plan_recipe(
    recipe, *, collect: bool = False, outputs: bool = True, overwrite: bool = False
) -> Plan:
    """Resolve a recipe into a :class:`Plan`, opening every input but reading no pixels.

    Parameters
    ----------
    recipe : path, dict or Recipe
        The recipe.
    collect : bool
        Collect every problem into ``plan.problems`` instead of raising at the
        first one (what ``covextract check`` does).
    outputs : bool
        Check the output paths (:mod:`covextract.outputs.guard`: never an
        input, never a file covextract did not write) and that their folders
        are writable and have room, before anything is computed. ``status``
        and ``run(write=False)`` write nothing and skip it.
    overwrite : bool
        Allow replacing existing files covextract did not write.

    Raises
    ------
    CovextractError
        On the first problem, unless ``collect``.
    """
    from covextract.io.tables import read_study_table

    recipe = load(recipe)
    problems: list = []
    file = str(recipe.source_file) if getattr(recipe, "source_file", None) else None

    def problem(exc_or_msg, key=None):
        if not collect:
            if isinstance(exc_or_msg, BaseException):
                raise exc_or_msg
            raise RecipeError(
                [RecipeProblem(exc_or_msg, key=key, file=file, line=_line(recipe, key))]
            )
        if isinstance(exc_or_msg, RecipeError):
            problems.extend(exc_or_msg.problems)
        else:
            text = str(exc_or_msg)
            if key and text.startswith(f"{key}: "):
                text = text[len(key) + 2 :]  # the problem's prefix names the key already
            problems.append(RecipeProblem(text, key=key, file=file, line=_line(recipe, key)))

    paths = output_paths(recipe)
    table_path = recipe.resolve(recipe.study.table)
    table = None
    try:
        table = read_study_table(table_path, layer=getattr(recipe.study, "layer", None))
    except CovextractError as exc:
        problem(exc, "study.table")
    if table is not None:
        _check_table(recipe, table, table_path, paths, problem)
        # Shared outputs that keep exact locations get a warning, at check and at run.
        from covextract.run.confidential import warn_if_coordinates_kept

        warn_if_coordinates_kept(recipe, table, paths["table"])
        _check_record_dates(recipe, table, problem)

    # units
    from covextract.covariates.base import unit_key

    unit_sets: dict = {}
    keys = list(dict.fromkeys(unit_key(recipe, cov) for cov in recipe.covariates))
    if table is not None:
        boundaries_cache: dict = {}
        for k in keys:
            try:
                # Re-emit the unit builder's warnings at the caller's line, so they point at
                # user code and each filter applies once there.
                with warnings.catch_warnings(record=True) as caught:
                    warnings.simplefilter("always")
                    unit_sets[k] = _build_unit_set(recipe, table, k, boundaries_cache)
                for w in caught:
                    warnings.warn(w.message, w.category, stacklevel=user_stacklevel())
            except CovextractError as exc:
                problem(exc, "units")
                break

    # layers
    layers, sources, series = _open_layers(recipe, problem)

    # covariates: each entry becomes an object of its kind, which names its columns
    ctx = PlanContext(recipe, table, unit_sets, sources, series, problem)
    covariates: list[Covariate] = []
    for i, spec in enumerate(recipe.covariates):
        layer = recipe.layers[spec.layer]
        kind = kind_for(spec, layer)
        if kind is None:
            problem(
                f"{entry_label(i, spec.layer)}: no covariate kind takes this entry; "
                "a series layer needs one of periods:, before:, trend: or change:",
                f"covariates[{i}]",
            )
            continue
        cov = kind(i, spec, recipe)
        if cov.plan(ctx):
            covariates.append(cov)
    existing = set(table.frame.columns) if table is not None else set()
    assign_names(covariates, existing, problem)

    # units overlap each layer's extent
    for cov in covariates:
        us = unit_sets.get(cov.unit_key)
        src = sources.get(cov.layer_name)
        if us is None or src is None:
            continue
        try:
            n_out = _count_outside(us, src.grid)
        except CovextractError as exc:
            problem(exc, cov.where())
            continue
        n_geom = sum(g is not None for g in us.geometry)
        if n_geom and n_out == n_geom:
            problem(
                f"no unit overlaps layer {cov.layer_name!r} (grid bounds {src.grid.bounds} in "
                f"{src.grid.crs.to_string()}); check the layer file and the study's CRS",
                cov.where("layer"),
            )
    plan = Plan(recipe, table, unit_sets, sources, covariates, paths, problems, series, layers)
    if outputs:
        _guard(plan, overwrite, collect, problems, file)
    return plan


def _guard(plan, overwrite, collect, problems, file) -> None:
    """The output guard, then writability and free space (only when the paths are sound)."""
    from covextract.outputs.guard import check_room, guard_outputs

    recipe = plan.recipe
    try:
        inputs = input_files(plan) if plan.table is not None else []
    except CovextractError:  # a partial plan: the recipe's own paths suffice
        inputs = []
    found = guard_outputs(recipe, plan.output_paths, inputs=inputs, overwrite=overwrite)
    if not found:
        rows = len(plan.table.frame) if plan.table is not None else 0
        columns = (len(plan.table.frame.columns) if plan.table is not None else 0) + sum(
            len(c.columns) for c in plan.covariates
        )
        found = check_room(recipe, plan.output_paths, rows=rows, columns=columns)
    for key, message in found:
        if not collect:
            raise OutputError(message)
        problems.append(_NamedProblem(message, key=key, file=file, line=_line(recipe, key)))


class _NamedProblem(RecipeProblem):
    """A problem whose message starts with its key: the prefix gives only file and line."""

    __slots__ = ()

    def __str__(self) -> str:
        if self.file:
            return f"{self.file}{f':{self.line}' if self.line else ''}: {self.message}"
        return self.message


def _check_record_dates(recipe, table, problem) -> None:
    """Read the record dates now, so unreadable dates stop ``check``, not a finished run."""
    from covextract.io.tables import parse_record_dates

    name = recipe.study.date
    if name and name in table.frame.columns:
        try:
            parse_record_dates(table.frame, name, recipe.study.date_format)
        except CovextractError as exc:
            problem(exc, "study.date")


def _check_table(recipe, table, table_path, paths, problem) -> None:
    # output paths against the inputs: covextract.outputs.guard, at the end of planning
    gpkg = gpkg_problem(recipe, table, paths["table"])
    if gpkg is not None:
        problem(gpkg, "output.table")
    name = recipe.study.date
    if name and name not in table.frame.columns:
        problem(missing_column(name, table.frame.columns, "study.date"), "study.date")
    for col in recipe.output.drop:
        if col not in table.frame.columns:
            problem(missing_column(col, table.frame.columns, "output.drop"), "output.drop")


def _open_layers(recipe, problem) -> tuple[dict, dict]:
    """Every layer some covariate uses: ``(layers, sources, series)``.

    ``layers`` holds the opened :class:`~covextract.sources.base.LayerSource`
    of each layer, ``sources`` what the engine reads (a series: its first
    period), ``series`` the series indexes.
    """
    from covextract.sources.registry import open_source

    used = set()
    for c in recipe.covariates:
        used |= {c.layer, getattr(c, "since", None), getattr(c, "weight_by", None)}
    layers, sources, series = {}, {}, {}
    for name, layer in recipe.layers.items():
        if name not in used:
            continue
        try:
            opened = open_source(name, layer, resolve=recipe.resolve, base_dir=recipe.base_dir)
        except CovextractError as exc:
            problem(exc, f"layers.{name}.{'bands' if layer.bands else 'file'}")
            continue
        layers[name] = opened
        if opened.is_series:
            series[name] = opened.source
            sources[name] = opened.source.source(opened.source.periods[0])
        else:
            sources[name] = opened.source
    return layers, sources, series


def _layer_files(plan, name) -> list:
    return plan.layers[name].input_files()


def _line(recipe, key):
    if key is None or not hasattr(recipe, "line_of"):
        return None
    try:
        return recipe.line_of(key)
    except Exception:  # noqa: BLE001 - a missing line number is not an error
        return None


def _count_outside(units, grid) -> int:
    """Units with a geometry whose bounding box misses the grid."""
    from covextract.engine.zonal import geometry_flags

    has, meets = geometry_flags(units.to_crs(grid.crs), grid, len(units))
    return int((has & ~meets).sum())


def gpkg_problem(recipe, table, path) -> OutputError | None:
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


def gpkg_geometry(plan):
    """``(geometries, crs)`` of the study records, for a GeoPackage table."""
    import numpy as np
    import pandas as pd
    import shapely

    table = plan.table
    if table.geometry is not None:
        return list(table.geometry), table.crs
    recipe = plan.recipe
    p = recipe.study.points
    error = gpkg_problem(recipe, table, plan.output_paths["table"])
    if error is not None:
        raise error
    x = pd.to_numeric(table.frame[p.x], errors="coerce").to_numpy(float)
    y = pd.to_numeric(table.frame[p.y], errors="coerce").to_numpy(float)
    pts = [
        None if not (np.isfinite(a) and np.isfinite(b)) else shapely.Point(a, b)
        for a, b in zip(x, y, strict=True)
    ]
    return pts, p.crs


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
    _warn_mixed_outputs(plan)
    return plan.problems


def _warn_mixed_outputs(plan) -> None:
    """Warn when the outputs on disk are not the complete set their manifest describes."""
    from covextract.io.writers import read_journal
    from covextract.outputs.manifest import MixedOutputsWarning, verify_outputs

    paths = plan.output_paths
    if read_journal(paths["state"]) is not None:
        text = (
            "a run was killed while putting the outputs in place; the next run or refresh "
            "completes it"
        )
    else:
        mixed = verify_outputs(
            paths["manifest"], base_dir=plan.recipe.base_dir, panel=paths.get("panel")
        )
        if not mixed:
            return
        text = (
            "the outputs are a mixed set, not the one their manifest describes ("
            + "; ".join(mixed[:3])
            + ("; ..." if len(mixed) > 3 else "")
            + "); the next refresh writes them all again"
        )
    warnings.warn(text, MixedOutputsWarning, stacklevel=user_stacklevel())


def _report_unknown_codes(name, layer, src) -> None:
    """Warn (at check time) about codes of a categorical raster missing from its class table."""
    from covextract.covariates.landcover import code_text
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
            + ", ".join(code_text(c) for c in unknown[:10])
            + f"{', ...' if len(unknown) > 10 else ''}); they will be counted as 'other'. "
            "Add them to classes: to name them.",
            UnknownClassWarning,
            stacklevel=user_stacklevel(),
        )


def input_files(plan: Plan) -> list[dict]:
    """Every input file of a plan as ``{"role", "path"}``, in a fixed order.

    The recipe, the study table, the boundaries, each layer's files (one per
    period for a series) and the extra files of covariates (zones and totals
    of population proxies).
    """
    recipe = plan.recipe
    inputs = [{"role": "recipe", "path": recipe.source_file}] if recipe.source_file else []
    inputs.append({"role": "study_table", "path": plan.table.path})
    if recipe.units is not None and recipe.units.boundaries is not None:
        inputs.append({"role": "boundaries", "path": recipe.resolve(recipe.units.boundaries.file)})
    for name in plan.sources:
        for role, path in _layer_files(plan, name):
            inputs.append({"role": role, "path": path})
    for cov in plan.covariates:
        for role, path in cov.extra_inputs(recipe):
            inputs.append({"role": role, "path": path})
    seen, unique = set(), []
    for item in inputs:  # a series cube lists one file for every period
        key = (item["role"], str(item["path"]))
        if key not in seen:
            seen.add(key)
            unique.append(item)
    return unique
