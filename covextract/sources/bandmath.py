"""Band-math layers: an index computed per pixel from bands of several rasters on one grid.

:class:`BandMathKind` opens a layer spec with ``bands:`` and ``index:`` or
``expression:`` as a :class:`BandMathSource`, wrapped in a
:class:`ClippedSource` when the layer sets ``valid_range`` or ``ceiling``.
"""

from __future__ import annotations

import numpy as np

from covextract.errors import RasterError
from covextract.sources.expression import Expression, parse_expression

__all__ = ["BandMathSource", "ClippedSource", "BandMathKind"]


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


class BandMathKind:
    """Named bands of rasters on one grid, combined per pixel by an index or an expression."""

    name = "band math"
    series = False

    def matches(self, layer) -> bool:
        """A layer with ``bands``."""
        return bool(layer.bands)

    def open(self, name, layer, *, resolve, base_dir):
        """Open every band, check the expression and wrap the clipping rules when set."""
        from covextract.io.rasters import open_layer

        bands = {
            bname: open_layer(
                resolve(b.file),
                band=b.band,
                nodata=b.nodata,
                scale=b.scale,
                offset=b.offset,
                crs=layer.crs,
                name=f"{name}.{bname}",
            )
            for bname, b in layer.bands.items()
        }
        expr = parse_expression(
            layer.index or layer.expression, bands, key=f"layers.{name}.expression"
        )
        src = BandMathSource(bands, expr)
        if layer.ceiling is not None or layer.valid_range is not None:
            src = ClippedSource(src, layer.valid_range, layer.ceiling)
        return src

    def input_files(self, opened) -> list:
        """Every band's file, role ``layer:<name>.<band>``, in the recipe's band order."""
        return [
            (f"layer:{opened.name}.{bname}", opened.resolve(b.file))
            for bname, b in opened.layer.bands.items()
        ]

    def describe(self, opened) -> str:
        """``band math ndvi from bands red (rasters/red.tif band 1) and nir (...)``."""
        layer = opened.layer
        parts = [
            f"{bname} ({opened.shown(b.file)} band {b.band})" for bname, b in layer.bands.items()
        ]
        listed = parts[0] if len(parts) == 1 else ", ".join(parts[:-1]) + " and " + parts[-1]
        word = "band" if len(parts) == 1 else "bands"
        return f"band math {layer.index or layer.expression} from {word} {listed}"
