"""Opening rasters: the only place that turns a raster path into pixels.

:func:`open_layer` checks a file and returns a :class:`RasterSource`: its
:class:`~covextract.core.grid.Grid`, how to turn stored numbers into
physical values (scale, offset, nodata, valid range), and a thread-local
block reader for the engine. :func:`describe_raster` reports a file for
``covextract describe``.
"""

from __future__ import annotations

import os
import threading
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from covextract.core.grid import Grid
from covextract.errors import InputFileError, RasterError
from covextract.io.paths import symlink_loop

__all__ = ["RasterSource", "open_layer", "describe_raster", "gdal_env"]

#: GDAL block cache in bytes; set explicitly rather than GDAL's share of RAM.
GDAL_CACHE_BYTES = 256 * 1024 * 1024


_CACHE_SET = False


def _set_block_cache() -> None:
    """Set GDAL's block cache size once per process (not GDAL's default share of RAM).

    Entering a ``rasterio.Env`` for every block read costs more than many small
    reads themselves, so the option is set process-wide when the first dataset
    handle is opened.
    """
    global _CACHE_SET
    if _CACHE_SET:
        return
    try:
        from rasterio._env import set_gdal_config

        set_gdal_config("GDAL_CACHEMAX", GDAL_CACHE_BYTES)
    except (ImportError, TypeError):  # pragma: no cover - private API changed; keep the default
        pass
    _CACHE_SET = True


def gdal_env():
    """A rasterio ``Env`` with the block cache size set explicitly."""
    import rasterio

    return rasterio.Env(GDAL_CACHEMAX=GDAL_CACHE_BYTES, GDAL_NUM_THREADS=1)


@dataclass
class RasterSource:
    """A raster band ready for the engine.

    Parameters
    ----------
    path : Path
        The file.
    band : int
        1-based band index.
    grid : Grid
        The pixel lattice.
    dtype : str
        Stored data type.
    nodata : tuple of float
        Stored values that mean "no data" (from the file and the recipe).
    scale, offset : float
        Physical value = stored × scale + offset (applied after masking nodata).
    valid_range : tuple of float, optional
        Physical values outside ``[lo, hi]`` are treated as missing.
    """

    path: Path
    band: int
    grid: Grid
    dtype: str
    nodata: tuple[float, ...] = ()
    scale: float = 1.0
    offset: float = 0.0
    valid_range: tuple[float, float] | None = None
    ceiling: float | None = None
    _local: threading.local = field(default_factory=threading.local, repr=False, compare=False)

    #: ``to_values`` works pixel by pixel, so the engine may convert only the
    #: pixels its weights use.
    elementwise = True

    def __getstate__(self):
        state = self.__dict__.copy()
        state.pop("_local", None)  # dataset handles never travel between processes
        return state

    def __setstate__(self, state):
        self.__dict__.update(state)
        self._local = threading.local()

    def _dataset(self):
        import rasterio

        ds = getattr(self._local, "ds", None)
        if ds is None or ds.closed:
            _set_block_cache()
            ds = rasterio.open(self.path)
            self._local.ds = ds
        return ds

    def read_block(self, window: tuple[int, int, int, int]) -> np.ndarray:
        """Read stored values of ``(row_off, col_off, rows, cols)``.

        Each thread keeps its own dataset handle (rasterio handles are not
        thread-safe).
        """
        from rasterio.windows import Window

        r0, c0, h, w = window
        return self._dataset().read(self.band, window=Window(c0, r0, w, h))

    def to_values(self, stored: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Physical float64 values and the valid mask of a stored block."""
        values = stored.astype(np.float64, copy=True)
        valid = np.isfinite(values)
        for nd in self.nodata:
            if np.isnan(nd):
                continue
            valid &= stored != np.asarray(nd).astype(stored.dtype)
        if self.scale != 1.0 or self.offset != 0.0:
            values *= self.scale
            values += self.offset
        if self.valid_range is not None:
            lo, hi = self.valid_range
            with np.errstate(invalid="ignore"):
                valid &= (values >= lo) & (values <= hi)
        if self.ceiling is not None:
            np.minimum(values, self.ceiling, out=values, where=valid)
        return values, valid

    def close(self) -> None:
        """Close this thread's dataset handle."""
        ds = getattr(self._local, "ds", None)
        if ds is not None:
            ds.close()
            self._local.ds = None


def _check_path(path: Path, what: str) -> None:
    if path.is_symlink() and not path.exists() and symlink_loop(path):
        raise InputFileError(
            f"{what} {path} is a symlink loop (the link leads back to itself). Point the "
            "link at the real file, or name the file itself in the recipe."
        )
    if not path.exists():
        raise InputFileError(
            f"{what} not found: {path}. Check the path in the recipe; relative paths "
            "are relative to the recipe's folder."
        )
    if path.is_dir():
        raise InputFileError(f"{what} is a folder, not a file: {path}")
    if not os.access(path, os.R_OK):
        raise InputFileError(f"{what} is not readable: {path}. Check its permissions.")
    if path.stat().st_size == 0:
        raise InputFileError(
            f"{what} {path} is empty (0 bytes): an interrupted download or copy? Fetch or "
            "copy the file again."
        )


def open_layer(
    path,
    *,
    band: int = 1,
    nodata=None,
    scale: float | None = None,
    offset: float | None = None,
    valid_range=None,
    crs=None,
    name: str | None = None,
    ceiling: float | None = None,
) -> RasterSource:
    """Open a raster band and check it can be used.

    Parameters
    ----------
    path : str or Path
        GeoTIFF or any raster GDAL reads.
    band : int
        1-based band index.
    nodata : float or list of float, optional
        Stored values to treat as missing, in addition to the file's nodata.
    scale, offset : float, optional
        Override the file's scale and offset (physical = stored × scale + offset).
    valid_range : (float, float), optional
        Physical values outside this closed range are missing.
    crs : str, optional
        CRS to assume when the file has none.
    ceiling : float, optional
        Physical values above it are set to it (saturated sensors).
    name : str, optional
        Layer name, used in messages.

    Raises
    ------
    InputFileError
        The file is missing or GDAL cannot open it.
    RasterError
        No CRS, a rotated grid, or a band that does not exist.
    """
    import rasterio
    from pyproj import CRS

    path = Path(path)
    label = f"raster of layer {name!r}" if name else "raster"
    _check_path(path, label)
    try:
        with gdal_env(), rasterio.open(path) as ds:
            if band < 1 or band > ds.count:
                raise RasterError(
                    f"{label} {path} has {ds.count} band(s); band {band} does not exist. "
                    f"Set band: 1..{ds.count}."
                )
            if ds.crs is None and crs is None:
                raise RasterError(
                    f"{label} {path} has no CRS, so units cannot be placed on it. Add "
                    'crs: (for example crs: "EPSG:4326") to the layer in the recipe, '
                    "or fix the file."
                )
            grid_crs = (
                CRS.from_user_input(crs) if crs is not None else CRS.from_wkt(ds.crs.to_wkt())
            )
            t = ds.transform
            if t.b != 0 or t.d != 0:
                raise RasterError(
                    f"{label} {path} has a rotated or sheared grid, which covextract does "
                    "not support. Warp it to a north-up grid first (gdalwarp)."
                )
            bh, bw = ds.block_shapes[band - 1]
            grid = Grid(t, ds.width, ds.height, grid_crs, (int(bh), int(bw)))
            nd = []
            if ds.nodatavals[band - 1] is not None:
                nd.append(float(ds.nodatavals[band - 1]))
            if nodata is not None:
                nd.extend(
                    float(v) for v in (nodata if isinstance(nodata, list | tuple) else [nodata])
                )
            file_scale = ds.scales[band - 1] if ds.scales else 1.0
            file_offset = ds.offsets[band - 1] if ds.offsets else 0.0
            return RasterSource(
                path=path,
                band=band,
                grid=grid,
                dtype=ds.dtypes[band - 1],
                nodata=tuple(nd),
                scale=float(scale if scale is not None else (file_scale or 1.0)),
                offset=float(offset if offset is not None else (file_offset or 0.0)),
                valid_range=tuple(valid_range) if valid_range is not None else None,
                ceiling=float(ceiling) if ceiling is not None else None,
            )
    except rasterio.errors.RasterioIOError as exc:
        raise InputFileError(
            f"{label} {path} cannot be opened as a raster ({exc}). Is it a GeoTIFF or "
            "another format GDAL reads?"
        ) from exc


def describe_raster(path) -> dict:
    """Describe a raster file: CRS, grid, bounds, dtype, nodata, scale, bands."""
    import rasterio

    path = Path(path)
    _check_path(path, "raster")
    try:
        with gdal_env(), rasterio.open(path) as ds:
            t = ds.transform
            return {
                "path": str(path),
                "driver": ds.driver,
                "crs": ds.crs.to_string() if ds.crs else None,
                "width": ds.width,
                "height": ds.height,
                "pixel_size": (t.a, t.e),
                "origin": (t.c, t.f),
                "bounds": tuple(ds.bounds),
                "bands": ds.count,
                "dtypes": list(ds.dtypes),
                "nodata": list(ds.nodatavals),
                "scales": list(ds.scales),
                "offsets": list(ds.offsets),
                "block_shapes": [list(b) for b in ds.block_shapes],
                "tiled": bool(ds.profile.get("tiled", False)),
                "compression": ds.compression.value if ds.compression else None,
            }
    except rasterio.errors.RasterioIOError as exc:
        raise InputFileError(f"{path} cannot be opened as a raster ({exc}).") from exc


def sample_values(source, *, max_side: int = 1024):
    """Distinct valid stored values of a raster read at reduced resolution.

    For ``check``: lists the codes a categorical layer holds without reading
    every pixel (a decimated read of at most ``max_side`` pixels a side; rare
    codes in small patches may be missed, which the run itself reports).
    """
    import rasterio

    with rasterio.open(source.path) as ds:
        h, w = ds.height, ds.width
        f = max(1, int(np.ceil(max(h, w) / max_side)))
        data = ds.read(source.band, out_shape=(max(1, h // f), max(1, w // f)))
    values, valid = source.to_values(data)
    return np.unique(values[valid])
