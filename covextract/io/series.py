"""The index of a series: its periods, its gaps and a raster source for each period.

A series is a layer with a time axis. It comes either as separate rasters
whose names carry their date (:mod:`covextract.io.series_files`) or as one
NetCDF file with a time dimension (:mod:`covextract.io.cube`). Both give a
:class:`SeriesIndex`: the sorted :class:`~covextract.core.periods.Period`
steps that exist, the gaps between the first and the last, and for each
period a raster source with the engine's protocol (``grid``,
``read_block(window)``, ``to_values(stored)``, picklable), so the engine
never learns where a period's pixels came from.
"""

from __future__ import annotations

from pathlib import Path

from covextract.core.periods import Period, Step, parse_selection, period_gaps
from covextract.errors import RasterError, RecipeError

__all__ = ["SeriesIndex"]


class SeriesIndex:
    """The periods of a series and a raster source for each.

    Attributes
    ----------
    step : Step
        Length of the periods.
    periods : list of Period
        Periods that have data, sorted by start.
    gaps : list of Period
        Periods of ``step`` between the first and the last period that have
        no data.
    origin : str
        The template or cube file the series comes from (for messages).
    """

    def __init__(self, step: Step, backend, *, origin: str):
        self.step = step
        self._backend = backend
        self.periods: list[Period] = sorted(backend.periods())
        self.gaps: list[Period] = period_gaps(step, self.periods)
        self.origin = origin
        self._by_label = {p.label: p for p in self.periods}

    def __len__(self) -> int:
        return len(self.periods)

    def __repr__(self) -> str:
        span = f"{self.periods[0]}..{self.periods[-1]}" if self.periods else "empty"
        return (
            f"SeriesIndex({self.origin!r}, every {self.step.text}, {len(self.periods)} periods "
            f"{span}, {len(self.gaps)} gap(s))"
        )

    def _period(self, period) -> Period:
        found = self._by_label.get(period.label if isinstance(period, Period) else str(period))
        if found is None or (isinstance(period, Period) and found != period):
            span = f"{self.periods[0]} to {self.periods[-1]}" if self.periods else "none"
            gap = (
                " (it is a gap of the series)"
                if str(period) in {g.label for g in self.gaps}
                else ""
            )
            raise RasterError(
                f"period {str(period)!r} is not in the series {self.origin!r}{gap}; its periods "
                f"run {span}"
            )
        return found

    def source(self, period):
        """Raster source of one period.

        Parameters
        ----------
        period : Period or str
            A period of :attr:`periods`, or its label (``"2021-03"``).

        Returns
        -------
        RasterSource or CubeSource
            ``grid``, ``read_block(window)`` (stored values, north-up),
            ``to_values(stored)``; picklable.
        """
        return self._backend.source(self._period(period))

    def path(self, period) -> Path:
        """Return the file holding ``period``."""
        return self._backend.path(self._period(period))

    def where(self, period) -> str:
        """Where ``period`` is read from, for messages and codebooks."""
        return self._backend.where(self._period(period))

    def grids(self) -> dict[str, list[Period]]:
        """Periods grouped by grid.

        Returns
        -------
        dict
            Grid fingerprint (:attr:`Grid.fingerprint`) → the periods on that
            grid, in period order; grids ordered by their first period. Each
            group shares one weight build.
        """
        out: dict[str, list[Period]] = {}
        for p in self.periods:
            out.setdefault(self._backend.grid(p).fingerprint, []).append(p)
        return out

    def select(self, spec) -> list[Period]:
        """Periods of the series that start inside a selection.

        Parameters
        ----------
        spec : str, int or datetime.date
            See :func:`parse_selection`: ``"2019-01..2020-12"``,
            ``"2019-01.."``, ``"..2020"``, ``"2015"`` (on a monthly series,
            the twelve months of 2015). A period is selected when its start
            day falls in the interval, so a 16-day composite starting on
            27 December 2015 belongs to ``"2015"``.

        Returns
        -------
        list of Period
            In order; gaps are not included.

        Raises
        ------
        RecipeError
            A bad selection, or one that selects no period of the series.
        """
        lo, hi = parse_selection(spec)
        chosen = [
            p
            for p in self.periods
            if (lo is None or p.start >= lo) and (hi is None or p.start <= hi)
        ]
        if not chosen:
            span = f"{self.periods[0]} to {self.periods[-1]}" if self.periods else "no periods"
            raise RecipeError(
                f"periods {spec!r} selects none of the periods of series {self.origin!r} "
                f"(every {self.step.text}, {span}); choose dates inside the series"
            )
        return chosen
