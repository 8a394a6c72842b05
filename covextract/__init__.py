"""covextract: environmental covariates from rasters, at the resolution of a health study.

Public API
----------
run_recipe(recipe, *, write=True) -> DataFrame
    Run a recipe; the study table with the covariates appended.
check_recipe(recipe) -> list
    Every problem in a recipe and its inputs, without computing.
zonal_statistics(raster, units, stats, ...) -> DataFrame
    Zonal statistics of one raster over a GeoDataFrame, indexed by unit id.
load_recipe(source) -> Recipe
    A validated recipe.
run(recipe, ...) -> RunResult
    The full result: table, codebook rows, output paths, summary.
refresh(recipe, ...) -> RefreshResult
    Compute only new or changed periods and rebuild the outputs.
refresh_status(recipe) -> RefreshStatus
    Periods computed, due or missing; the last refresh.

Names are loaded on first use so that ``covextract --help`` stays fast.
"""

from __future__ import annotations

from covextract.core.version import __version__

__all__ = [
    "__version__",
    "run_recipe",
    "check_recipe",
    "zonal_statistics",
    "load_recipe",
    "run",
    "refresh",
    "refresh_status",
    "show_versions",
]

_LAZY = {
    "run_recipe": ("covextract.api", "run_recipe"),
    "zonal_statistics": ("covextract.api", "zonal_statistics"),
    "check_recipe": ("covextract.run", "check_recipe"),
    "run": ("covextract.run", "run"),
    "refresh": ("covextract.ops.refresh", "refresh"),
    "refresh_status": ("covextract.ops.refresh", "refresh_status"),
    "load_recipe": ("covextract.recipe", "load_recipe"),
}


def show_versions() -> None:
    """Print covextract's and its dependencies' versions (for bug reports)."""
    from covextract.outputs.manifest import package_versions

    for name, value in package_versions().items():
        print(f"{name}: {value}")


def __getattr__(name: str):
    if name in _LAZY:
        import importlib

        module, attr = _LAZY[name]
        value = getattr(importlib.import_module(module), attr)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'covextract' has no attribute {name!r}")


def __dir__():
    return sorted(__all__)
