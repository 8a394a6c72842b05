"""Parallel block tasks: threads and a real dask.distributed cluster give identical values."""

import time

import numpy as np
import pytest
import rasterio
from affine import Affine
from shapely.geometry import Point

from covextract.engine.cluster import connect, is_local_address
from covextract.engine.zonal import build_weights, zonal
from covextract.errors import SchedulerError
from covextract.io.rasters import open_layer
from covextract.stats.names import parse_stat

STATS = [
    parse_stat(s)
    for s in ("count", "valid_share", "sum", "mean", "std", "min", "max", "q90", "median")
]


@pytest.fixture(scope="module")
def scene(tmp_path_factory):
    rng = np.random.default_rng(7)
    data = (300 + rng.normal(0, 3, size=(256, 256))).astype(np.float32)
    data[rng.uniform(size=data.shape) < 0.05] = np.nan
    path = tmp_path_factory.mktemp("par") / "t.tif"
    with rasterio.open(
        path,
        "w",
        driver="GTiff",
        width=256,
        height=256,
        count=1,
        dtype="float32",
        crs="EPSG:4326",
        transform=Affine(0.001, 0, 10, 0, -0.001, 5),
        nodata=np.nan,
        tiled=True,
        blockxsize=32,
        blockysize=32,
    ) as ds:
        ds.write(data, 1)
    centers = rng.uniform([10.02, 4.77], [10.23, 4.98], size=(60, 2))
    geoms = np.array(
        [Point(x, y).buffer(rng.uniform(0.003, 0.02), quad_segs=16) for x, y in centers],
        dtype=object,
    )
    return path, geoms


def test_one_two_and_four_threads_are_bit_identical(scene):
    path, geoms = scene
    src = open_layer(path)
    ws = build_weights(geoms, src.grid, "overlap")
    runs = [zonal(src, geoms, STATS, weights=ws, threads=t) for t in (1, 2, 4)]
    assert runs[0].blocks_read == len(ws.windows) > 40
    for other in runs[1:]:
        for s in STATS:
            np.testing.assert_array_equal(runs[0].values[s.name], other.values[s.name])


def test_distributed_cluster_runs_blocks_on_both_workers(scene):
    distributed = pytest.importorskip("distributed")
    path, geoms = scene
    src = open_layer(path)
    ws = build_weights(geoms, src.grid, "overlap")
    local = zonal(src, geoms, STATS, weights=ws, threads=1)
    with distributed.LocalCluster(
        n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1", dashboard_address=None
    ) as cluster:
        client = connect(cluster.scheduler_address)
        try:
            remote = zonal(src, geoms, STATS, weights=ws, client=client)
            worker_addresses = set(client.scheduler_info()["workers"])
        finally:
            client.close()
    assert remote.blocks_read == local.blocks_read
    assert remote.workers == worker_addresses and len(remote.workers) == 2
    for s in STATS:
        np.testing.assert_array_equal(local.values[s.name], remote.values[s.name])


def test_unreachable_scheduler_fails_fast_with_clear_error():
    t0 = time.monotonic()
    with pytest.raises(
        SchedulerError, match="cannot reach the dask scheduler at tcp://127.0.0.1:9"
    ):
        connect("tcp://127.0.0.1:9", timeout=2)
    assert time.monotonic() - t0 < 10


@pytest.mark.parametrize(
    "address,local",
    [
        ("tcp://127.0.0.1:8786", True),
        ("tcp://localhost:8786", True),
        ("127.0.0.5:1", True),
        ("tcp://10.20.30.40:8786", False),
        ("tcp://cluster.example.org:8786", False),
    ],
)
def test_remote_schedulers_are_told_apart(address, local):
    # no connection is attempted: only the address is inspected
    assert is_local_address(address) is local


def test_bounded_unit_groups_give_identical_values(scene, tmp_path):
    from covextract.engine.zonal import unit_groups, zonal_units
    from covextract.state.cache import WeightCache

    path, geoms = scene
    src = open_layer(path)
    whole = zonal_units(src, geoms, STATS, threads=1)
    assert whole.groups == 1
    groups = unit_groups(geoms, src.grid, max_entries=2000)
    assert len(groups) > 3
    assert sorted(np.concatenate(groups).tolist()) == list(range(len(geoms)))
    cache = WeightCache(tmp_path)
    split = zonal_units(src, geoms, STATS, max_entries=2000, cache=cache, units_fingerprint="f")
    assert split.groups == len(groups) and split.weights_builds == len(groups)
    for s in STATS:
        np.testing.assert_array_equal(whole.values[s.name], split.values[s.name])
    assert split.qa == whole.qa
    again = zonal_units(src, geoms, STATS, max_entries=2000, cache=cache, units_fingerprint="f")
    assert again.weights_builds == 0 and cache.hits == len(groups)


def test_gdal_block_cache_is_set_explicitly(scene):
    from rasterio._env import get_gdal_config

    from covextract.io.rasters import GDAL_CACHE_BYTES

    path, _ = scene
    src = open_layer(path)
    src.read_block((0, 0, 32, 32))
    assert int(get_gdal_config("GDAL_CACHEMAX")) == GDAL_CACHE_BYTES
