"""The library's entry points for use from Python."""

from __future__ import annotations

import numpy as np
import pandas as pd

from covextract.core.options import DEFAULT_PIXEL_RULE, is_point_method
from covextract.errors import GeometryError
from covextract.stats.names import parse_stat

__all__ = ["zonal_statistics", "run_recipe"]


def run_recipe(recipe, *, write: bool = True) -> pd.DataFrame:
    """Run a recipe and return the study table with the covariates appended.

    Parameters
    ----------
    recipe : str, Path or dict
        A recipe file, or the same content as a dict (relative paths are then
        relative to the current folder).
    write : bool
        Also write the table, codebook and manifest the recipe names.

    Returns
    -------
    DataFrame
        The user's rows and columns, unchanged and in order, followed by the
        new columns (minus ``output.drop``).

    Examples
    --------
    >>> table = run_recipe("recipes/demo.yaml", write=False)  # doctest: +SKIP
    """
    from covextract.run import run

    return run(recipe, write=write).table


def zonal_statistics(
    raster,
    units,
    stats,
    *,
    id_column: str | None = None,
    pixels: str = DEFAULT_PIXEL_RULE,
    area_weighting: str = "auto",
    threshold: float | None = None,
    band: int = 1,
    nodata=None,
    scale: float | None = None,
    offset: float | None = None,
    with_qa: bool = False,
) -> pd.DataFrame:
    """Zonal statistics of one raster band over polygons or points.

    Parameters
    ----------
    raster : str or Path
        Raster file (GeoTIFF or anything GDAL reads).
    units : geopandas.GeoDataFrame
        Polygons (or points, with ``pixels="nearest"`` or ``"bilinear"``), with a
        CRS; reprojected to the raster's CRS, the raster is never resampled.
    stats : list of str
        Statistic names (``mean``, ``q90``, ``density_total``...).
    id_column : str, optional
        Column used as the index; the GeoDataFrame's index when omitted.
    pixels : str
        ``overlap`` (default), ``center``, ``touched``; for points ``nearest``
        or ``bilinear``.
    area_weighting : {"auto", "off"}
        Weight by true pixel area where it varies over the grid.
    threshold : float, optional
        For ``area_above`` and ``share_above``.
    band, nodata, scale, offset
        As the layer keys of a recipe.
    with_qa : bool
        Add a ``qa`` column of reason codes.

    Returns
    -------
    DataFrame
        One row per unit (index: the unit id), one column per statistic.
    """
    from pyproj import CRS

    from covextract.engine.zonal import zonal
    from covextract.io.rasters import open_layer

    if units.crs is None:
        raise GeometryError("the units have no CRS; set one with units.set_crs(...)")
    point = is_point_method(pixels)
    parsed = [parse_stat(s, point=point) for s in stats]
    src = open_layer(raster, band=band, nodata=nodata, scale=scale, offset=offset)
    geoms = (
        units.geometry.to_crs(CRS.from_user_input(src.grid.crs))
        if units.crs != src.grid.crs
        else units.geometry
    )
    arr = np.array([None if (g is None or g.is_empty) else g for g in geoms], dtype=object)
    res = zonal(src, arr, parsed, rule=pixels, area_weighting=area_weighting, threshold=threshold)
    index = pd.Index(
        units[id_column].astype(str) if id_column else units.index,
        name=id_column or units.index.name,
    )
    frame = pd.DataFrame({s.name: res.values[s.name] for s in parsed}, index=index)
    if with_qa:
        frame["qa"] = [";".join(c) for c in res.qa]
    return frame
