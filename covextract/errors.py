"""Exceptions and warnings raised by covextract.

Every error a user can cause derives from :class:`CovextractError`; the
narrower classes also inherit the matching builtin, so ``except OSError``
still catches a missing file. Messages say what is wrong, where, and what to
do. Nothing here imports the command line.

Warnings derive from :class:`CovextractWarning` so they can be filtered by
class (``warnings.simplefilter("ignore", UnitOutsideLayerWarning)``).
"""

from __future__ import annotations

__all__ = [
    "CovextractError",
    "RecipeError",
    "RecipeProblem",
    "InputFileError",
    "RasterError",
    "TableError",
    "GeometryError",
    "OutputError",
    "ColumnCollisionError",
    "SchedulerError",
    "CovextractWarning",
    "RemoteSchedulerWarning",
    "UnknownClassWarning",
    "LagZeroWarning",
    "UnitOutsideLayerWarning",
    "SuspectLocationWarning",
    "GeometryRepairedWarning",
    "CacheWarning",
    "LowValidShareWarning",
    "EmptyCovariateWarning",
    "CoordinatesKeptWarning",
]


class CovextractError(Exception):
    """Base class of every error covextract raises on purpose."""


class RecipeProblem:
    """One problem found in a recipe: where it is and what to do.

    Parameters
    ----------
    message : str
        What is wrong and what to do.
    key : str, optional
        Dotted path of the recipe key (``covariates[1].stats``).
    file : str, optional
        The recipe file.
    line : int, optional
        1-based line number in ``file``.
    """

    __slots__ = ("message", "key", "file", "line")

    def __init__(
        self,
        message: str,
        *,
        key: str | None = None,
        file: str | None = None,
        line: int | None = None,
    ) -> None:
        self.message = message
        self.key = key
        self.file = file
        self.line = line

    def __str__(self) -> str:
        where = []
        if self.file:
            where.append(str(self.file) + (f":{self.line}" if self.line else ""))
        elif self.line:
            where.append(f"line {self.line}")
        if self.key:
            where.append(self.key)
        prefix = " ".join(where)
        return f"{prefix}: {self.message}" if prefix else self.message

    def __repr__(self) -> str:
        return f"RecipeProblem({str(self)!r})"


class RecipeError(CovextractError, ValueError):
    """The recipe is invalid; ``problems`` lists every problem found."""

    def __init__(self, problems: list[RecipeProblem] | str) -> None:
        if isinstance(problems, str):
            problems = [RecipeProblem(problems)]
        self.problems = list(problems)
        if len(self.problems) == 1:
            text = str(self.problems[0])
        else:
            text = f"{len(self.problems)} problems in the recipe:\n" + "\n".join(
                f"  - {p}" for p in self.problems
            )
        super().__init__(text)


class InputFileError(CovextractError, OSError):
    """An input file is missing, unreadable or of an unsupported format."""


class RasterError(CovextractError, ValueError):
    """A raster cannot be used as given (no CRS, rotated grid, bad band...)."""


class TableError(CovextractError, ValueError):
    """The study table or a unit file has bad content (ids, coordinates, columns)."""


class GeometryError(CovextractError, ValueError):
    """Unit geometries cannot be built or used."""


class OutputError(CovextractError, OSError):
    """An output cannot be written where the recipe says."""


class ColumnCollisionError(CovextractError, ValueError):
    """Two covariates, or a covariate and the study table, share a column name."""


class SchedulerError(CovextractError, ConnectionError):
    """The dask scheduler named for the run cannot be reached."""


class CovextractWarning(UserWarning):
    """Base class of covextract's warnings."""


class UnitOutsideLayerWarning(CovextractWarning):
    """Some units fall wholly outside a layer; they get missing values."""


class SuspectLocationWarning(CovextractWarning):
    """Some points sit at (0, 0) or at sentinel values; they are not used."""


class GeometryRepairedWarning(CovextractWarning):
    """Some invalid polygons were repaired before use."""


class CacheWarning(CovextractWarning):
    """A cache file was unreadable and has been rebuilt."""


class LowValidShareWarning(CovextractWarning):
    """Some units have a low share of valid pixels."""


class RemoteSchedulerWarning(CovextractWarning):
    """The dask scheduler is on another machine: unit geometries travel to it."""


class UnknownClassWarning(CovextractWarning):
    """A categorical layer holds codes that are not in its class table."""


class LagZeroWarning(CovextractWarning):
    """A window before each record's date includes days after it (lag 0)."""


class EmptyCovariateWarning(CovextractWarning):
    """A covariate came out entirely missing: no unit has a value in any of its columns."""


class CoordinatesKeptWarning(CovextractWarning):
    """An output written for sharing keeps exact locations (coordinate columns, points).

    Silenced by ``output: {keep_coordinates: true}`` in the recipe.
    """
