"""Reliability catalogue: bad inputs (rasters, tables, geometries, dates, state, scheduler).

Each case breaks one input of the invented demo scenario and checks, through
the harness of ``conftest.py``, the exact message, the exit code, that no
traceback was printed and that no file changed. Most cases use a one-covariate
recipe (:func:`small`) so they stay quick.
"""

from __future__ import annotations

import os
import socket
import threading
import warnings

import geopandas as gpd
import numpy as np
import pytest
import rasterio
import shapely
from affine import Affine

LOOK_RIGHT = "recipe and inputs look right; nothing was computed."


def small(scenario, **layer):
    """The scenario reduced to one covariate (mean surface temperature) on one layer."""
    spec = dict(scenario.data["layers"]["surface_temp"])
    spec.update(layer)
    scenario.data["layers"] = {"surface_temp": spec}
    scenario.data["covariates"] = [{"layer": "surface_temp", "stats": ["mean"]}]
    return scenario.write_recipe()


def lat_lon_raster(path, data, transform, crs="EPSG:4326"):
    """A one-band GeoTIFF (``crs=None``: without a CRS)."""
    kwargs = dict(
        driver="GTiff",
        width=data.shape[1],
        height=data.shape[0],
        count=1,
        dtype=data.dtype,
        transform=transform,
    )
    if crs is not None:
        kwargs["crs"] = crs
    with rasterio.open(path, "w", **kwargs) as ds:
        ds.write(data, 1)
    return path


def edit_cell(scenario, column, value, row=0):
    """Set one cell of villages.csv (``row`` counted from 0 below the header)."""
    path = scenario.folder / "villages.csv"
    lines = path.read_text(encoding="utf-8").splitlines()
    header = lines[0].split(",")
    cells = lines[1 + row].split(",")
    cells[header.index(column)] = value
    lines[1 + row] = ",".join(cells)
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")


def where(scenario, line, key):
    """The location prefix ``check`` prints for a recipe key."""
    return f"{scenario.recipe}:{line} {key}: "


# ------------------------------------------------------------------ rasters
def test_zero_byte_raster(scenario):
    small(scenario)
    tif = scenario.folder / "surface_temp_2021.tif"
    tif.write_bytes(b"")
    scenario.expect(
        ["check", scenario.recipe],
        code=1,
        message=f"raster of layer 'surface_temp' {tif} is empty (0 bytes): an interrupted "
        "download or copy? Fetch or copy the file again.",
    )


def test_truncated_raster(scenario):
    small(scenario)
    tif = scenario.folder / "surface_temp_2021.tif"
    tif.write_bytes(tif.read_bytes()[:2000])
    scenario.expect(
        ["check", scenario.recipe],
        code=1,
        message=f"raster of layer 'surface_temp' {tif} cannot be opened as a raster",
    )


def test_text_saved_as_tif(scenario):
    small(scenario)
    tif = scenario.folder / "surface_temp_2021.tif"
    tif.write_text("station,rain\nA,12\n", encoding="utf-8")
    scenario.expect(
        ["check", scenario.recipe],
        code=1,
        message=f"raster of layer 'surface_temp' {tif} cannot be opened as a raster ('{tif}' "
        "not recognized as being in a supported file format.). Is it a GeoTIFF or another "
        "format GDAL reads?",
    )


def test_raster_without_crs(scenario):
    tif = lat_lon_raster(
        scenario.folder / "nocrs.tif",
        np.ones((50, 50), "f4"),
        Affine(0.05, 0, 4.0, 0, -0.05, -11.0),
        crs=None,
    )
    small(scenario, file="nocrs.tif")
    scenario.expect(
        ["check", scenario.recipe],
        code=1,
        message=f"raster of layer 'surface_temp' {tif} has no CRS, so units cannot be placed "
        'on it. Add crs: (for example crs: "EPSG:4326") to the layer in the recipe, or fix '
        "the file.",
    )


def test_rotated_grid(scenario):
    tif = lat_lon_raster(
        scenario.folder / "rotated.tif",
        np.ones((50, 50), "f4"),
        Affine(0.05, 0.01, 4.0, 0.01, -0.05, -11.0),
    )
    small(scenario, file="rotated.tif")
    scenario.expect(
        ["check", scenario.recipe],
        code=1,
        message=f"raster of layer 'surface_temp' {tif} has a rotated or sheared grid, which "
        "covextract does not support. Warp it to a north-up grid first (gdalwarp).",
    )


def test_south_up_grid_is_accepted(scenario):
    # A south-up grid (positive row step) is a plain axis flip: accepted.
    lat_lon_raster(
        scenario.folder / "south_up.tif",
        np.full((50, 50), 300.0, "f4"),
        Affine(0.05, 0, 4.0, 0, 0.05, -13.5),
    )
    small(scenario, file="south_up.tif")
    scenario.expect(["check", scenario.recipe], code=0, message=LOOK_RIGHT)


def test_non_square_pixels_are_accepted(scenario):
    # Pixels of 0.025 by 0.05 degrees: coverage is computed per pixel, any shape.
    lat_lon_raster(
        scenario.folder / "non_square.tif",
        np.full((50, 100), 300.0, "f4"),
        Affine(0.025, 0, 4.0, 0, -0.05, -11.0),
    )
    small(scenario, file="non_square.tif")
    scenario.expect(["check", scenario.recipe], code=0, message=LOOK_RIGHT)


def test_all_units_outside_the_raster(scenario):
    lat_lon_raster(
        scenario.folder / "elsewhere.tif",
        np.ones((50, 50), "f4"),
        Affine(0.05, 0, 40.0, 0, -0.05, 11.0),
    )
    small(scenario, file="elsewhere.tif")
    scenario.expect(
        ["check", scenario.recipe],
        code=1,
        message="covariates[0].layer: no unit overlaps layer 'surface_temp' (grid bounds "
        "(40.0, 8.5, 42.5, 11.0) in EPSG:4326); check the layer file and the study's CRS",
    )


def test_raster_symlink_loop(scenario):
    os.symlink(scenario.folder / "loop_b.tif", scenario.folder / "loop_a.tif")
    os.symlink(scenario.folder / "loop_a.tif", scenario.folder / "loop_b.tif")
    small(scenario, file="loop_a.tif")
    scenario.expect(
        ["check", scenario.recipe],
        code=1,
        message=f"raster of layer 'surface_temp' {scenario.folder / 'loop_a.tif'} is a symlink "
        "loop (the link leads back to itself). Point the link at the real file, or name the "
        "file itself in the recipe.",
    )


# ------------------------------------------------------------ study table
def test_nan_coordinates(scenario):
    small(scenario)
    edit_cell(scenario, "lon", "NaN")
    scenario.expect(
        ["check", scenario.recipe],
        code=1,
        message="units: column 'lon' of villages.csv has 1 coordinate value(s) that are not "
        "numbers: row 1 (id '003'): 'NaN' (digits shown as #). Give plain decimal numbers, "
        "and leave the cell empty for a record without one.",
    )


def test_decimal_comma_names_the_row_not_the_coordinate(scenario):
    small(scenario)
    edit_cell(scenario, "lat", '"-11,696279"')
    result = scenario.expect(
        ["check", scenario.recipe],
        code=1,
        message="row 1 (id '003'): '-##,######' (digits shown as #). Use a dot as the decimal "
        "separator (12.5, not 12,5).",
    )
    assert "696279" not in result.stdout + (result.stderr or "")


def test_empty_coordinates_are_a_qa_code_not_an_error(scenario):
    small(scenario)
    edit_cell(scenario, "lon", "")
    scenario.expect(["check", scenario.recipe], code=0, message=LOOK_RIGHT)


def test_latitude_95(scenario):
    small(scenario)
    edit_cell(scenario, "lat", "95")
    result = scenario.expect(
        ["check", scenario.recipe],
        code=1,
        message="units: 1 record(s) of villages.csv have coordinates outside the range of "
        "WGS 84 (longitude -180..180, latitude -90..90): row 1 (id '003'): latitude out of "
        "range.",
    )
    assert "4.63" not in result.stdout + (result.stderr or "")  # the record's longitude


def test_longitude_200(scenario):
    small(scenario)
    edit_cell(scenario, "lon", "200")
    result = scenario.expect(
        ["check", scenario.recipe],
        code=1,
        message="row 1 (id '003'): longitude out of range. Longitudes look like 0..360: "
        "subtract 360 from those above 180.",
    )
    assert "11.69" not in result.stdout + (result.stderr or "")  # the record's latitude


def test_duplicate_ids(scenario):
    small(scenario)
    edit_cell(scenario, "village_id", "008")
    scenario.expect(
        ["check", scenario.recipe],
        code=1,
        message="units: 1 id(s) in column 'village_id' of villages.csv occur more than once: "
        "'008' (rows 1, 2). Ids must be unique: one record per unit.",
    )


def test_empty_id(scenario):
    small(scenario)
    edit_cell(scenario, "village_id", "")
    scenario.expect(
        ["check", scenario.recipe],
        code=1,
        message="units: 1 record(s) of villages.csv have no id in column 'village_id': row 1. "
        "Every record needs a unique id: fill them in or remove those rows.",
    )


def test_zero_byte_table(scenario):
    small(scenario)
    (scenario.folder / "villages.csv").write_bytes(b"")
    scenario.expect(
        ["check", scenario.recipe],
        code=1,
        message=f"study.table: study table '{scenario.folder / 'villages.csv'}' is empty: it "
        "has no header row. Give a CSV with a header row and one row per record.",
    )


def test_header_only_table(scenario):
    small(scenario)
    path = scenario.folder / "villages.csv"
    path.write_text(path.read_text(encoding="utf-8").splitlines()[0] + "\n", encoding="utf-8")
    message = (
        "the study table villages.csv has a header but no rows; nothing to compute. Add one "
        "row per record (or check that the right file is named)."
    )
    scenario.expect(["check", scenario.recipe], code=1, message=message)
    scenario.expect(["run", scenario.recipe], code=1, message=message)


def test_table_symlink_loop(scenario):
    os.symlink(scenario.folder / "loop_b.csv", scenario.folder / "loop_a.csv")
    os.symlink(scenario.folder / "loop_a.csv", scenario.folder / "loop_b.csv")
    scenario.data["study"]["table"] = "loop_a.csv"
    small(scenario)
    scenario.expect(
        ["check", scenario.recipe],
        code=1,
        message=f"study table '{scenario.folder / 'loop_a.csv'}' is a symlink loop (the link "
        "leads back to itself).",
    )


# ------------------------------------------------------------ confidentiality
def test_shared_table_keeping_coordinates_gets_a_warning(scenario):
    small(scenario)
    scenario.data["output"]["drop"] = []
    scenario.write_recipe()
    with warnings.catch_warnings():
        warnings.simplefilter("always")
        scenario.expect(
            ["check", scenario.recipe],
            code=0,
            message="warning (CoordinatesKeptWarning): output.table villages_covariates.csv "
            "keeps the exact coordinate column(s) lon, lat (study.points): anyone the table is "
            "shared with can place every record. Add output: {drop: [lon, lat]} to leave them "
            "out, or set output: {keep_coordinates: true} if the outputs stay with the study "
            "data.",
        )


def test_keep_coordinates_silences_the_warning(scenario):
    small(scenario)
    scenario.data["output"]["drop"] = []
    scenario.data["output"]["keep_coordinates"] = True
    scenario.write_recipe()
    # The test run turns covextract's warnings into errors: a warning would fail here.
    scenario.expect(["check", scenario.recipe], code=0, message=LOOK_RIGHT)


# ------------------------------------------------------------ boundaries
def boundaries(scenario, edit):
    """Units from village_areas.gpkg after ``edit(gdf) -> gdf``."""
    path = scenario.folder / "village_areas.gpkg"
    gdf = gpd.read_file(path)
    gdf = edit(gdf)
    path.unlink()
    gdf.to_file(path, driver="GPKG")
    scenario.data["units"] = {"boundaries": {"file": "village_areas.gpkg", "id": "village_id"}}
    return small(scenario)


def test_boundary_ids_without_leading_zeros(scenario):
    def strip(gdf):
        # A spreadsheet dropped the zeros of "003" (ids of 100 and above would still match).
        gdf = gdf[gdf["village_id"].str.startswith("0")].copy()
        gdf["village_id"] = gdf["village_id"].str.lstrip("0")
        return gdf

    boundaries(scenario, strip)
    scenario.expect(
        ["check", scenario.recipe],
        code=1,
        message="units: no record of villages.csv matches a boundary: ids in 'village_id' look "
        "like '003', '008', '010', ids in 'id' of village_areas.gpkg look like '70', '19', '13'. "
        "Some ids differ only by leading zeros: the two columns must hold the same text (a "
        "spreadsheet may have dropped the zeros). Check study.id and units.boundaries.id.",
    )


def test_boundary_file_with_no_features(scenario):
    boundaries(scenario, lambda gdf: gdf.iloc[:0])
    scenario.expect(
        ["check", scenario.recipe],
        code=1,
        message="units: the boundary file village_areas.gpkg has no records (no rows or "
        "features); nothing to use. Check that the right file (and layer) is named.",
    )


def test_mixed_geometry_types(scenario):
    def mix(gdf):
        gdf.loc[0, "geometry"] = gdf.geometry.iloc[0].centroid
        return gdf

    boundaries(scenario, mix)
    scenario.expect(
        ["check", scenario.recipe],
        code=1,
        message="units: village_areas.gpkg holds 1 Point, 39 Polygon; units need Polygon or "
        "MultiPolygon geometries. Give a boundary file of polygons (points need units.buffer_m "
        "or units.at_point).",
    )


def test_null_geometry(scenario):
    # A record without a geometry gets QA no_location at run time; check accepts it.
    def null(gdf):
        gdf.loc[0, "geometry"] = None
        return gdf

    boundaries(scenario, null)
    with warnings.catch_warnings():
        warnings.simplefilter("always")
        scenario.expect(["check", scenario.recipe], code=0, message=LOOK_RIGHT)


def test_empty_geometry(scenario):
    # An empty polygon gets QA empty_geometry at run time; check accepts it.
    def empty(gdf):
        gdf.loc[0, "geometry"] = shapely.Polygon()
        return gdf

    boundaries(scenario, empty)
    with warnings.catch_warnings():
        warnings.simplefilter("always")
        scenario.expect(["check", scenario.recipe], code=0, message=LOOK_RIGHT)


def test_self_intersecting_polygon(scenario):
    def bowtie(gdf):
        x0, y0, x1, y1 = gdf.geometry.iloc[0].bounds
        gdf.loc[0, "geometry"] = shapely.Polygon([(x0, y0), (x1, y1), (x1, y0), (x0, y1)])
        return gdf

    boundaries(scenario, bowtie)
    with warnings.catch_warnings():
        warnings.simplefilter("always")
        scenario.expect(
            ["check", scenario.recipe],
            code=0,
            message="warning (GeometryRepairedWarning): 1 invalid polygon(s) in village_areas.gpkg "
            "were repaired with shapely make_valid, keeping their polygonal parts: row 23 (id "
            "'070'). Check them in a GIS if the results look wrong (QA 'geometry_repaired').",
        )


# ------------------------------------------------------------ dates
def window(scenario):
    """A rain window before each visit date: rain_mean_sum3m_lag1."""
    scenario.data["layers"] = {
        "rain": {"file": "rain/rain_{year}{month:02d}.tif", "every": "month", "unit": "mm"}
    }
    scenario.data["covariates"] = [
        {
            "layer": "rain",
            "stats": ["mean"],
            "before": {"months": 3, "lag_months": 1, "combine": "sum"},
        }
    ]
    return scenario.write_recipe()


def test_odd_date_format(scenario):
    window(scenario)
    edit_cell(scenario, "visit_date", "14/01/2021")
    scenario.expect(
        ["check", scenario.recipe],
        code=1,
        message="study.date: column 'visit_date' mixes date formats: most cells are YYYY-MM-DD "
        "but row 1 ('14/01/2021') are not. State the format with study: {date_format: "
        "'%d/%m/%Y'} (strftime codes), or fix those cells.",
    )


def test_date_column_missing(scenario):
    scenario.data["study"]["date"] = "visit_day"
    window(scenario)
    scenario.expect(
        ["check", scenario.recipe],
        code=1,
        message="study.date: column 'visit_day' is not in the study table (columns: village_id, "
        "village_name, lon, lat, settlement, buffer_radius_m, visit_date, households, notes). "
        "Did you mean 'visit_date'?",
    )


def test_all_dates_missing_warns_and_runs(scenario):
    window(scenario)
    path = scenario.folder / "villages.csv"
    lines = path.read_text(encoding="utf-8").splitlines()
    col = lines[0].split(",").index("visit_date")
    rows = [lines[0]]
    for line in lines[1:]:
        cells = line.split(",")
        cells[col] = ""
        rows.append(",".join(cells))
    path.write_text("\n".join(rows) + "\n", encoding="utf-8")
    with warnings.catch_warnings():
        warnings.simplefilter("always")
        scenario.expect(
            ["run", scenario.recipe],
            code=0,
            message="warning (EmptyCovariateWarning): covariate 1 (layer rain): every value of "
            "rain_mean_sum3m_lag1 is missing; most common reason: no_date (40 of 40 records): "
            "the record has no date, or one that cannot be read; no window. Check the inputs "
            "before using this column.",
            changed=True,
        )


# ------------------------------------------------------------ state folder
def ran(scenario):
    """The small recipe, run once so the state folder holds a ledger and pieces."""
    small(scenario)
    scenario.expect(["run", scenario.recipe], code=0, message="table:", changed=True)
    return scenario.folder / ".covextract-state"


def test_corrupt_ledger(scenario):
    state = ran(scenario)
    (state / "ledger.sqlite").write_bytes(b"not a database" * 100)
    with warnings.catch_warnings():
        warnings.simplefilter("always")
        # The ledger is rebuilt from the pieces (the broken file kept aside): exit 0.
        scenario.expect(
            ["run", scenario.recipe],
            code=0,
            message=f"warning (LedgerRebuiltWarning): the ledger {state / 'ledger.sqlite'} was "
            "unreadable (LedgerCorruptError); it was rebuilt from 1 piece file(s) in the state "
            "folder and the broken file kept as ledger.sqlite.broken-",
            changed=True,
        )


def test_state_path_that_is_a_file(scenario):
    small(scenario)
    (scenario.folder / "state_file").write_text("x", encoding="utf-8")
    scenario.data["output"]["state"] = "state_file"
    scenario.write_recipe()
    scenario.expect(
        ["run", scenario.recipe],
        code=1,
        # the output guard answers before anything is created
        message="error: output.state is state_file, which is a file; output.state is a folder: "
        "give a folder name",
    )


def test_lock_that_is_a_folder(scenario):
    state = ran(scenario)
    lock = state / "refresh.lock"
    if lock.exists():
        lock.unlink()
    lock.mkdir()
    scenario.expect(
        ["run", scenario.recipe],
        code=1,
        message=f"error: cannot create the lock file {state / 'refresh.lock'}: [Errno 21] Is a "
        "directory:",
    )


# ------------------------------------------------------------ scheduler
@pytest.fixture
def not_a_scheduler():
    """A TCP server on 127.0.0.1 that answers every connection with an HTTP reply."""
    server = socket.socket()
    server.bind(("127.0.0.1", 0))
    server.listen(8)
    open_conns = []

    def serve():
        while True:
            try:
                conn, _ = server.accept()
            except OSError:
                return
            open_conns.append(conn)  # kept open: the client must not wait for a close
            conn.sendall(b"HTTP/1.1 200 OK\r\nContent-Length: 5\r\n\r\nhello")

    threading.Thread(target=serve, daemon=True).start()
    yield f"tcp://127.0.0.1:{server.getsockname()[1]}"
    server.close()
    for c in open_conns:
        c.close()


def test_scheduler_speaking_another_protocol(scenario, not_a_scheduler):
    import time

    small(scenario)
    start = time.monotonic()
    scenario.expect(
        ["run", scenario.recipe, "--scheduler", not_a_scheduler],
        code=1,
        message=f"error: could not connect to the dask scheduler at {not_a_scheduler} within 5 s: "
        "it did not answer as a dask scheduler (its first bytes b'HTTP/1.1' are not a dask "
        "handshake). Check the address and port (a dask scheduler listens on tcp://HOST:8786 "
        "by default; 8787 is its dashboard), or run without --scheduler to use local threads.",
        # The run opens its state folder (an empty ledger) before connecting: left to the
        # issue's "check before computing" work, so the case allows that change.
        changed=True,
    )
    assert time.monotonic() - start < 15
