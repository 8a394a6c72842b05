"""Reading study tables, boundary files and vector summaries.

Demo places (the Orvane valley, its villages and clinics) are invented.
"""

import warnings

import geopandas as gpd
import numpy as np
import pandas as pd
import pyproj
import pytest
import shapely
from numpy.testing import assert_allclose

from covextract.errors import InputFileError, TableError
from covextract.io.tables import (
    column_hint,
    describe_vector,
    ids_as_text,
    read_boundaries,
    read_study_table,
)


def write_text(path, text, encoding="utf-8"):
    path.write_bytes(text.encode(encoding))
    return path


def village_frame():
    return gpd.GeoDataFrame(
        {
            "village_id": [101, 102, 103],
            "name": ["Orvane Ford", "Kessel Hill", "Marrow Bend"],
        },
        geometry=[
            shapely.box(30.0, -2.0, 30.1, -1.9),
            shapely.box(30.1, -2.0, 30.2, -1.9),
            shapely.Point(30.3, -1.95),
        ],
        crs="EPSG:4326",
    )


# ---------------------------------------------------------------- CSV


def test_csv_cells_survive_verbatim(tmp_path):
    path = write_text(
        tmp_path / "clusters.csv",
        "\ufeffcluster_id,status,visit_date,share,blank\n"
        "007,NA,2021-05-17,0.12345678901234567,\n"
        "010, n/a ,2021-06-01,1e-3,\n",
    )
    table = read_study_table(path)
    assert table.format == "csv"
    assert table.path == path
    assert table.geometry is None and table.crs is None
    # the byte-order mark is not part of the first column name
    assert list(table.frame.columns) == ["cluster_id", "status", "visit_date", "share", "blank"]
    assert all(dt == np.dtype(object) for dt in table.frame.dtypes)
    row = table.frame.iloc[0]
    assert row["cluster_id"] == "007"
    assert row["status"] == "NA"
    assert row["visit_date"] == "2021-05-17"
    assert row["share"] == "0.12345678901234567"
    assert row["blank"] == ""
    assert table.frame.iloc[1]["status"] == " n/a "
    assert table.frame.iloc[1]["share"] == "1e-3"
    assert all(type(v) is str for v in table.frame.to_numpy().ravel())
    assert len(table) == 2


def test_missing_file(tmp_path):
    path = tmp_path / "nowhere.csv"
    with pytest.raises(InputFileError, match="nowhere.csv.*does not exist") as info:
        read_study_table(path)
    assert isinstance(info.value, OSError)


def test_unsupported_suffix(tmp_path):
    path = write_text(tmp_path / "villages.xlsx", "x")
    with pytest.raises(InputFileError, match=r"unsupported file type '\.xlsx'.*Supported: \.csv"):
        read_study_table(path)


def test_directory_is_not_a_file(tmp_path):
    folder = tmp_path / "table.csv"
    folder.mkdir()
    with pytest.raises(InputFileError, match="is not a file"):
        read_study_table(folder)


def test_csv_not_utf8(tmp_path):
    path = write_text(tmp_path / "latin.csv", "id,name\n1,Mar\xe9\n", encoding="latin-1")
    with pytest.raises(InputFileError, match="not valid UTF-8"):
        read_study_table(path)


def test_csv_empty(tmp_path):
    path = write_text(tmp_path / "empty.csv", "")
    with pytest.raises(TableError, match="empty"):
        read_study_table(path)


def test_csv_ragged_rows(tmp_path):
    path = write_text(tmp_path / "ragged.csv", "id,x\n1,2\n3,4,5,6\n")
    with pytest.raises(InputFileError, match="cannot be parsed as CSV"):
        read_study_table(path)


def test_csv_duplicate_column_names(tmp_path):
    path = write_text(tmp_path / "dup.csv", "id,lat,lat\n1,2,3\n")
    with pytest.raises(TableError, match="duplicate column names: 'lat'"):
        read_study_table(path)


# ---------------------------------------------------------------- Parquet


def test_parquet_keeps_stored_types(tmp_path):
    path = tmp_path / "clinics.parquet"
    pd.DataFrame({"clinic": [7, 8], "lon": [30.25, 30.5], "opened": ["2019", "2020"]}).to_parquet(
        path
    )
    table = read_study_table(path)
    assert table.format == "parquet"
    assert table.geometry is None
    assert table.frame["clinic"].dtype == np.int64
    assert table.frame["clinic"].tolist() == [7, 8]
    assert_allclose(table.frame["lon"].to_numpy(), [30.25, 30.5], rtol=0, atol=0)


def test_parquet_not_parquet(tmp_path):
    path = write_text(tmp_path / "broken.parquet", "not parquet at all")
    with pytest.raises(InputFileError, match="cannot be read as Parquet"):
        read_study_table(path)


def test_geoparquet_read_as_vector(tmp_path):
    path = tmp_path / "villages.parquet"
    village_frame().to_parquet(path)
    table = read_study_table(path)
    assert table.format == "vector"
    assert list(table.frame.columns) == ["village_id", "name"]
    assert table.crs == pyproj.CRS("EPSG:4326")
    assert table.geometry.iloc[2].equals(shapely.Point(30.3, -1.95))


# ---------------------------------------------------------------- vector


def test_gpkg_read(tmp_path):
    path = tmp_path / "villages.gpkg"
    village_frame().to_file(path, layer="villages")
    table = read_study_table(path)
    assert table.format == "vector"
    assert list(table.frame.columns) == ["village_id", "name"]
    assert table.frame["village_id"].tolist() == [101, 102, 103]
    assert isinstance(table.geometry, gpd.GeoSeries)
    assert table.geometry.index.equals(table.frame.index)
    assert table.crs == pyproj.CRS("EPSG:4326")
    assert table.geometry.iloc[0].equals(shapely.box(30.0, -2.0, 30.1, -1.9))


def test_gpkg_layers(tmp_path):
    path = tmp_path / "valley.gpkg"
    village_frame().to_file(path, layer="villages")
    village_frame().iloc[:1].to_file(path, layer="clinics")
    with pytest.raises(TableError, match="2 layers.*'villages'.*'clinics'.*layer:"):
        read_study_table(path)
    assert len(read_study_table(path, layer="clinics")) == 1
    with pytest.raises(InputFileError, match="no layer 'wells'"):
        read_study_table(path, layer="wells")


def test_geojson_read(tmp_path):
    path = tmp_path / "villages.geojson"
    village_frame().to_file(path, driver="GeoJSON")
    table = read_study_table(path)
    assert table.format == "vector"
    assert len(table) == 3
    assert table.crs == pyproj.CRS("EPSG:4326")


def test_vector_without_crs(tmp_path):
    path = tmp_path / "nocrs.shp"
    frame = village_frame().iloc[:2].set_crs(None, allow_override=True)
    with warnings.catch_warnings():
        # the writer's own note that no CRS is given (a UserWarning of pyogrio)
        warnings.simplefilter("ignore", UserWarning)
        frame.to_file(path)
    with pytest.raises(TableError, match="no CRS.*set_crs"):
        read_study_table(path)


def test_vector_unreadable(tmp_path):
    path = write_text(tmp_path / "broken.gpkg", "this is not a geopackage")
    with pytest.raises(InputFileError, match="broken.gpkg"):
        read_study_table(path)


# ---------------------------------------------------------------- boundaries


def test_read_boundaries_ids_as_text(tmp_path):
    path = tmp_path / "areas.gpkg"
    village_frame().iloc[:2].to_file(path)
    gdf = read_boundaries(path, id_column="village_id")
    assert list(gdf.columns) == ["id", "geometry"]
    assert gdf["id"].tolist() == ["101", "102"]
    assert all(type(v) is str for v in gdf["id"])
    assert gdf.crs == pyproj.CRS("EPSG:4326")
    assert gdf.attrs["source"] == "areas.gpkg"


def test_read_boundaries_errors(tmp_path):
    path = tmp_path / "areas.gpkg"
    frame = village_frame().iloc[:2]
    frame.to_file(path)
    with pytest.raises(TableError, match="no id column 'village'.*Did you mean 'village_id'"):
        read_boundaries(path, id_column="village")
    dup = tmp_path / "dup.gpkg"
    frame.assign(village_id=[5, 5]).to_file(dup)
    with pytest.raises(TableError, match=r"occur more than once: '5'.*dissolve"):
        read_boundaries(dup, id_column="village_id")
    table_only = tmp_path / "plain.csv"
    write_text(table_only, "village_id\n1\n")
    with pytest.raises(TableError, match="holds no geometries"):
        read_boundaries(table_only, id_column="village_id")


# ---------------------------------------------------------------- describe


def test_describe_vector(tmp_path):
    path = tmp_path / "valley.gpkg"
    frame = village_frame()
    frame.to_file(path, layer="villages")
    frame.iloc[:1].to_file(path, layer="clinics")
    info = describe_vector(path, layer="villages")
    assert info["layer"] == "villages"
    assert info["layers"] == ["villages", "clinics"]
    assert info["feature_count"] == 3
    assert info["columns"] == {"village_id": "int64", "name": "object"}
    assert info["geometry_types"] == {"Polygon": 2, "Point": 1}
    assert info["crs"] == "EPSG:4326"
    # bounds worked out by hand from the three features
    assert_allclose(info["bounds"], (30.0, -2.0, 30.3, -1.9), rtol=0, atol=1e-12)
    first = describe_vector(path)
    assert first["layer"] == "villages"
    with pytest.raises(InputFileError, match="not a vector file"):
        describe_vector(write_text(tmp_path / "t.csv", "a\n1\n"))


# ---------------------------------------------------------------- helpers


def test_ids_as_text():
    text, missing = ids_as_text(["007", 7, np.int64(8), 9.0, 2.5, None, np.nan, "  ", pd.NA])
    assert text.tolist() == ["007", "7", "8", "9", "2.5", "", "", "  ", ""]
    assert missing.tolist() == [False, False, False, False, False, True, True, True, True]


def test_column_hint():
    hint = column_hint("Village_ID", ["village_id", "lat", "lon"])
    assert "Available columns: 'village_id', 'lat', 'lon'." in hint
    assert "Did you mean 'village_id'?" in hint
    assert "semicolon" in column_hint("id", ["id;lat;lon"])
