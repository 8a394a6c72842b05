"""A series read from one variable of a NetCDF cube (``file: rain.nc`` with ``variable:``)."""

from __future__ import annotations

from covextract.io.cube import open_cube
from covextract.io.series import SeriesIndex
from covextract.sources.base import gaps_text, step_adjective

__all__ = ["NetCDFCubeKind"]


class NetCDFCubeKind:
    """One time step of the cube's variable per period; time from the file's CF metadata."""

    name = "NetCDF cube"
    series = True

    def matches(self, layer) -> bool:
        """A layer with ``variable``."""
        return not layer.bands and layer.variable is not None

    def open(self, name, layer, *, resolve, base_dir) -> SeriesIndex:
        """Open the cube's variable: its grid, packing and time steps, without reading pixels."""
        return open_cube(
            resolve(layer.file),
            variable=layer.variable,
            crs=layer.crs,
            every=layer.every,
            nodata=layer.nodata,
            scale=layer.scale,
            offset=layer.offset,
            valid_range=layer.valid_range,
            ceiling=layer.ceiling,
            name=name,
        )

    def input_files(self, opened) -> list:
        """The cube file once per period, role ``layer:<name>:<period label>``.

        Each period is its own piece for refresh, so each lists the file it
        reads; they all name the one cube.
        """
        s = opened.source
        return [(f"layer:{opened.name}:{p.label}", s.path(p)) for p in s.periods]

    def describe(self, opened) -> str:
        """``NetCDF cube rasters/rain.nc, variable precip, 36 monthly steps 2021-01 to 2023-12``.

        Gaps (periods missing between the first and the last) are named when
        there are any.
        """
        s = opened.source
        n = len(s.periods)
        text = (
            f"NetCDF cube {opened.shown(opened.layer.file)}, variable {opened.layer.variable}, "
            f"{n} {step_adjective(s.step)} step{'' if n == 1 else 's'} "
            f"{s.periods[0].label} to {s.periods[-1].label}"
        )
        return text + (f", {gaps_text(s.gaps)}" if s.gaps else "")
