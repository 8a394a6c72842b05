"""A layer read from one band of one raster file (``file:`` without date fields)."""

from __future__ import annotations

from covextract.io.rasters import RasterSource, open_layer

__all__ = ["RasterFileKind"]


class RasterFileKind:
    """One band of one raster file, opened as a :class:`~covextract.io.rasters.RasterSource`."""

    name = "file"
    series = False

    def matches(self, layer) -> bool:
        """A ``file`` that is neither a path template nor a NetCDF variable, without bands."""
        return layer.file is not None and not layer.bands and not layer.is_series

    def open(self, name, layer, *, resolve, base_dir) -> RasterSource:
        """Open the band, with the layer's scale, offset, nodata, valid range and ceiling."""
        return open_layer(
            resolve(layer.file),
            band=layer.band,
            nodata=layer.nodata,
            scale=layer.scale,
            offset=layer.offset,
            valid_range=layer.valid_range,
            crs=layer.crs,
            name=name,
            ceiling=layer.ceiling,
        )

    def input_files(self, opened) -> list:
        """The one file, role ``layer:<name>``."""
        return [(f"layer:{opened.name}", opened.resolve(opened.layer.file))]

    def describe(self, opened) -> str:
        """``file rasters/ndvi_2021.tif, band 1``."""
        return f"file {opened.shown(opened.layer.file)}, band {opened.layer.band}"
