"""A layer computed per pixel from bands of several rasters on one grid."""

from __future__ import annotations

import numpy as np

from covextract.derive.expression import Expression
from covextract.errors import RasterError

__all__ = ["BandMathSource", "ClippedSource", "WeightedSource"]


class BandMathSource:
    """Raster-source protocol (``grid``, ``read_block``, ``to_values``) for an index.

    Each band's scale, offset and nodata are applied first; a pixel is valid
    when every band it uses is valid and the result is finite (division by
    zero gives nodata, not inf).

    Parameters
    ----------
    bands : dict
        ``name -> RasterSource``; all on one grid.
    expression : Expression
        The checked expression.
    """

    def __init__(self, bands: dict, expression: Expression) -> None:
        names = list(bands)
        if not names:
            raise RasterError("a band-math layer needs at least one band")
        first = bands[names[0]]
        for name in names[1:]:
            other = bands[name]
            if not other.grid.same_lattice(first.grid):
                raise RasterError(
                    f"bands {names[0]!r} ({first.path}: {first.grid.width}x{first.grid.height}, "
                    f"{first.grid.crs.to_string()}, transform {tuple(first.grid.transform)[:6]}) "
                    f"and {name!r} ({other.path}: {other.grid.width}x{other.grid.height}, "
                    f"{other.grid.crs.to_string()}, transform {tuple(other.grid.transform)[:6]}) "
                    "are not on the same grid; an index is computed pixel by pixel, so warp "
                    "them onto one grid first."
                )
        self.bands = {n: bands[n] for n in names if n in expression.bands} or dict(bands)
        self.expression = expression
        self.grid = first.grid
        self.path = first.path

    def read_block(self, window):
        """Stored values of every band used."""
        return {name: src.read_block(window) for name, src in self.bands.items()}

    def to_values(self, stored):
        """Index values and validity of a block."""
        arrays, valid = {}, None
        for name, src in self.bands.items():
            v, m = src.to_values(stored[name])
            arrays[name] = np.where(m, v, np.nan)
            valid = m if valid is None else valid & m
        out = self.expression(arrays)
        return out, valid & np.isfinite(out)


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


class ClippedSource:
    """``valid_range`` and ``ceiling`` applied to a derived layer's values (band math).

    Single rasters get both from :class:`covextract.io.rasters.RasterSource`
    itself; this wrapper gives derived layers the same rules.
    """

    def __init__(self, source, valid_range, ceiling) -> None:
        self.source, self.valid_range, self.ceiling = source, valid_range, ceiling
        self.grid, self.path = source.grid, source.path
        self.nodata, self.scale, self.offset = (), 1.0, 0.0

    def read_block(self, window):
        """The wrapped layer's stored values."""
        return self.source.read_block(window)

    def to_values(self, stored):
        """Values outside ``valid_range`` become invalid; values above ``ceiling`` are set to it."""
        values, valid = self.source.to_values(stored)
        if self.valid_range is not None:
            with np.errstate(invalid="ignore"):
                valid = valid & (values >= self.valid_range[0]) & (values <= self.valid_range[1])
        if self.ceiling is not None:
            values = np.where(valid, np.minimum(values, self.ceiling), values)
        return values, valid
