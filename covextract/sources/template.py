"""A series of raster files named by a path template (``file: rain_{year}{month:02d}.tif``)."""

from __future__ import annotations

from covextract.io.series import SeriesIndex
from covextract.io.series_files import discover_series
from covextract.sources.base import gaps_text, step_adjective

__all__ = ["TemplateSeriesKind"]


class TemplateSeriesKind:
    """One raster file per period, found by the layer's path template and ``every``."""

    name = "template series"
    series = True

    def matches(self, layer) -> bool:
        """A series layer (``file`` with date fields) that is not a NetCDF variable."""
        return not layer.bands and layer.variable is None and layer.is_series

    def open(self, name, layer, *, resolve, base_dir) -> SeriesIndex:
        """Discover the files; each period's raster is opened when first asked for."""
        options = {
            "nodata": layer.nodata,
            "scale": layer.scale,
            "offset": layer.offset,
            "valid_range": layer.valid_range,
            "ceiling": layer.ceiling,
            "name": name,
            "band": layer.band,
            "crs": layer.crs,
        }
        return discover_series(layer.file, layer.every, base_dir=base_dir, open_options=options)

    def input_files(self, opened) -> list:
        """Each period's file, role ``layer:<name>:<period label>``, in period order."""
        s = opened.source
        return [(f"layer:{opened.name}:{p.label}", s.path(p)) for p in s.periods]

    def describe(self, opened) -> str:
        """``36 monthly files rasters/rain_{year}{month:02d}.tif, 2021-01 to 2023-12, 0 gaps``.

        The band is named when it is not the first.
        """
        s = opened.source
        n = len(s.periods)
        text = (
            f"{n} {step_adjective(s.step)} file{'' if n == 1 else 's'} "
            f"{opened.shown(opened.layer.file)}"
        )
        if opened.layer.band != 1:
            text += f" (band {opened.layer.band})"
        return f"{text}, {s.periods[0].label} to {s.periods[-1].label}, {gaps_text(s.gaps)}"
