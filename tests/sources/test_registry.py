"""The registry of layer sources: which kind opens a spec, what it reads, how it says so.

The layers are the demo scenario's files (covextract/demo/data, described in
demo_data/README.md), copied into a recipe folder under tmp_path so the
expected paths, roles and sentences can be written out in full here. The
monthly rainfall series is copied without June 2020 to give it one gap.
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_array_equal

from covextract.errors import RasterError, RecipeError
from covextract.io.rasters import RasterSource
from covextract.io.series import SeriesIndex
from covextract.recipe.layers import Layer
from covextract.sources.bandmath import BandMathSource, ClippedSource
from covextract.sources.base import LayerSource, SourceKind, shown_path
from covextract.sources.registry import KINDS, kind_of, open_source

DEMO = Path(__file__).resolve().parents[2] / "covextract" / "demo" / "data"


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    """A recipe folder: rasters/ holds demo files, rain/ the series without 2020-06."""
    base = tmp_path_factory.mktemp("recipe")
    rasters = base / "rasters"
    rasters.mkdir()
    for name in ("ndvi_2021.tif", "red_2021.tif", "nir_2021.tif", "rain_2019_2021.nc"):
        shutil.copy(DEMO / name, rasters / name)
    (base / "rain").mkdir()
    for path in sorted((DEMO / "rain").glob("rain_*.tif")):
        if path.name != "rain_202006.tif":
            shutil.copy(path, base / "rain" / path.name)
    return base


def opened(folder: Path, name: str, **spec) -> LayerSource:
    def resolve(text):
        path = Path(text).expanduser()
        return Path(os.path.abspath(path if path.is_absolute() else folder / path))

    return open_source(name, Layer(**spec), resolve=resolve, base_dir=folder)


FILE = {"file": "rasters/ndvi_2021.tif", "scale": 0.0001, "nodata": -3000}
BANDS = {
    "bands": {
        "red": {"file": "rasters/red_2021.tif", "scale": 0.0001},
        "nir": {"file": "rasters/nir_2021.tif", "scale": 0.0001},
    },
    "index": "ndvi",
}
TEMPLATE = {"file": "rain/rain_{year}{month:02d}.tif", "every": "month"}
CUBE = {"file": "rasters/rain_2019_2021.nc", "variable": "precip"}


# ------------------------------------------------------------------ which kind
@pytest.mark.parametrize(
    ("spec", "kind"),
    [
        (FILE, "file"),
        (BANDS, "band math"),
        ({**BANDS, "index": None, "expression": "nir - red"}, "band math"),
        (TEMPLATE, "template series"),
        (CUBE, "NetCDF cube"),
        # a cube's every: only fills in missing time bounds; it stays a cube
        ({**CUBE, "every": "month"}, "NetCDF cube"),
    ],
)
def test_each_spec_is_opened_by_its_one_kind(spec, kind):
    assert kind_of("x", Layer(**spec)).name == kind
    assert sum(k.matches(Layer(**spec)) for k in KINDS) == 1


def test_every_registered_kind_implements_the_protocol():
    assert [k.name for k in KINDS] == ["file", "band math", "template series", "NetCDF cube"]
    assert all(isinstance(k, SourceKind) for k in KINDS)


def test_a_layer_no_kind_reads_is_an_error_naming_it():
    # The schema refuses such a layer; a spec built around it (a future key)
    # must still fail with the layer's name, not deep inside a reader.
    layer = Layer.model_construct()
    with pytest.raises(RecipeError) as info:
        open_source("rain", layer, resolve=Path, base_dir=".")
    assert str(info.value) == (
        "layers.rain: layer 'rain' names no source covextract can read: give file: (one "
        "raster, or a path template with date fields and every: for a series), file: with "
        "variable: (a NetCDF cube), or bands: with index: or expression: (band math)"
    )
    assert info.value.problems[0].key == "layers.rain"


# ------------------------------------------------------------- what is opened
def test_file_opens_one_raster_source(folder):
    layer = opened(folder, "ndvi", **FILE)
    assert not layer.is_series
    assert isinstance(layer.source, RasterSource)
    assert layer.source.scale == 0.0001
    assert layer.input_files() == [("layer:ndvi", folder / "rasters" / "ndvi_2021.tif")]
    assert layer.describe() == "file rasters/ndvi_2021.tif, band 1"


def test_band_math_opens_the_index_and_clips_when_asked(folder):
    layer = opened(folder, "green", **BANDS)
    assert isinstance(layer.source, BandMathSource)
    assert layer.input_files() == [
        ("layer:green.red", folder / "rasters" / "red_2021.tif"),
        ("layer:green.nir", folder / "rasters" / "nir_2021.tif"),
    ]
    assert layer.describe() == (
        "band math ndvi from bands red (rasters/red_2021.tif band 1) and "
        "nir (rasters/nir_2021.tif band 1)"
    )
    clipped = opened(folder, "green", **BANDS, valid_range=[0.0, 0.5])
    assert isinstance(clipped.source, ClippedSource)
    window = (0, 0, 4, 4)
    raw, raw_ok = layer.source.to_values(layer.source.read_block(window))
    values, ok = clipped.source.to_values(clipped.source.read_block(window))
    # the same index, valid only where it lies in [0, 0.5]
    assert_array_equal(ok, raw_ok & (raw >= 0.0) & (raw <= 0.5))
    assert_array_equal(values[ok], raw[ok])


def test_band_math_with_an_expression_names_it(folder):
    spec = {**BANDS, "index": None, "expression": "nir - red"}
    assert opened(folder, "diff", **spec).describe() == (
        "band math nir - red from bands red (rasters/red_2021.tif band 1) and "
        "nir (rasters/nir_2021.tif band 1)"
    )


def test_template_series_with_a_gap(folder):
    layer = opened(folder, "rain", **TEMPLATE)
    assert layer.is_series
    s = layer.source
    assert isinstance(s, SeriesIndex)
    assert [g.label for g in s.gaps] == ["2020-06"]
    files = layer.input_files()
    assert len(files) == 35
    assert files[:2] == [
        ("layer:rain:2019-01", folder / "rain" / "rain_201901.tif"),
        ("layer:rain:2019-02", folder / "rain" / "rain_201902.tif"),
    ]
    assert files[16:18] == [
        ("layer:rain:2020-05", folder / "rain" / "rain_202005.tif"),
        ("layer:rain:2020-07", folder / "rain" / "rain_202007.tif"),
    ]
    assert files[-1] == ("layer:rain:2021-12", folder / "rain" / "rain_202112.tif")
    assert layer.describe() == (
        "35 monthly files rain/rain_{year}{month:02d}.tif, 2019-01 to 2021-12, 1 gap (2020-06)"
    )


def test_template_series_without_gaps_says_zero(tmp_path):
    (tmp_path / "rasters").mkdir()
    for month in ("202101", "202102", "202103"):
        shutil.copy(DEMO / "rain" / f"rain_{month}.tif", tmp_path / "rasters" / f"r_{month}.tif")
    layer = opened(tmp_path, "rain", file="rasters/r_{year}{month:02d}.tif", every="month", band=1)
    assert layer.describe() == (
        "3 monthly files rasters/r_{year}{month:02d}.tif, 2021-01 to 2021-03, 0 gaps"
    )


def test_netcdf_cube(folder):
    layer = opened(folder, "rain", **CUBE)
    assert layer.is_series
    s = layer.source
    assert len(s.periods) == 36 and not s.gaps
    cube = folder / "rasters" / "rain_2019_2021.nc"
    files = layer.input_files()
    assert files[0] == ("layer:rain:2019-01", cube)
    assert files[-1] == ("layer:rain:2021-12", cube)
    assert [role for role, _ in files][11:13] == ["layer:rain:2019-12", "layer:rain:2020-01"]
    assert {path for _, path in files} == {cube}
    assert layer.describe() == (
        "NetCDF cube rasters/rain_2019_2021.nc, variable precip, 36 monthly steps "
        "2019-01 to 2021-12"
    )


def test_cube_and_template_series_read_the_same_month(folder):
    # The demo's cube holds the monthly GeoTIFFs' values (demo_data/README.md).
    cube = opened(folder, "rain", **CUBE).source.source("2021-03")
    tif = opened(folder, "rain", **TEMPLATE).source.source("2021-03")
    window = (0, 0, 8, 8)
    cv, cm = cube.to_values(cube.read_block(window))
    tv, tm = tif.to_values(tif.read_block(window))
    assert_array_equal(cm, tm)
    np.testing.assert_allclose(cv[cm], tv[tm], rtol=1e-6)


def test_reader_errors_pass_through(folder):
    with pytest.raises(RasterError, match="variable 'rain'"):
        opened(folder, "rain", file="rasters/rain_2019_2021.nc", variable="rain")


# ---------------------------------------------------------------- paths shown
@pytest.mark.parametrize(
    ("text", "shown"),
    [
        ("rasters/ndvi.tif", "rasters/ndvi.tif"),
        ("./rasters/../rasters/ndvi.tif", "rasters/ndvi.tif"),
        ("../shared/ndvi.tif", "ndvi.tif"),  # relative but outside: no folder names
        ("{base}/rasters/ndvi.tif", "rasters/ndvi.tif"),  # absolute, inside the folder
        ("/data/private/alice/ndvi.tif", "ndvi.tif"),  # absolute, outside: name only
    ],
)
def test_shown_path_never_shows_folders_outside_the_recipe(tmp_path, text, shown):
    assert shown_path(text.replace("{base}", str(tmp_path)), tmp_path) == shown


def test_absolute_file_inside_the_recipe_folder_is_described_relative(folder):
    spec = {**FILE, "file": str(folder / "rasters" / "ndvi_2021.tif")}
    layer = opened(folder, "ndvi", **spec)
    assert layer.describe() == "file rasters/ndvi_2021.tif, band 1"
    assert layer.input_files() == [("layer:ndvi", folder / "rasters" / "ndvi_2021.tif")]
