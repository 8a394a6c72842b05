"""Shared fixtures: the demo scenario copied to a temporary folder, recipe writers, tiny rasters.

Everything in the demo data is invented (see ``demo_data/README.md``). The
fixtures copy it so that tests can write outputs and caches next to it
without touching the repository.
"""

from __future__ import annotations

import copy
import os
from pathlib import Path

import numpy as np
import pytest
import rasterio
import yaml
from affine import Affine

from covextract.demo import demo_data_folder, lay_out_demo


@pytest.fixture(scope="session")
def demo_recipe_data() -> dict:
    """The packaged demo recipe as plain data (paths relative to the demo folder)."""
    return yaml.safe_load((demo_data_folder() / "recipe.yaml").read_text(encoding="utf-8"))


@pytest.fixture
def demo_dir(tmp_path) -> Path:
    """A fresh copy of the demo scenario (recipe, tables, rasters) in ``tmp_path/demo``."""
    return lay_out_demo(tmp_path / "demo")


@pytest.fixture
def write_recipe():
    """Return ``write(folder, data, name="test_recipe.yaml") -> Path`` writing a recipe as YAML.

    The default name leaves the demo's own ``recipe.yaml`` untouched. Test
    outputs are never shared, so ``output.keep_coordinates`` is set to true
    unless the test sets it (tests of the coordinates warning set it false or
    use the reliability harness).
    """

    def write(folder, data: dict, name: str = "test_recipe.yaml") -> Path:
        if isinstance(data, dict) and isinstance(data.get("output"), dict):
            data = {**data, "output": {"keep_coordinates": True, **data["output"]}}
        path = Path(folder) / name
        path.write_text(yaml.safe_dump(data, sort_keys=False), encoding="utf-8")
        return path

    return write


@pytest.fixture
def ndvi_recipe(demo_recipe_data):
    """Return ``make(**changes) -> dict``: the demo recipe reduced to its NDVI layer.

    One covariate (``ndvi``: mean, valid_share) over 2 km buffers, output to
    ``out/table.csv`` without the coordinate columns. Keyword arguments replace
    top-level blocks (``study=...``, ``covariates=...``, ``output=...``).
    """

    def make(**changes) -> dict:
        data = copy.deepcopy(demo_recipe_data)
        data["layers"] = {"ndvi": data["layers"]["ndvi"]}
        data["covariates"] = [{"layer": "ndvi", "stats": ["mean", "valid_share"]}]
        data["output"] = {"table": "out/table.csv", "drop": ["lat", "lon"]}
        data.update(copy.deepcopy(changes))
        return data

    return make


@pytest.fixture
def make_raster():
    """Return ``make(path, data, transform, crs=..., nodata=None) -> Path`` writing a GeoTIFF.

    ``crs=None`` writes a file without a CRS. Blocks are 16 x 16 pixels.
    """

    def make(path, data, transform=None, crs="EPSG:32731", nodata=None) -> Path:
        if transform is None:  # 100 m pixels in UTM zone 31 south
            transform = Affine(100.0, 0, 500_000.0, 0, -100.0, 8_700_000.0)
        data = np.asarray(data)
        h, w = data.shape
        kwargs = dict(
            driver="GTiff",
            width=w,
            height=h,
            count=1,
            dtype=data.dtype,
            transform=transform,
            nodata=nodata,
            tiled=True,
            blockxsize=16,
            blockysize=16,
        )
        if crs is not None:
            kwargs["crs"] = crs
        with rasterio.open(path, "w", **kwargs) as ds:
            ds.write(data, 1)
        return Path(path)

    return make


def snapshot(folder) -> dict:
    """Every file under ``folder`` with its size and modification time (to show nothing changed)."""
    out = {}
    for root, _dirs, files in os.walk(folder):
        for name in files:
            p = Path(root) / name
            st = p.stat()
            out[str(p.relative_to(folder))] = (st.st_size, st.st_mtime_ns)
    return out


@pytest.fixture(scope="session")
def repo_root() -> Path:
    """The repository root (tests run from a checkout; the package need not be installed)."""
    return Path(__file__).resolve().parents[1]


@pytest.fixture
def folder_snapshot():
    """The :func:`snapshot` function, as a fixture (test modules cannot import conftest)."""
    return snapshot
