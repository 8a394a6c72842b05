"""Grid geometry: blocks and true pixel areas."""

import numpy as np
import pytest
from affine import Affine
from numpy.testing import assert_allclose
from pyproj import CRS, Geod
from shapely.geometry import Polygon

from covextract.core.grid import Grid, ellipsoid_band_area

GEOD = Geod(ellps="WGS84")


def _geod_pixel_area(lon0, lat_top, dlon, dlat, n=200):
    """Area of a lat/lon pixel from pyproj's geodesic polygon area (Karney 2013).

    The pixel's north and south sides follow parallels, not geodesics, so they
    are densified with ``n`` points each; the remaining error is far below 1e-6.
    """
    lons = np.linspace(lon0, lon0 + dlon, n)
    top = [(x, lat_top) for x in lons]
    bottom = [(x, lat_top - dlat) for x in lons[::-1]]
    area, _ = GEOD.geometry_area_perimeter(Polygon(top + bottom))
    return abs(area)


@pytest.mark.parametrize("lat", [0.5, 30.0, 45.0, 60.0, 80.0, -35.0])
def test_latlon_pixel_area_matches_pyproj_geodesic_area(lat):
    # Reference: pyproj Geod.geometry_area_perimeter, Karney (2013), J. Geodesy 87:43-55.
    res = 0.01
    grid = Grid(Affine(res, 0, 10.0, 0, -res, lat + res), 10, 3, CRS.from_epsg(4326))
    ours = grid.pixel_areas(np.array([1]))[0]
    ref = _geod_pixel_area(10.0, lat, res, res)
    assert_allclose(ours, ref, rtol=1e-4)


def test_band_area_sums_to_ellipsoid_area():
    # WGS84 surface area 510 065 621.7 km^2 (from memory; NIMA TR8350.2 gives the ellipsoid).
    half = ellipsoid_band_area(0.0, 90.0) * 2 * np.pi
    assert_allclose(2 * half / 1e6, 510_065_621.7, rtol=1e-8)


def test_row_area_shrinks_with_cos_latitude():
    # common practice: on a lat/lon grid pixel area is about proportional to cos(latitude)
    res = 0.1
    grid = Grid(Affine(res, 0, 0, 0, -res, 61.0), 4, 20, CRS.from_epsg(4326))
    rows = np.arange(20)
    areas = grid.pixel_areas(rows)
    lat_mid = 61.0 - (rows + 0.5) * res
    ratio = areas / np.cos(np.radians(lat_mid))
    assert np.ptp(ratio) / ratio.mean() < 5e-3
    assert grid.area_varies


def test_web_mercator_area_from_projection_factors():
    # Reference: pyproj geodesic area of the pixel's corners transformed to lon/lat.
    from pyproj import Transformer

    crs = CRS.from_epsg(3857)
    x0, y0 = 500_000.0, -1_300_000.0
    grid = Grid(Affine(500, 0, x0, 0, -500, y0), 100, 100, crs)
    assert grid.area_varies  # ~2 degrees of latitude: cos^2 changes by more than 0.1 %
    tr = Transformer.from_crs(crs, "EPSG:4326", always_xy=True)
    r, c = 40, 10
    xs = x0 + np.array([c, c + 1, c + 1, c]) * 500.0
    ys = y0 - np.array([r, r, r + 1, r + 1]) * 500.0
    lon, lat = tr.transform(xs, ys)
    ref = abs(GEOD.polygon_area_perimeter(lon, lat)[0])
    ours = grid.pixel_areas(np.array([r]), np.array([c]))[0]
    assert_allclose(ours, ref, rtol=1e-4)


def test_utm_area_is_constant_ground_area():
    # Reference: pyproj geodesic area of the central pixel's corners (Karney 2013);
    # UTM's scale factor (0.9996 on the central meridian, common practice) makes the
    # ground area differ from the nominal 100 m x 100 m by less than 0.2 %.
    from pyproj import Transformer

    crs = CRS.from_epsg(32731)
    grid = Grid(Affine(100, 0, 400_000, 0, -100, 9_000_000), 50, 50, crs)
    assert not grid.area_varies
    areas = grid.pixel_areas(np.array([0, 10]))
    assert areas[0] == areas[1]
    tr = Transformer.from_crs(crs, "EPSG:4326", always_xy=True)
    xs = 400_000 + np.array([25, 26, 26, 25]) * 100.0
    ys = 9_000_000 - np.array([25, 25, 26, 26]) * 100.0
    lon, lat = tr.transform(xs, ys)
    assert_allclose(areas[0], abs(GEOD.polygon_area_perimeter(lon, lat)[0]), rtol=1e-6)
    assert_allclose(areas[0], 10_000.0, rtol=2e-3)


@pytest.mark.parametrize(
    "shape,block", [((100, 130), (32, 32)), ((70, 500), (1, 500)), ((5, 5), (256, 256))]
)
def test_block_windows_partition_the_grid(shape, block):
    h, w = shape
    grid = Grid(Affine(1, 0, 0, 0, -1, 0), w, h, CRS.from_epsg(32631), block)
    seen = np.zeros(shape, dtype=int)
    for r0, c0, bh, bw in grid.block_windows():
        seen[r0 : r0 + bh, c0 : c0 + bw] += 1
    assert (seen == 1).all()


def test_fingerprint_tells_grids_apart():
    a = Grid(Affine(1, 0, 0, 0, -1, 0), 10, 10, CRS.from_epsg(4326))
    b = Grid(Affine(1, 0, 0.5, 0, -1, 0), 10, 10, CRS.from_epsg(4326))
    c = Grid(Affine(1, 0, 0, 0, -1, 0), 10, 10, CRS.from_epsg(4326))
    assert a.fingerprint != b.fingerprint
    assert a.same_lattice(c)
