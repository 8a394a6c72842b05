"""The recipe: schema, validation, and YAML loading with line numbers."""

from covextract.recipe.common import (
    BOUNDARY_SUFFIXES,
    NAME_PATTERN,
    OUTPUT_TABLE_SUFFIXES,
    RECIPE_VERSION,
    STATE_FOLDER_NAME,
    STUDY_TABLE_SUFFIXES,
)
from covextract.recipe.covariates import Covariate
from covextract.recipe.layers import Layer
from covextract.recipe.loader import load_recipe
from covextract.recipe.model import Recipe
from covextract.recipe.output import Execution, Output
from covextract.recipe.study import Boundaries, ColumnBuffer, Points, Study, Units

__all__ = [
    "load_recipe",
    "Recipe",
    "Study",
    "Points",
    "Units",
    "ColumnBuffer",
    "Boundaries",
    "Layer",
    "Covariate",
    "Output",
    "Execution",
    "RECIPE_VERSION",
    "NAME_PATTERN",
    "CATEGORICAL_STATS",
    "STUDY_TABLE_SUFFIXES",
    "BOUNDARY_SUFFIXES",
    "OUTPUT_TABLE_SUFFIXES",
    "STATE_FOLDER_NAME",
]


def __getattr__(name: str):
    # CATEGORICAL_STATS is read from the statistics on first use (they bring numpy).
    if name == "CATEGORICAL_STATS":
        from covextract.recipe.stat_names import categorical_stats

        return categorical_stats()
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
