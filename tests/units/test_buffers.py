"""Geodesic buffers checked against pyproj's geodesics and elementary geometry.

Reference: pyproj ``Geod`` implements Karney (2013), Algorithms for geodesics,
J. Geodesy 87:43-55; ``Geod.geometry_area_perimeter`` gives the area of a
polygon with geodesic edges on the ellipsoid and ``Geod.inv`` the geodesic
distance between two points. WGS84: a = 6 378 137 m, 1/f = 298.257223563
(NIMA TR8350.2).
"""

import math

import numpy as np
import pytest
import shapely
from numpy.testing import assert_allclose
from pyproj import Geod

from covextract.errors import GeometryError
from covextract.units.buffers import MAX_RADIUS_M, buffer_input_problems, geodesic_buffers

GEOD = Geod(ellps="WGS84")


def inscribed_ratio(n):
    # Area of a regular n-gon inscribed in a circle over the disc's area:
    # n/2 * r^2 * sin(2 pi/n) / (pi r^2) (elementary geometry).
    return n * math.sin(2 * math.pi / n) / (2 * math.pi)


def karney_area(geom):
    # Signed: positive for counter-clockwise rings (pyproj documentation).
    area, _ = GEOD.geometry_area_perimeter(geom)
    return area


@pytest.mark.parametrize("lat", [0.0, 45.0, 60.0, 80.0])
@pytest.mark.parametrize("radius", [1000.0, 2000.0, 5000.0, 10000.0])
def test_area_within_a_thousandth_of_pi_r2(lat, radius):
    poly = geodesic_buffers([25.0], [lat], radius)[0]
    area = karney_area(poly)  # Karney (2013) via pyproj
    assert area > 0  # counter-clockwise shell
    # the contract: within 0.1 % of pi r^2
    assert abs(area / (math.pi * radius**2) - 1) < 1e-3
    # sharper: the inscribed 128-gon's share of the disc (elementary geometry);
    # the Earth's curvature changes a 10 km disc's area by ~2e-7 relative
    # (spherical cap 2 pi R^2 (1 - cos(r/R)) = pi r^2 (1 - r^2/(12 R^2) + ...),
    # elementary geometry).
    assert_allclose(area, math.pi * radius**2 * inscribed_ratio(128), rtol=1e-6)


@pytest.mark.parametrize("lat", [0.0, 45.0, 60.0, 80.0])
def test_every_vertex_at_geodesic_distance_r(lat):
    radius = np.array([1000.0, 2000.0, 5000.0, 10000.0])
    lon = np.array([-70.0, 3.5, 100.0, 160.25])
    polys = geodesic_buffers(lon, np.full(4, lat), radius)
    for poly, x0, r in zip(polys, lon, radius, strict=True):
        ring = np.asarray(poly.exterior.coords)[:-1]
        assert len(ring) == 128
        az, _, dist = GEOD.inv(np.full(128, x0), np.full(128, lat), ring[:, 0], ring[:, 1])
        # Karney (2013) via pyproj Geod.inv
        assert_allclose(dist, r, rtol=0, atol=1e-6)
        # azimuths equally spaced, decreasing (counter-clockwise)
        steps = (np.diff(np.asarray(az)) + 180) % 360 - 180
        assert_allclose(steps, -360 / 128, atol=1e-9)


def test_vertex_count_and_area_loss_by_vertex_count():
    for n, loss in ((64, 0.0016), (128, 0.0004)):
        poly = geodesic_buffers([0.0], [10.0], 2000.0, n_vertices=n)[0]
        assert len(poly.exterior.coords) == n + 1
        ratio = karney_area(poly) / (math.pi * 2000.0**2)
        # 64 vertices lose 0.16 %, 128 lose 0.04 % (n sin(2 pi/n)/(2 pi))
        assert_allclose(1 - ratio, loss, atol=0.5e-4)
    assert 1 - inscribed_ratio(64) > 1e-3 > 1 - inscribed_ratio(128)


def test_one_vectorised_fwd_call_for_all_points():
    calls = []

    class CountingGeod(Geod):
        def fwd(self, *args, **kwargs):
            calls.append(np.size(args[0]))
            return super().fwd(*args, **kwargs)

    rng = np.random.default_rng(3)
    lon, lat = rng.uniform(-10, 10, 50), rng.uniform(-10, 10, 50)
    polys = geodesic_buffers(lon, lat, 3000.0, ellps=CountingGeod(ellps="WGS84"))
    assert len(polys) == 50
    assert calls == [50 * 128]


def test_per_point_radius_array():
    radius = np.array([1500.0, 7000.0])
    polys = geodesic_buffers([12.0, 12.0], [-3.0, -3.0], radius)
    areas = np.array([karney_area(p) for p in polys])
    assert_allclose(areas, math.pi * radius**2 * inscribed_ratio(128), rtol=1e-6)


def test_antimeridian_buffer_split_and_area_preserved():
    radius = 5000.0
    reference = karney_area(geodesic_buffers([0.0], [10.0], radius)[0])
    for centre in (179.99, -179.99, 180.0, -180.0):
        poly = geodesic_buffers([centre], [10.0], radius)[0]
        assert poly.geom_type == "MultiPolygon"
        assert poly.is_valid
        parts = list(poly.geoms)
        assert len(parts) == 2
        xmins = sorted(p.bounds[0] for p in parts)
        xmaxs = sorted(p.bounds[2] for p in parts)
        assert xmins[0] == -180.0 and xmaxs[-1] == 180.0
        assert all(-180.0 <= p.bounds[0] and p.bounds[2] <= 180.0 for p in parts)
        # the cut runs along the 180th meridian, itself a geodesic, so the total
        # area is that of the same circle away from the antimeridian (longitude
        # symmetry of the ellipsoid; Karney 2013 via pyproj)
        assert_allclose(sum(karney_area(p) for p in parts), reference, rtol=1e-9)


def test_longitude_wrap_of_centre():
    a = geodesic_buffers([190.0], [5.0], 2000.0)[0]
    b = geodesic_buffers([-170.0], [5.0], 2000.0)[0]
    assert_allclose(shapely.get_coordinates(a), shapely.get_coordinates(b), atol=1e-9)


def test_near_pole_without_containing_it():
    # 89.9 N is about 11.2 km from the pole (Geod.inv), so 5 km stays clear of it.
    _, _, to_pole = GEOD.inv(0.0, 89.9, 0.0, 90.0)
    assert to_pole > 5000
    poly = geodesic_buffers([45.0], [89.9], 5000.0)[0]
    assert poly.is_valid and poly.geom_type == "Polygon"
    ring = np.asarray(poly.exterior.coords)[:-1]
    _, _, dist = GEOD.inv(
        np.full(len(ring), 45.0), np.full(len(ring), 89.9), ring[:, 0], ring[:, 1]
    )
    assert_allclose(dist, 5000.0, atol=1e-6)


@pytest.mark.parametrize(
    ("lon", "lat", "radius", "match"),
    [
        (0.0, 0.0, MAX_RADIUS_M * 1.5, "exceeds"),
        (0.0, 0.0, 0.0, "positive"),
        (0.0, 0.0, -10.0, "positive"),
        (0.0, 89.99, 5000.0, "pole"),
        (0.0, -89.99, 5000.0, "pole"),
        (np.nan, 0.0, 5000.0, "finite"),
        (0.0, 95.0, 5000.0, "latitude"),
    ],
)
def test_rejected_inputs(lon, lat, radius, match):
    with pytest.raises(GeometryError, match=match):
        geodesic_buffers([lon], [lat], radius)


def test_problem_masks_point_at_positions():
    masks = buffer_input_problems([0.0, 0.0, 0.0], [0.0, 89.99, 10.0], [1000.0, 5000.0, 0.0])
    assert masks["pole"].tolist() == [False, True, False]
    assert masks["radius"].tolist() == [False, False, True]


def test_too_few_vertices():
    with pytest.raises(GeometryError, match="at least"):
        geodesic_buffers([0.0], [0.0], 1000.0, n_vertices=4)


def test_empty_input_and_unknown_ellipsoid():
    assert geodesic_buffers([], [], 1000.0).shape == (0,)
    with pytest.raises(GeometryError, match="unknown ellipsoid"):
        geodesic_buffers([0.0], [0.0], 1000.0, ellps="NoSuchEllipsoid")


def test_other_ellipsoid_distances():
    # Vertices must sit at r on the ellipsoid asked for (pyproj Geod.inv on
    # GRS80, Karney 2013), not on WGS84.
    grs = Geod(ellps="GRS80")
    poly = geodesic_buffers([10.0], [50.0], 3000.0, ellps="GRS80")[0]
    ring = np.asarray(poly.exterior.coords)[:-1]
    _, _, dist = grs.inv(np.full(len(ring), 10.0), np.full(len(ring), 50.0), ring[:, 0], ring[:, 1])
    assert_allclose(dist, 3000.0, atol=1e-6)
