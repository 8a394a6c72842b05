"""The recipe: schema, validation, and YAML loading with line numbers."""

from covextract.recipe.loader import load_recipe
from covextract.recipe.schema import (
    BOUNDARY_SUFFIXES,
    CATEGORICAL_STATS,
    NAME_PATTERN,
    OUTPUT_TABLE_SUFFIXES,
    RECIPE_VERSION,
    STATE_FOLDER_NAME,
    STUDY_TABLE_SUFFIXES,
    Boundaries,
    ColumnBuffer,
    Covariate,
    Execution,
    Layer,
    Output,
    Points,
    Recipe,
    Study,
    Units,
)

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
