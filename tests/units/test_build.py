"""Study records to unit geometries: every shape, every validation rule.

Villages, clusters and clinics of the invented Orvane valley. Geodesic
references: pyproj ``Geod`` (Karney 2013, J. Geodesy 87:43-55); reprojection
reference: pyproj ``Transformer``.
"""

import math
import warnings

import geopandas as gpd
import numpy as np
import pandas as pd
import pyproj
import pytest
import shapely
from numpy.testing import assert_allclose, assert_array_equal

from covextract.errors import (
    GeometryError,
    GeometryRepairedWarning,
    SuspectLocationWarning,
    TableError,
)
from covextract.io.tables import read_boundaries, read_study_table
from covextract.units import QA_CODES, UnitSet, build_units
from covextract.units.build import _transformer

GEOD = pyproj.Geod(ellps="WGS84")
PTS = {"x": "lon", "y": "lat", "crs": "EPSG:4326"}
RATIO_128 = 128 * math.sin(2 * math.pi / 128) / (2 * math.pi)  # inscribed 128-gon / disc


def csv_table(tmp_path, text, name="villages.csv"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return read_study_table(path)


VILLAGES = (
    "village_id,lon,lat,radius_m,name\n"
    "001,30.50,-2.10,2000,Orvane Ford\n"
    "002,30.60,-2.20,5000,Kessel Hill\n"
    "003,30.70,-2.30,3000,Marrow Bend\n"
)


@pytest.fixture
def villages(tmp_path):
    return csv_table(tmp_path, VILLAGES)


def karney_area(geom):
    return GEOD.geometry_area_perimeter(geom)[0]


# ---------------------------------------------------------------- buffers


def test_fixed_buffer_from_csv(villages):
    units = build_units(villages, id_column="village_id", points=PTS, buffer_m=2000)
    assert isinstance(units, UnitSet)
    assert len(units) == 3
    assert units.ids.tolist() == ["001", "002", "003"]
    assert units.ids.dtype == object
    assert units.kind == "area"
    assert units.crs == pyproj.CRS("EPSG:4326")
    assert units.qa == [[], [], []]
    assert units.description == "geodesic buffer of 2000 m around each point"
    assert units.params["radius_m"] == 2000.0 and units.params["n_vertices"] == 128
    for geom, (x, y) in zip(
        units.geometry, [(30.5, -2.1), (30.6, -2.2), (30.7, -2.3)], strict=True
    ):
        assert geom.geom_type == "Polygon"
        ring = np.asarray(geom.exterior.coords)[:-1]
        _, _, dist = GEOD.inv(np.full(len(ring), x), np.full(len(ring), y), ring[:, 0], ring[:, 1])
        assert_allclose(dist, 2000.0, atol=1e-6)  # Karney (2013) via pyproj Geod.inv


def test_radius_column(villages):
    units = build_units(villages, id_column="village_id", points=PTS, radius_column="radius_m")
    assert units.description == "geodesic buffer, radius from column radius_m (2000-5000 m)"
    areas = np.array([karney_area(g) for g in units.geometry])
    radius = np.array([2000.0, 5000.0, 3000.0])
    # Karney (2013) area of each buffer against the inscribed 128-gon of pi r^2
    assert_allclose(areas, math.pi * radius**2 * RATIO_128, rtol=1e-6)
    assert np.all(np.abs(areas / (math.pi * radius**2) - 1) < 1e-3)


@pytest.mark.parametrize(
    ("cell", "match"),
    [
        ("abc", r"radius value\(s\) that are not numbers: row 2 \(id '002'\): 'abc'"),
        ("0", r"empty, zero or negative: row 2 \(id '002'\)"),
        ("-50", r"empty, zero or negative: row 2 \(id '002'\): '-50'"),
        ("", r"empty, zero or negative: row 2"),
    ],
)
def test_bad_radius(tmp_path, cell, match):
    text = VILLAGES.replace("002,30.60,-2.20,5000", f"002,30.60,-2.20,{cell}")
    table = csv_table(tmp_path, text)
    with pytest.raises(TableError, match=match):
        build_units(table, id_column="village_id", points=PTS, radius_column="radius_m")


def test_radius_ignored_where_no_location(tmp_path):
    text = VILLAGES.replace("002,30.60,-2.20,5000", "002,,,")
    units = build_units(
        csv_table(tmp_path, text), id_column="village_id", points=PTS, radius_column="radius_m"
    )
    assert units.geometry[1] is None
    assert units.qa[1] == ["no_location"]
    assert units.description.endswith("(2000-3000 m)")


def test_radius_too_large(tmp_path):
    text = VILLAGES.replace("002,30.60,-2.20,5000", "002,30.60,-2.20,2500000")
    with pytest.raises(GeometryError, match=r"above 1e\+06 m: row 2 \(id '002'\)"):
        build_units(
            csv_table(tmp_path, text), id_column="village_id", points=PTS, radius_column="radius_m"
        )
    with pytest.raises(GeometryError, match="above the limit"):
        build_units(csv_table(tmp_path, VILLAGES), id_column="village_id", points=PTS, buffer_m=2e6)


@pytest.mark.parametrize("value", [0, -5, float("nan"), "two km"])
def test_bad_buffer_m(villages, value):
    with pytest.raises(GeometryError, match="units.buffer_m"):
        build_units(villages, id_column="village_id", points=PTS, buffer_m=value)


def test_buffer_over_pole(tmp_path):
    table = csv_table(tmp_path, "id,lon,lat\nP1,10,89.99\n")
    with pytest.raises(GeometryError, match=r"reach a pole.*row 1 \(id 'P1'\)"):
        build_units(table, id_column="id", points=PTS, buffer_m=5000)


def test_projected_points_buffered_in_geographic_crs(tmp_path):
    # UTM zone 36S (EPSG:32736); the buffer centre is the point's lon/lat
    # (pyproj Transformer) and the vertices lie at r on WGS84 (Geod.inv).
    to_ll = pyproj.Transformer.from_crs("EPSG:32736", "EPSG:4326", always_xy=True)
    table = csv_table(tmp_path, "id,e,n\nC1,500000,9770000\n")
    units = build_units(
        table, id_column="id", points={"x": "e", "y": "n", "crs": "EPSG:32736"}, buffer_m=2000
    )
    assert units.crs.is_geographic
    assert units.crs == pyproj.CRS("EPSG:32736").geodetic_crs
    lon0, lat0 = to_ll.transform(500000.0, 9770000.0)
    ring = np.asarray(units.geometry[0].exterior.coords)[:-1]
    _, _, dist = GEOD.inv(
        np.full(len(ring), lon0), np.full(len(ring), lat0), ring[:, 0], ring[:, 1]
    )
    assert_allclose(dist, 2000.0, atol=1e-6)


def test_vector_points_buffered(tmp_path):
    path = tmp_path / "clinics.gpkg"
    gpd.GeoDataFrame(
        {"clinic": ["K1", "K2", "K3"]},
        geometry=[shapely.Point(30.5, -2.1), None, shapely.Point()],
        crs="EPSG:4326",
    ).to_file(path)
    units = build_units(read_study_table(path), id_column="clinic", buffer_m=1000)
    assert units.geometry[0].geom_type == "Polygon"
    assert_allclose(karney_area(units.geometry[0]), math.pi * 1e6 * RATIO_128, rtol=1e-6)
    assert units.geometry[1] is None and units.geometry[2] is None
    assert units.qa[1] == ["no_location"]
    assert units.qa[2] == ["empty_geometry"]


def test_polygons_cannot_be_buffered(tmp_path):
    path = tmp_path / "areas.gpkg"
    gpd.GeoDataFrame({"id": ["A"]}, geometry=[shapely.box(0, 0, 1, 1)], crs=4326).to_file(path)
    with pytest.raises(TableError, match="needs one point per record.*1 Polygon"):
        build_units(read_study_table(path), id_column="id", buffer_m=1000)


def test_parquet_point_table_int_ids(tmp_path):
    path = tmp_path / "clusters.parquet"
    pd.DataFrame({"cluster": [7, 12], "lon": [30.5, np.nan], "lat": [-2.1, np.nan]}).to_parquet(
        path
    )
    units = build_units(read_study_table(path), id_column="cluster", points=PTS, buffer_m=5000)
    assert units.ids.tolist() == ["7", "12"]
    assert all(type(v) is str for v in units.ids)
    assert units.geometry[0].geom_type == "Polygon"
    assert units.geometry[1] is None and units.qa[1] == ["no_location"]


# ---------------------------------------------------------------- points


def test_at_point(villages):
    units = build_units(villages, id_column="village_id", points=PTS, at_point="bilinear")
    assert units.kind == "point"
    assert units.crs == pyproj.CRS("EPSG:4326")
    assert [(g.x, g.y) for g in units.geometry] == [(30.5, -2.1), (30.6, -2.2), (30.7, -2.3)]
    assert units.params == {"shape": "point", "method": "bilinear"}
    with pytest.raises(GeometryError, match="choose one of 'nearest', 'bilinear'"):
        build_units(villages, id_column="village_id", points=PTS, at_point="cubic")


def test_at_point_keeps_projected_crs(tmp_path):
    table = csv_table(tmp_path, "id,e,n\nC1,500000,9770000\n")
    units = build_units(
        table, id_column="id", points={"x": "e", "y": "n", "crs": "EPSG:32736"}, at_point="nearest"
    )
    assert units.crs == pyproj.CRS("EPSG:32736")
    assert units.geometry[0].equals(shapely.Point(500000, 9770000))


def test_point_table_needs_a_unit_shape(villages):
    with pytest.raises(TableError, match="units.buffer_m / units.boundaries / units.at_point"):
        build_units(villages, id_column="village_id", points=PTS)


def test_two_unit_shapes(villages, tmp_path):
    with pytest.raises(
        TableError, match="choose one unit shape: units.buffer_m and units.at_point"
    ):
        build_units(villages, id_column="village_id", points=PTS, buffer_m=10, at_point="nearest")
    with pytest.raises(TableError, match="not both"):
        build_units(
            villages, id_column="village_id", points=PTS, buffer_m=10, radius_column="radius_m"
        )


def test_no_points_no_geometry(villages):
    with pytest.raises(TableError, match="study.points is not set"):
        build_units(villages, id_column="village_id", buffer_m=1000)


# ---------------------------------------------------------------- ids


def test_id_column_missing(villages):
    with pytest.raises(
        TableError, match=r"id column 'villageid'.*Available columns: 'village_id'.*Did you mean"
    ):
        build_units(villages, id_column="villageid", points=PTS, buffer_m=1000)


def test_duplicate_ids(tmp_path):
    text = VILLAGES + "002,30.8,-2.4,1000,Kessel Hill East\n"
    with pytest.raises(TableError, match=r"1 id\(s\).*more than once: '002' \(rows 2, 4\)"):
        build_units(csv_table(tmp_path, text), id_column="village_id", points=PTS, buffer_m=10)


def test_missing_ids(tmp_path):
    text = VILLAGES + ",30.8,-2.4,1000,Nameless\n  ,30.9,-2.5,1000,Blank\n"
    with pytest.raises(TableError, match=r"2 record\(s\).*have no id.*row 4; row 5"):
        build_units(csv_table(tmp_path, text), id_column="village_id", points=PTS, buffer_m=10)


def test_many_bad_rows_show_five_and_a_count(tmp_path):
    rows = "".join(f"{i:03d},east,-2.1\n" for i in range(1, 9))
    table = csv_table(tmp_path, "village_id,lon,lat\n" + rows)
    with pytest.raises(
        TableError, match=r"has 8 coordinate.*row 5 \(id '005'\): 'east'; and 3 more"
    ):
        build_units(table, id_column="village_id", points=PTS, buffer_m=10)


# ---------------------------------------------------------------- coordinates


def test_coordinate_column_missing(villages):
    with pytest.raises(
        TableError, match=r"coordinate column 'lng' \(study.points.x\).*Available columns"
    ):
        build_units(villages, id_column="village_id", points={"x": "lng", "y": "lat"}, buffer_m=10)


@pytest.mark.parametrize(
    ("cell", "match"),
    [
        ("abc", r"'lat'.*not numbers: row 2 \(id '002'\): 'abc'"),
        ("NA", r"not numbers: row 2 \(id '002'\): 'NA'.*leave the cell empty"),
        ("-2,20", r"decimal separator"),
        ("2°12'S", r"degrees-minutes-seconds"),
        ("inf", r"not numbers"),
    ],
)
def test_non_numeric_coordinates(tmp_path, cell, match):
    text = VILLAGES.replace("002,30.60,-2.20", f'002,30.60,"{cell}"')
    with pytest.raises(TableError, match=match):
        build_units(csv_table(tmp_path, text), id_column="village_id", points=PTS, buffer_m=10)


def test_empty_coordinates_no_location(tmp_path):
    text = VILLAGES.replace("002,30.60,-2.20", "002, ,").replace("003,30.70,-2.30", "003,30.7,")
    units = build_units(csv_table(tmp_path, text), id_column="village_id", points=PTS, buffer_m=10)
    assert units.geometry[0] is not None
    assert units.geometry[1] is None and units.geometry[2] is None
    assert units.qa == [[], ["no_location"], ["no_location"]]


def test_out_of_range_and_swapped(tmp_path):
    # latitude in the x column: swapping makes every value valid
    swapped = "village_id,lon,lat\nA,-2.1,130.5\nB,-2.2,30.6\n"
    with pytest.raises(TableError, match=r"outside the range.*row 1 \(id 'A'\).*look swapped"):
        build_units(csv_table(tmp_path, swapped), id_column="village_id", points=PTS, buffer_m=10)
    projected = "village_id,lon,lat\nA,500000,9770000\n"
    with pytest.raises(TableError, match=r"outside the range.*study.points.crs"):
        build_units(csv_table(tmp_path, projected), id_column="village_id", points=PTS, buffer_m=10)
    wrapped = "village_id,lon,lat\nA,350.5,-2.1\n"
    with pytest.raises(TableError, match=r"0..360"):
        build_units(csv_table(tmp_path, wrapped), id_column="village_id", points=PTS, buffer_m=10)


def test_suspect_locations_warn_and_drop(tmp_path):
    text = VILLAGES + "004,0,0,1000,Null Island\n005,30.1,-999,1000,Sentinel\n006,99.99,5,1,S2\n"
    table = csv_table(tmp_path, text)
    with pytest.warns(
        SuspectLocationWarning, match=r"3 record\(s\).*row 4 \(id '004'\): at \(0, 0\)"
    ):
        units = build_units(table, id_column="village_id", points=PTS, buffer_m=1000)
    assert units.geometry[3] is None and units.geometry[4] is None and units.geometry[5] is None
    assert units.qa[3:] == [["suspect_location"]] * 3
    assert units.qa[:3] == [[], [], []]


def test_suspect_warning_points_at_caller(tmp_path):
    table = csv_table(tmp_path, "id,lon,lat\nA,0,0\n")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        build_units(table, id_column="id", points=PTS, at_point="nearest")
    assert [w.category for w in caught] == [SuspectLocationWarning]
    assert caught[0].filename == __file__


def test_bad_points_crs(villages):
    with pytest.raises(TableError, match="not a CRS pyproj recognises"):
        build_units(villages, id_column="village_id", points={**PTS, "crs": "EPSG:0"}, buffer_m=10)


# ---------------------------------------------------------------- polygons


def test_vector_table_own_polygons(tmp_path):
    path = tmp_path / "villages.gpkg"
    bowtie = shapely.Polygon([(0, 0), (2, 2), (2, 0), (0, 2)])  # two triangles of area 1
    gpd.GeoDataFrame(
        {"village_id": ["V1", "V2", "V3", "V4"]},
        geometry=[shapely.box(30, -2, 30.1, -1.9), bowtie, shapely.Polygon(), None],
        crs="EPSG:4326",
    ).to_file(path)
    table = read_study_table(path)
    with pytest.warns(GeometryRepairedWarning, match=r"1 invalid polygon.*row 2 \(id 'V2'\)"):
        units = build_units(table, id_column="village_id")
    assert units.kind == "area"
    assert units.crs == pyproj.CRS("EPSG:4326")
    assert units.description == "own polygon of each record in villages.gpkg"
    assert units.geometry[0].equals(shapely.box(30, -2, 30.1, -1.9))
    assert units.geometry[1].is_valid
    assert units.geometry[1].geom_type == "MultiPolygon"
    assert_allclose(units.geometry[1].area, 2.0, rtol=1e-12)  # worked out by hand
    assert units.geometry[2] is None and units.geometry[3] is None
    assert units.qa == [[], ["geometry_repaired"], ["empty_geometry"], ["no_location"]]


def test_repair_keeps_only_polygonal_parts(tmp_path):
    # a polygon with a dangling spike: make_valid gives polygon + line
    spiky = shapely.Polygon([(0, 0), (1, 0), (1, 1), (1, 2), (1, 1), (0, 1)])
    gdf = gpd.GeoDataFrame({"id": ["S"]}, geometry=[spiky], crs="EPSG:4326")
    path = tmp_path / "spiky.gpkg"
    gdf.to_file(path)
    with pytest.warns(GeometryRepairedWarning):
        units = build_units(read_study_table(path), id_column="id")
    assert units.geometry[0].geom_type in ("Polygon", "MultiPolygon")
    assert_allclose(units.geometry[0].area, 1.0, rtol=1e-12)


def test_point_vector_table_needs_shape(tmp_path):
    path = tmp_path / "clinics.gpkg"
    gpd.GeoDataFrame({"id": ["K"]}, geometry=[shapely.Point(1, 1)], crs=4326).to_file(path)
    with pytest.raises(TableError, match="units.buffer_m / units.boundaries / units.at_point"):
        build_units(read_study_table(path), id_column="id")


def test_lines_rejected(tmp_path):
    path = tmp_path / "roads.gpkg"
    gpd.GeoDataFrame(
        {"id": ["R"]}, geometry=[shapely.LineString([(0, 0), (1, 1)])], crs=4326
    ).to_file(path)
    with pytest.raises(TableError, match="1 LineString.*Polygon or MultiPolygon"):
        build_units(read_study_table(path), id_column="id")


# ---------------------------------------------------------------- boundaries


@pytest.fixture
def boundary_file(tmp_path):
    path = tmp_path / "village_areas.gpkg"
    gpd.GeoDataFrame(
        {"code": ["003", "001", "099"]},  # 002 has no boundary, 099 is not in the table
        geometry=[
            shapely.box(30.6, -2.4, 30.8, -2.2),
            shapely.box(30.4, -2.2, 30.6, -2.0),
            shapely.box(0, 0, 1, 1),
        ],
        crs="EPSG:4326",
    ).to_file(path)
    return path


def test_boundary_join(villages, boundary_file):
    bounds = read_boundaries(boundary_file, id_column="code")
    units = build_units(villages, id_column="village_id", boundaries=bounds)
    assert units.ids.tolist() == ["001", "002", "003"]
    assert units.geometry[0].equals(shapely.box(30.4, -2.2, 30.6, -2.0))
    assert units.geometry[1] is None
    assert units.geometry[2].equals(shapely.box(30.6, -2.4, 30.8, -2.2))
    assert units.qa == [[], ["no_boundary"], []]
    assert units.kind == "area"
    assert units.crs == pyproj.CRS("EPSG:4326")
    assert units.description == "boundary from village_areas.gpkg, matched on village_id"


def test_boundary_join_in_memory_frame_with_int_ids(tmp_path):
    table = csv_table(tmp_path, "id,name\n7,Orvane Ford\n8,Kessel Hill\n")
    gdf = gpd.GeoDataFrame(
        {"vid": [8, 7]}, geometry=[shapely.box(1, 1, 2, 2), shapely.box(0, 0, 1, 1)], crs=32736
    )
    units = build_units(table, id_column="id", boundaries=gdf, boundary_id="vid")
    assert units.geometry[0].equals(shapely.box(0, 0, 1, 1))
    assert units.geometry[1].equals(shapely.box(1, 1, 2, 2))
    assert units.crs == pyproj.CRS("EPSG:32736")


def test_boundary_duplicate_ids(villages):
    gdf = gpd.GeoDataFrame(
        {"id": ["001", "001"]},
        geometry=[shapely.box(0, 0, 1, 1), shapely.box(1, 1, 2, 2)],
        crs=4326,
    )
    with pytest.raises(TableError, match=r"1 id\(s\) occur more than once.*'001'.*dissolve"):
        build_units(villages, id_column="village_id", boundaries=gdf)


def test_boundary_no_match_leading_zeros(villages):
    gdf = gpd.GeoDataFrame({"id": [1, 2, 3]}, geometry=[shapely.box(0, 0, 1, 1)] * 3, crs=4326)
    with pytest.raises(TableError, match=r"no record.*matches a boundary.*leading zeros"):
        build_units(villages, id_column="village_id", boundaries=gdf)


def test_boundary_problems(villages):
    gdf = gpd.GeoDataFrame({"code": ["001"]}, geometry=[shapely.box(0, 0, 1, 1)], crs=4326)
    with pytest.raises(TableError, match="boundary id column 'codes'.*Did you mean 'code'"):
        build_units(villages, id_column="village_id", boundaries=gdf, boundary_id="codes")
    pts = gpd.GeoDataFrame({"id": ["001"]}, geometry=[shapely.Point(0, 0)], crs=4326)
    with pytest.raises(TableError, match="1 Point.*Polygon or MultiPolygon"):
        build_units(villages, id_column="village_id", boundaries=pts)
    nocrs = gpd.GeoDataFrame({"id": ["001"]}, geometry=[shapely.box(0, 0, 1, 1)])
    with pytest.raises(TableError, match="no CRS"):
        build_units(villages, id_column="village_id", boundaries=nocrs)


def test_boundary_invalid_and_empty(villages):
    bowtie = shapely.Polygon([(0, 0), (2, 2), (2, 0), (0, 2)])
    gdf = gpd.GeoDataFrame({"id": ["001", "002"]}, geometry=[bowtie, shapely.Polygon()], crs=4326)
    with pytest.warns(GeometryRepairedWarning, match="1 invalid"):
        units = build_units(villages, id_column="village_id", boundaries=gdf)
    assert units.qa == [["geometry_repaired"], ["empty_geometry"], ["no_boundary"]]
    assert_allclose(units.geometry[0].area, 2.0, rtol=1e-12)


# ---------------------------------------------------------------- to_crs, fingerprint


def test_to_crs_matches_direct_transformer(tmp_path):
    text = VILLAGES.replace("002,30.60,-2.20", "002,,")
    units = build_units(
        csv_table(tmp_path, text), id_column="village_id", points=PTS, buffer_m=2000
    )
    moved = units.to_crs("EPSG:32736")
    assert moved[1] is None
    assert units.geometry[1] is None  # the unit set itself is unchanged
    # reference: a pyproj Transformer built directly on the same coordinates
    direct = pyproj.Transformer.from_crs("EPSG:4326", "EPSG:32736", always_xy=True)
    for i in (0, 2):
        src = np.asarray(units.geometry[i].exterior.coords)
        x, y = direct.transform(src[:, 0], src[:, 1])
        assert_array_equal(np.asarray(moved[i].exterior.coords), np.column_stack([x, y]))
    same = units.to_crs("EPSG:4326")
    assert same[0].equals(units.geometry[0]) and same[1] is None


def test_to_crs_caches_one_transformer_per_pair(villages):
    units = build_units(villages, id_column="village_id", points=PTS, buffer_m=2000)
    units.to_crs("EPSG:3857")
    before = _transformer.cache_info()
    units.to_crs("EPSG:3857")
    after = _transformer.cache_info()
    assert after.hits == before.hits + 1
    assert after.misses == before.misses


def test_to_crs_multipolygon_and_points(tmp_path):
    table = csv_table(tmp_path, "id,lon,lat\nE,179.99,-16.5\nW,10,10\n")
    units = build_units(table, id_column="id", points=PTS, buffer_m=3000)
    assert units.geometry[0].geom_type == "MultiPolygon"
    moved = units.to_crs("EPSG:3832")  # a Pacific-centred Mercator
    direct = pyproj.Transformer.from_crs("EPSG:4326", "EPSG:3832", always_xy=True)
    src = shapely.get_coordinates(units.geometry[0])
    x, y = direct.transform(src[:, 0], src[:, 1])
    assert_array_equal(shapely.get_coordinates(moved[0]), np.column_stack([x, y]))
    pts = build_units(table, id_column="id", points=PTS, at_point="nearest").to_crs("EPSG:3857")
    x, y = pyproj.Transformer.from_crs(4326, 3857, always_xy=True).transform(10.0, 10.0)
    assert (pts[1].x, pts[1].y) == (x, y)


def test_fingerprint(villages, tmp_path):
    a = build_units(villages, id_column="village_id", points=PTS, buffer_m=2000)
    b = build_units(villages, id_column="village_id", points=PTS, buffer_m=2000)
    assert a.fingerprint() == b.fingerprint()
    assert len(a.fingerprint()) == 64
    c = build_units(villages, id_column="village_id", points=PTS, buffer_m=2001)
    assert c.fingerprint() != a.fingerprint()
    renamed = csv_table(tmp_path, VILLAGES.replace("003,", "004,"), name="other.csv")
    d = build_units(renamed, id_column="village_id", points=PTS, buffer_m=2000)
    assert d.fingerprint() != a.fingerprint()
    e = build_units(villages, id_column="village_id", points=PTS, at_point="nearest")
    f = build_units(villages, id_column="village_id", points=PTS, at_point="bilinear")
    assert e.fingerprint() != f.fingerprint()


def test_qa_codes_documented():
    assert set(QA_CODES) == {
        "no_location",
        "suspect_location",
        "no_boundary",
        "empty_geometry",
        "geometry_repaired",
    }


def test_to_crs_outside_projection_domain_becomes_none():
    # An orthographic view centred on (0, 0) shows one hemisphere only: pyproj
    # returns inf for a point at 170 E (pyproj Transformer, checked directly).
    ortho = "+proj=ortho +lat_0=0 +lon_0=0"
    direct = pyproj.Transformer.from_crs("EPSG:4326", ortho, always_xy=True)
    assert not np.isfinite(direct.transform(170.0, 0.0)[0])
    units = UnitSet(
        ids=np.array(["far", "near"], dtype=object),
        geometry=np.array([shapely.Point(170, 0), shapely.Point(10, 5)], dtype=object),
        crs=pyproj.CRS("EPSG:4326"),
        kind="point",
        qa=[[], []],
        description="value at each point (nearest)",
        params={"shape": "point", "method": "nearest"},
    )
    moved = units.to_crs(ortho)
    assert moved[0] is None
    assert (moved[1].x, moved[1].y) == direct.transform(10.0, 5.0)


@pytest.mark.parametrize(
    "value, message",
    [
        ("2000", "units.buffer_m is '2000': expected a buffer radius in metres"),
        (True, "units.buffer_m is True: expected a buffer radius in metres"),
        ({"column": "radius_m"}, "give a column of radii as radius_column"),
    ],
)
def test_buffer_m_is_checked_like_the_recipe(villages, value, message):
    # Text and yes/no values were read as numbers before the check was shared.
    with pytest.raises(GeometryError) as info:
        build_units(villages, id_column="village_id", points=PTS, buffer_m=value)
    assert message in str(info.value)
