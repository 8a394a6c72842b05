"""A layer whose statistics are weighted by another layer on the same grid (``weight_by``)."""

from __future__ import annotations

import numpy as np

from covextract.errors import RasterError

__all__ = ["WeightedSource"]


class WeightedSource:
    """A layer whose statistics are weighted by another layer on the same grid.

    ``to_values`` returns ``(values, valid, factor)``: a pixel is valid only
    where both layers are valid (cells without a weight are excluded, and so
    lower the valid share), and ``factor`` is the weight layer's value (for
    example people per km², giving population-weighted means).
    """

    def __init__(self, source, weight) -> None:
        if not source.grid.same_lattice(weight.grid):
            g1, g2 = source.grid, weight.grid
            raise RasterError(
                f"{source.path} ({g1.width}x{g1.height}, {g1.crs.to_string()}, transform "
                f"{tuple(g1.transform)[:6]}) and the weight layer {weight.path} ({g2.width}x"
                f"{g2.height}, {g2.crs.to_string()}, transform {tuple(g2.transform)[:6]}) are not "
                "on the same grid; weight_by needs both on one grid. Warp one onto the other first."
            )
        self.source = source
        self.weight = weight
        self.grid = source.grid
        self.path = source.path

    def read_block(self, window):
        """Both layers' stored values."""
        return (self.source.read_block(window), self.weight.read_block(window))

    def to_values(self, stored):
        """Values, joint validity and the weight factor (negative weights are invalid)."""
        v, m = self.source.to_values(stored[0])
        f, fm = self.weight.to_values(stored[1])
        ok = m & fm & (f >= 0)
        return v, ok, np.where(ok, f, 0.0)
