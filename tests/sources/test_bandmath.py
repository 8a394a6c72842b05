"""Band-math layers through the engine: scale and fill applied before the index."""

import numpy as np
import pytest
import rasterio
from affine import Affine
from numpy.testing import assert_allclose
from shapely.geometry import box

from covextract.engine.zonal import zonal
from covextract.errors import RasterError
from covextract.io.rasters import open_layer
from covextract.sources.bandmath import BandMathSource
from covextract.sources.expression import parse_expression
from covextract.stats.names import parse_stat

T = Affine(1.0, 0, 0, 0, -1.0, 2.0)


def _write(path, data, transform=T):
    with rasterio.open(
        path,
        "w",
        driver="GTiff",
        width=data.shape[1],
        height=data.shape[0],
        count=1,
        dtype=data.dtype,
        crs="EPSG:32633",
        transform=transform,
    ) as ds:
        ds.write(data, 1)
    return path


def test_ndvi_layer_from_scaled_bands(tmp_path):
    # common practice: reflectance stored as integers x 10000 with a fill value (here 0)
    red = np.array([[800, 2500], [0, 500]], dtype=np.int16)
    nir = np.array([[5000, 3000], [4000, 500]], dtype=np.int16)
    bands = {
        "red": open_layer(_write(tmp_path / "red.tif", red), scale=1e-4, nodata=0),
        "nir": open_layer(_write(tmp_path / "nir.tif", nir), scale=1e-4, nodata=0),
    }
    src = BandMathSource(bands, parse_expression("ndvi", bands))
    res = zonal(
        src,
        np.array([box(0, 0, 2, 2)], dtype=object),
        [parse_stat(s) for s in ("mean", "count", "valid_share")],
        area_weighting="off",
    )
    expected = [(0.5 - 0.08) / 0.58, (0.3 - 0.25) / 0.55, 0.0]  # Rouse et al. (1974)
    assert res.values["count"][0] == 3  # the fill pixel of red is nodata
    assert_allclose(res.values["mean"][0], np.mean(expected))
    assert_allclose(res.values["valid_share"][0], 0.75)


def test_bands_on_different_grids_are_refused(tmp_path):
    a = open_layer(_write(tmp_path / "a.tif", np.ones((2, 2), np.float32)))
    b = open_layer(
        _write(tmp_path / "b.tif", np.ones((2, 2), np.float32), Affine(2.0, 0, 0, 0, -2.0, 2.0))
    )
    with pytest.raises(
        RasterError,
        match=r"\(1.0, 0.0, 0.0, 0.0, -1.0, 2.0\).*\(2.0, 0.0, 0.0, 0.0, -2.0, 2.0\).*not on the same grid",
    ):
        BandMathSource({"nir": a, "red": b}, parse_expression("ndvi", ["nir", "red"]))
