"""Sources derived from other sources on one grid: periods collapsed, and the change between two.

Used for the change of a series between two selections of periods: each
selection is collapsed per pixel (:class:`CollapsedSource`) and the later
minus the earlier is taken per pixel (:class:`ChangeSource`).
"""

from __future__ import annotations

import numpy as np

from covextract.errors import RasterError

__all__ = ["CollapsedSource", "ChangeSource"]


class CollapsedSource:
    """Several periods of a series on one grid, collapsed per pixel (mean, sum or max).

    A pixel is valid only where every period is valid, so a collapsed value
    never silently mixes fewer periods in.
    """

    def __init__(self, sources, how: str = "mean") -> None:
        if not sources:
            raise ValueError("no periods to collapse")
        first = sources[0]
        for other in sources[1:]:
            if not other.grid.same_lattice(first.grid):
                raise RasterError(
                    f"{first.path} and {other.path} are periods of one series on different "
                    "grids; a per-pixel change needs one grid: warp them onto one first."
                )
        self.sources = list(sources)
        self.how = how
        self.grid = first.grid
        self.path = first.path

    def read_block(self, window):
        """Stored values of every period."""
        return [s.read_block(window) for s in self.sources]

    def to_values(self, stored):
        """Collapsed values and the pixels valid in every period."""
        vals, valid = [], None
        for s, block in zip(self.sources, stored, strict=True):
            v, m = s.to_values(block)
            vals.append(v)
            valid = m if valid is None else valid & m
        stack = np.stack(vals)
        with np.errstate(invalid="ignore"):
            if self.how == "sum":
                out = stack.sum(axis=0)
            elif self.how == "max":
                out = stack.max(axis=0)
            else:
                out = stack.mean(axis=0)
        return out, valid


class ChangeSource:
    """Later minus earlier, per pixel, on pixels valid in both (``part="change"``).

    ``part="earlier"`` gives the earlier values on the same pixels, the
    denominator of the relative change.
    """

    def __init__(self, later, earlier, part: str = "change") -> None:
        if not later.grid.same_lattice(earlier.grid):
            raise RasterError(
                f"{later.path} and {earlier.path} are on different grids; a per-pixel change "
                "needs one grid: warp them onto one first."
            )
        self.later, self.earlier, self.part = later, earlier, part
        self.grid = later.grid
        self.path = later.path

    def read_block(self, window):
        """Stored values of both sides."""
        return (self.later.read_block(window), self.earlier.read_block(window))

    def to_values(self, stored):
        """The change (or the earlier values) where both sides are valid."""
        v1, m1 = self.later.to_values(stored[0])
        v0, m0 = self.earlier.to_values(stored[1])
        ok = m1 & m0
        return (v1 - v0 if self.part == "change" else v0), ok
