"""The recipe's ``output:`` and ``execution:`` blocks: where results go, and how work runs."""

from __future__ import annotations

from pathlib import PurePath
from typing import Annotated

from pydantic import BeforeValidator, Field, StringConstraints, field_validator, model_validator

from covextract.recipe.common import (
    OUTPUT_TABLE_SUFFIXES,
    Column,
    PathText,
    RecipeModel,
    check_suffix,
    issue,
    raise_issues,
    same_path,
)

__all__ = ["Output", "Execution"]


class Output(RecipeModel):
    """Where the results go.

    Parameters
    ----------
    table : str
        The study table with the new columns (.csv, .parquet or .gpkg).
    codebook : str, optional
        Default ``<table stem>_codebook.csv`` next to the table.
    manifest : str, optional
        Default ``<table stem>_manifest.json`` next to the table.
    drop : list of str
        Study-table columns left out of the written table; default none.
    panel : str, optional
        Folder of the long panel of per-period values (Parquet, one file per
        period); needed by covariates with ``periods:``.
    keep_coordinates : bool
        Keep exact locations in the shared outputs without a warning. By
        default a table that keeps the ``study.points`` columns, or a
        GeoPackage that writes each record's point, gets a
        :class:`~covextract.errors.CoordinatesKeptWarning`; ``true`` says the
        outputs stay with the confidential data on purpose.
    state : str, optional
        Folder of the weights cache. It reveals where the units are, so the
        default (filled in by :class:`Recipe`) sits next to the study table,
        with the confidential inputs, not next to outputs meant for sharing.
    """

    table: PathText
    codebook: PathText | None = None
    manifest: PathText | None = None
    drop: Annotated[list[Column], BeforeValidator(lambda v: [] if v is None else v)] = Field(
        default_factory=list
    )
    keep_coordinates: bool = False
    state: PathText | None = None
    panel: PathText | None = None

    @field_validator("table")
    @classmethod
    def _table_type(cls, value: str) -> str:
        return check_suffix(value, OUTPUT_TABLE_SUFFIXES, "writes as an output table")

    @model_validator(mode="after")
    def _defaults_and_clashes(self) -> Output:
        table = PurePath(self.table)
        if self.codebook is None:
            self.codebook = str(table.with_name(table.stem + "_codebook.csv"))
        if self.manifest is None:
            self.manifest = str(table.with_name(table.stem + "_manifest.json"))
        issues = []
        if same_path(self.codebook, self.table):
            issues.append(
                issue(("codebook",), "codebook and table are the same file", self.codebook)
            )
        if same_path(self.manifest, self.table) or same_path(self.manifest, self.codebook):
            issues.append(
                issue(("manifest",), "manifest is the same file as another output", self.manifest)
            )
        raise_issues("Output", issues)
        return self


class Execution(RecipeModel):
    """How the work runs; never changes the results.

    Parameters
    ----------
    threads : int, optional
        Local worker threads; default: one per CPU core.
    scheduler : str, optional
        Address of a running dask.distributed scheduler
        (``tcp://host:8786``); default: local threads.
    """

    threads: Annotated[int, Field(ge=1)] | None = None
    scheduler: Annotated[str, StringConstraints(min_length=1)] | None = None
