"""A synthetic benchmark scene, generated once with fixed seeds and cached on disk.

Everything here is invented: an imaginary "surface temperature" field in
kelvin on a lat/lon grid, with cloud gaps and a missing swath corner stored as
nodata, village polygons, survey-cluster centres and a monthly series. Nothing
is drawn from real data; the grid's position on the globe only fixes the
latitudes (and so the pixel areas) the engine works with.

The rasters are written once into ``$COVEXTRACT_BENCH_DIR/<scene name>/``
(default ``/tmp/covextract-bench``) and reused by later runs while
``scene.json`` there matches the specification and :data:`SCENE_VERSION`.
Vector units are cheap and are rebuilt from their seeds on every run.

Files of a scene
----------------
``raster.tif``
    float32 GeoTIFF, EPSG:4326, tiled 256 x 256, DEFLATE with the
    floating-point predictor, nodata -9999.
``series/step_NN.tif``
    byte copies of ``raster.tif`` whose scale and offset tags differ, so a
    step's physical values are ``stored * scale + offset`` (a cheap series:
    re-encoding 24 rasters of 144 Mpx would take minutes; decoding cost,
    what the benchmark measures, is the same as for distinct data).
``mosaic_KxK.vrt``
    written on request (:meth:`Scene.mosaic`): ``raster.tif`` repeated K x K
    times, a raster of more than 2^31 pixels and 6 GB uncompressed.
"""

from __future__ import annotations

import json
import math
import os
import shutil
import time
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import shapely
from affine import Affine

__all__ = [
    "FULL",
    "QUICK",
    "SCENE_VERSION",
    "Mosaic",
    "Scene",
    "SceneSpec",
    "ensure_scene",
    "scene_root",
    "step_scaling",
]

#: Bump when the generator writes different files for the same specification.
SCENE_VERSION = "1"

#: Environment variable naming the cache folder of generated scenes.
BENCH_DIR_ENV = "COVEXTRACT_BENCH_DIR"
DEFAULT_BENCH_DIR = "/tmp/covextract-bench"

#: Metres per degree of latitude and of longitude at the equator, rounded
#: (from memory; only used to size invented polygons, never to measure).
_M_PER_DEG_LAT = 110_574.0
_M_PER_DEG_LON = 111_320.0


@dataclass(frozen=True)
class SceneSpec:
    """Size and seeds of a synthetic scene.

    Parameters
    ----------
    name : str
        Folder name under the cache folder.
    size : int
        Pixels per side of the square raster.
    pixel_deg : float
        Pixel size in degrees (lon and lat).
    west, north : float
        Longitude of the left edge and latitude of the top edge, degrees.
    n_polygons : int
        Village polygons, 1-3 km across.
    n_buffers : int
        Survey-cluster centres, each buffered by ``buffer_m``.
    buffer_m : float
        Geodesic buffer radius, metres.
    n_steps : int
        Rasters in the series.
    seed : int
        Seed of every random draw of the scene.
    tile : int
        Tile size of the GeoTIFFs, pixels.
    nodata : float
        Stored nodata value.
    """

    name: str
    size: int
    pixel_deg: float
    west: float
    north: float
    n_polygons: int
    n_buffers: int
    buffer_m: float
    n_steps: int
    seed: int
    tile: int = 256
    nodata: float = -9999.0

    @property
    def transform(self) -> Affine:
        """Pixel-to-lon/lat transform (rasterio convention, north up)."""
        return Affine(self.pixel_deg, 0.0, self.west, 0.0, -self.pixel_deg, self.north)

    @property
    def bounds(self) -> tuple[float, float, float, float]:
        """``(west, south, east, north)`` in degrees."""
        span = self.size * self.pixel_deg
        return (self.west, self.north - span, self.west + span, self.north)

    @property
    def uncompressed_bytes(self) -> int:
        """Size of the float32 raster without compression."""
        return self.size * self.size * 4


FULL = SceneSpec(
    name="full",
    size=12_000,
    pixel_deg=0.0009,
    west=30.0,
    north=4.0,
    n_polygons=5_000,
    n_buffers=20_000,
    buffer_m=5_000.0,
    n_steps=24,
    seed=1201,
)
QUICK = SceneSpec(
    name="quick",
    size=4_000,
    pixel_deg=0.0009,
    west=30.0,
    north=4.0,
    n_polygons=500,
    n_buffers=2_000,
    buffer_m=5_000.0,
    n_steps=6,
    seed=401,
)


def step_scaling(step: int) -> tuple[float, float]:
    """``(scale, offset)`` tags of series step ``step`` (0-based); step 0 is the raster itself."""
    return (1.0 + 0.002 * step, -0.25 * step)


def scene_root() -> Path:
    """The cache folder: ``$COVEXTRACT_BENCH_DIR`` or ``/tmp/covextract-bench``."""
    return Path(os.environ.get(BENCH_DIR_ENV) or DEFAULT_BENCH_DIR)


@dataclass(frozen=True)
class Mosaic:
    """A VRT repeating the scene raster ``repeat x repeat`` times."""

    path: Path
    repeat: int
    side: int
    pixel_deg: float
    west: float
    north: float

    @property
    def bounds(self) -> tuple[float, float, float, float]:
        """``(west, south, east, north)`` in degrees."""
        span = self.side * self.pixel_deg
        return (self.west, self.north - span, self.west + span, self.north)

    @property
    def pixels(self) -> int:
        """Pixels in the mosaic."""
        return self.side * self.side

    @property
    def uncompressed_bytes(self) -> int:
        """Size of the float32 mosaic without compression."""
        return self.pixels * 4


@dataclass(frozen=True)
class Scene:
    """A generated scene on disk and its (re)built vector units."""

    spec: SceneSpec
    folder: Path

    @property
    def raster(self) -> Path:
        """The main raster."""
        return self.folder / "raster.tif"

    @property
    def series(self) -> list[Path]:
        """The series rasters, in step order."""
        return [self.folder / "series" / f"step_{k:02d}.tif" for k in range(self.spec.n_steps)]

    # ------------------------------------------------------------ vector units
    def polygons(self) -> np.ndarray:
        """Village polygons: random star polygons 1-3 km across, valid, in lon/lat.

        A star polygon (vertices at sorted, distinct angles around a centre)
        is simple by construction, so every polygon is valid.
        """
        spec = self.spec
        rng = np.random.default_rng([spec.seed, 1])
        w, s, e, n = spec.bounds
        margin = 0.02
        out = np.empty(spec.n_polygons, dtype=object)
        for i in range(spec.n_polygons):
            lon0 = rng.uniform(w + margin, e - margin)
            lat0 = rng.uniform(s + margin, n - margin)
            k = int(rng.integers(7, 21))
            # equal sectors with jitter inside each keep the angles distinct
            ang = (np.arange(k) + rng.uniform(0.05, 0.95, k)) * (2 * np.pi / k)
            r_max = rng.uniform(500.0, 1500.0)  # half of 1-3 km
            rad = r_max * rng.uniform(0.45, 1.0, k)
            rad[int(rng.integers(k))] = r_max
            dx = rad * np.cos(ang) / (_M_PER_DEG_LON * math.cos(math.radians(lat0)))
            dy = rad * np.sin(ang) / _M_PER_DEG_LAT
            out[i] = shapely.Polygon(np.c_[lon0 + dx, lat0 + dy])
        bad = ~shapely.is_valid(out)
        if bad.any():
            raise RuntimeError(f"scene generator made {int(bad.sum())} invalid polygons")
        return out

    def buffer_centres(self) -> tuple[np.ndarray, np.ndarray]:
        """Survey-cluster centres (lon, lat), far enough inside the grid for a whole buffer."""
        spec = self.spec
        return _centres(spec.n_buffers, spec.bounds, spec.buffer_m, [spec.seed, 2])

    def buffers(self) -> np.ndarray:
        """Geodesic buffers of ``spec.buffer_m`` around :meth:`buffer_centres`."""
        from covextract.units.buffers import geodesic_buffers

        lon, lat = self.buffer_centres()
        return geodesic_buffers(lon, lat, self.spec.buffer_m)

    # ------------------------------------------------------------------ mosaic
    def mosaic(self, min_side: int = 48_000) -> Mosaic:
        """A VRT repeating ``raster.tif`` so that each side has at least ``min_side`` pixels.

        The default gives 48 000 x 48 000 pixels: 2.3e9 pixels (more than
        2^31) and 9.2 GB as uncompressed float32. The VRT XML is written by
        hand (rasterio has no gdalbuildvrt); its bands use 256 x 256 blocks.
        """
        spec = self.spec
        k = max(1, -(-int(min_side) // spec.size))
        side = k * spec.size
        path = self.folder / f"mosaic_{k}x{k}.vrt"
        sources = []
        for i in range(k):
            for j in range(k):
                sources.append(
                    "    <SimpleSource>\n"
                    '      <SourceFilename relativeToVRT="1">raster.tif</SourceFilename>\n'
                    "      <SourceBand>1</SourceBand>\n"
                    f'      <SrcRect xOff="0" yOff="0" xSize="{spec.size}" ySize="{spec.size}"/>\n'
                    f'      <DstRect xOff="{j * spec.size}" yOff="{i * spec.size}" '
                    f'xSize="{spec.size}" ySize="{spec.size}"/>\n'
                    "    </SimpleSource>"
                )
        t = spec.transform
        xml = (
            f'<VRTDataset rasterXSize="{side}" rasterYSize="{side}">\n'
            '  <SRS dataAxisToSRSAxisMapping="2,1">EPSG:4326</SRS>\n'
            f"  <GeoTransform>{t.c!r}, {t.a!r}, 0.0, {t.f!r}, 0.0, {t.e!r}</GeoTransform>\n"
            '  <VRTRasterBand dataType="Float32" band="1" blockXSize="256" blockYSize="256">\n'
            f"    <NoDataValue>{spec.nodata!r}</NoDataValue>\n"
            + "\n".join(sources)
            + "\n  </VRTRasterBand>\n</VRTDataset>\n"
        )
        if not path.exists() or path.read_text() != xml:
            tmp = path.with_suffix(".vrt.tmp")
            tmp.write_text(xml)
            os.replace(tmp, path)
        return Mosaic(path, k, side, spec.pixel_deg, spec.west, spec.north)


def mosaic_buffer_centres(mosaic: Mosaic, n: int, buffer_m: float, seed: int):
    """``n`` cluster centres (lon, lat) spread over a mosaic, whole buffers inside it."""
    return _centres(n, mosaic.bounds, buffer_m, [seed, 3])


def _centres(n, bounds, buffer_m, seed):
    rng = np.random.default_rng(seed)
    w, s, e, nn = bounds
    lat_margin = 1.2 * buffer_m / _M_PER_DEG_LAT
    lat = rng.uniform(s + lat_margin, nn - lat_margin, n)
    lon_margin = 1.2 * buffer_m / (_M_PER_DEG_LON * np.cos(np.radians(lat)))
    lon = w + lon_margin + rng.uniform(0.0, 1.0, n) * (e - w - 2 * lon_margin)
    return lon, lat


# ------------------------------------------------------------------- rasters
def _clouds(spec: SceneSpec):
    """Cloud discs ``(row, col, radius)`` in pixels, proportional to the grid's area."""
    rng = np.random.default_rng([spec.seed, 0])
    n = max(10, round(150 * (spec.size / 12_000) ** 2))
    rows = rng.uniform(0, spec.size, n)
    cols = rng.uniform(0, spec.size, n)
    radii = rng.uniform(15.0, 250.0, n)
    return rows, cols, radii


def _band(spec: SceneSpec, r0: int, r1: int, clouds) -> np.ndarray:
    """Rows ``r0:r1`` of the invented temperature field (kelvin), nodata burnt in."""
    rng = np.random.default_rng([spec.seed, 10, r0])
    rows = np.arange(r0, r1, dtype=np.float64)[:, None]
    cols = np.arange(spec.size, dtype=np.float64)[None, :]
    field = (
        300.0
        + 6.0 * np.sin(cols / 1500.0 + 0.7) * np.cos(rows / 1100.0)
        + 2.0 * np.sin((cols + 2.0 * rows) / 180.0)
        - 0.0003 * rows
    )
    field = field + rng.normal(0.0, 0.8, size=field.shape)
    values = field.astype(np.float32)
    missing = (rows + cols) < 0.1 * spec.size  # a corner outside the sensor's swath
    missing = missing | (rng.uniform(size=values.shape) < 0.003)  # scattered bad pixels
    crow, ccol, crad = clouds
    near = (crow + crad >= r0) & (crow - crad < r1)
    for cr, cc, rad in zip(crow[near], ccol[near], crad[near], strict=True):
        c_lo, c_hi = max(0, int(cc - rad)), min(spec.size, int(cc + rad) + 1)
        sub = (rows - cr) ** 2 + (cols[:, c_lo:c_hi] - cc) ** 2 <= rad * rad
        missing[:, c_lo:c_hi] |= sub
    values[missing] = np.float32(spec.nodata)
    return values


def _write_raster(spec: SceneSpec, path: Path) -> None:
    import rasterio
    from rasterio.windows import Window

    clouds = _clouds(spec)
    profile = dict(
        driver="GTiff",
        width=spec.size,
        height=spec.size,
        count=1,
        dtype="float32",
        crs="EPSG:4326",
        transform=spec.transform,
        nodata=spec.nodata,
        tiled=True,
        blockxsize=spec.tile,
        blockysize=spec.tile,
        compress="deflate",
        predictor=3,
        num_threads="all_cpus",
    )
    band_rows = 4 * spec.tile
    with rasterio.Env(GDAL_CACHEMAX=256 * 1024 * 1024), rasterio.open(path, "w", **profile) as ds:
        for r0 in range(0, spec.size, band_rows):
            r1 = min(spec.size, r0 + band_rows)
            ds.write(_band(spec, r0, r1, clouds), 1, window=Window(0, r0, spec.size, r1 - r0))


def _write_series(spec: SceneSpec, raster: Path, folder: Path) -> None:
    import rasterio

    folder.mkdir(parents=True, exist_ok=True)
    for k in range(spec.n_steps):
        path = folder / f"step_{k:02d}.tif"
        shutil.copyfile(raster, path)
        scale, offset = step_scaling(k)
        with rasterio.open(path, "r+") as ds:
            ds.scales = (scale,)
            ds.offsets = (offset,)


def _manifest(spec: SceneSpec) -> dict:
    return {"version": SCENE_VERSION, "spec": asdict(spec)}


def ensure_scene(spec: SceneSpec, root: Path | None = None, log=print) -> Scene:
    """Return the scene of ``spec``, generating its rasters first if needed.

    Parameters
    ----------
    spec : SceneSpec
        :data:`FULL`, :data:`QUICK` or another specification.
    root : Path, optional
        Cache folder (default :func:`scene_root`).
    log : callable
        Receives progress lines.

    Notes
    -----
    ``scene.json`` is written last, so an interrupted generation is redone
    on the next call. The full scene took 41 s on two cores here and takes
    0.31 GB per raster on disk (x 25 with the series).
    """
    folder = (root or scene_root()) / spec.name
    scene = Scene(spec, folder)
    marker = folder / "scene.json"
    if marker.exists():
        try:
            if json.loads(marker.read_text()) == _manifest(spec):
                return scene
        except (OSError, ValueError):
            pass
    t0 = time.perf_counter()
    log(f"generating the {spec.name} scene in {folder} (once; cached afterwards)")
    if folder.exists():
        shutil.rmtree(folder)
    folder.mkdir(parents=True)
    _write_raster(spec, scene.raster)
    log(
        f"  raster {spec.size} x {spec.size} written in {time.perf_counter() - t0:.1f} s "
        f"({scene.raster.stat().st_size / 1e6:.0f} MB)"
    )
    _write_series(spec, scene.raster, folder / "series")
    log(f"  series of {spec.n_steps} rasters written; total {time.perf_counter() - t0:.1f} s")
    tmp = marker.with_suffix(".json.tmp")
    tmp.write_text(json.dumps(_manifest(spec), indent=1))
    os.replace(tmp, marker)
    return scene
