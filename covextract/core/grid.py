"""Raster grid geometry: the pixel lattice, its blocks, and true pixel areas.

A :class:`Grid` describes where pixels are, never their values; it is built
by :mod:`covextract.io.rasters` from a file and used by every engine stage.
Pixel space follows rasterio: ``(col, row) = ~transform * (x, y)``, pixel
``(r, c)`` covers ``[c, c+1) x [r, r+1)`` in pixel coordinates.
"""

from __future__ import annotations

import hashlib
import math
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
from affine import Affine
from pyproj import CRS

__all__ = ["Grid", "WGS84_A", "WGS84_F", "ellipsoid_band_area"]

#: WGS84 semi-major axis in metres (NIMA TR8350.2).
WGS84_A = 6378137.0
#: WGS84 flattening (NIMA TR8350.2).
WGS84_F = 1.0 / 298.257223563

#: Relative variation of pixel ground area over the grid above which
#: ``area_weighting: auto`` weights pixels by their true area.
AREA_VARIATION_THRESHOLD = 1e-3


@dataclass(frozen=True)
class Grid:
    """A raster's pixel lattice.

    Parameters
    ----------
    transform : affine.Affine
        Pixel-to-CRS transform (rasterio convention).
    width, height : int
        Number of columns and rows.
    crs : pyproj.CRS
        The raster's coordinate reference system.
    block_shape : tuple of int
        ``(rows, cols)`` of the file's internal blocks (tiles or strips).
    """

    transform: Affine
    width: int
    height: int
    crs: CRS
    block_shape: tuple[int, int] = (256, 256)
    _cache: dict = field(default_factory=dict, compare=False, repr=False, hash=False)

    def __getstate__(self):
        state = self.__dict__.copy()
        state["_cache"] = {}  # PROJ objects stay behind; rebuilt where the grid lands
        return state

    def __setstate__(self, state):
        self.__dict__.update(state)

    @property
    def shape(self) -> tuple[int, int]:
        """``(height, width)``."""
        return (self.height, self.width)

    @property
    def bounds(self) -> tuple[float, float, float, float]:
        """``(xmin, ymin, xmax, ymax)`` in the grid's CRS."""
        xs, ys = [], []
        for c, r in ((0, 0), (self.width, 0), (0, self.height), (self.width, self.height)):
            x, y = self.transform @ (c, r)
            xs.append(x)
            ys.append(y)
        return (min(xs), min(ys), max(xs), max(ys))

    @property
    def is_rectilinear(self) -> bool:
        """True when the grid is not rotated or sheared."""
        t = self.transform
        return t.b == 0 and t.d == 0

    @cached_property
    def fingerprint(self) -> str:
        """A short hash of the lattice and CRS (not of pixel values)."""
        t = self.transform
        text = "|".join(
            [
                ",".join(repr(float(v)) for v in (t.a, t.b, t.c, t.d, t.e, t.f)),
                f"{self.width}x{self.height}",
                self.crs.to_wkt() if self.crs is not None else "none",
            ]
        )
        return hashlib.sha256(text.encode()).hexdigest()[:16]

    def same_lattice(self, other: Grid) -> bool:
        """True when ``other`` has the same pixels (transform, size and CRS)."""
        return self.fingerprint == other.fingerprint

    # ------------------------------------------------------------------ blocks
    def block_windows(self) -> list[tuple[int, int, int, int]]:
        """Blocks as ``(row_off, col_off, rows, cols)``, row-major order.

        Strips one row high are grouped so that a block holds at least about
        64 Ki pixels; tiles are used as they are, so each is decoded once.
        """
        bh, bw = self.block_shape
        bw = min(bw, self.width) if bw > 0 else self.width
        if bw >= self.width and bh * self.width < 65536:
            bh = max(bh, int(math.ceil(65536 / max(self.width, 1) / bh)) * bh)
        bh = max(1, min(bh, self.height))
        out = []
        for r0 in range(0, self.height, bh):
            for c0 in range(0, self.width, bw):
                out.append((r0, c0, min(bh, self.height - r0), min(bw, self.width - c0)))
        return out

    # ------------------------------------------------------------------- areas
    @property
    def is_geographic(self) -> bool:
        """True for a lat/lon grid."""
        return self.crs is not None and self.crs.is_geographic

    def pixel_areas(self, rows: np.ndarray, cols: np.ndarray | None = None) -> np.ndarray:
        """True ground area in m² of pixels ``(rows, cols)``.

        On a lat/lon grid the area depends only on the row and is computed in
        closed form on the grid's ellipsoid (area of an ellipsoidal zone); on
        a projected grid it is the area of the pixel's corners on the ellipsoid
        (see :meth:`_projected_areas`), or the central pixel's area when it
        varies by less than 0.1 % over the grid. Rows outside the grid are allowed.
        """
        rows = np.asarray(rows)
        if self.is_geographic:
            table_rows = np.clip(rows, -1, self.height)
            return self._row_area_table()[table_rows + 1]
        if not self.area_varies:
            return np.full(rows.shape, self._constant_area, dtype=np.float64)
        if cols is None:
            raise ValueError("projected grids with varying pixel area need cols too")
        return self._projected_areas(rows, np.asarray(cols))

    @property
    def nominal_pixel_area(self) -> float:
        """``|det(transform)|`` in CRS units² (m² on a metric projected grid)."""
        t = self.transform
        area = abs(t.a * t.e - t.b * t.d)
        if self.crs is not None and self.crs.is_projected:
            unit = self.crs.axis_info[0].unit_conversion_factor if self.crs.axis_info else 1.0
            area *= unit * unit
        return area

    def _row_area_table(self) -> np.ndarray:
        """Areas of rows -1 .. height (one beyond each edge), m²."""
        key = "row_areas"
        if key not in self._cache:
            ell = self.crs.ellipsoid if self.crs is not None else None
            a = ell.semi_major_metre if ell is not None else WGS84_A
            inv_f = ell.inverse_flattening if ell is not None else 1 / WGS84_F
            f = 0.0 if not inv_f else 1.0 / inv_f
            t = self.transform
            rows = np.arange(-1, self.height + 2, dtype=np.float64)
            lat_edges = np.clip(t.f + t.e * rows, -90.0, 90.0)
            band = ellipsoid_band_area(lat_edges[:-1], lat_edges[1:], a=a, f=f)
            dlon = math.radians(abs(t.a))
            self._cache[key] = band * dlon
        return self._cache[key]

    @cached_property
    def _constant_area(self) -> float:
        """Ground area of the central pixel, used where area does not vary."""
        if self.crs is None or not self.crs.is_projected:
            return self.nominal_pixel_area
        return float(
            self._projected_areas(np.array([self.height // 2]), np.array([self.width // 2]))[0]
        )

    @cached_property
    def area_varies(self) -> bool:
        """True when pixel ground area varies by more than 0.1 % over the grid."""
        if self.is_geographic:
            table = self._row_area_table()[1:-1]
            lo, hi = float(table.min()), float(table.max())
            return hi > 0 and (hi - lo) / hi > AREA_VARIATION_THRESHOLD
        if self.crs is None or not self.crs.is_projected:
            return False
        rr, cc = np.meshgrid(
            np.linspace(0, self.height - 1, 7), np.linspace(0, self.width - 1, 7), indexing="ij"
        )
        areas = self._projected_areas(np.floor(rr.ravel()), np.floor(cc.ravel()))
        areas = areas[np.isfinite(areas) & (areas > 0)]
        if areas.size == 0:
            return False
        return (areas.max() - areas.min()) / areas.max() > AREA_VARIATION_THRESHOLD

    def _areal_scale(self, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
        """Nominal pixel area / true ground area at pixels ``(rows, cols)``."""
        return self.nominal_pixel_area / self._projected_areas(rows, cols)

    def _projected_areas(self, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
        """Ground area (m²) of projected pixels from their corners on the ellipsoid.

        The four pixel corners are transformed to the CRS's geodetic lon/lat
        and the quadrilateral's area is taken in the local tangent metric
        (east = N·cosφ·Δλ, north = M·Δφ at the pixel centre). For pixels much
        smaller than the Earth the relative error is of order (size/R)²,
        below 1e-8 for 1 km pixels. PROJ's own ``get_factors`` is not used:
        for Web Mercator it reports the sphere's conformal scale, which is
        0.6 % off the ellipsoidal area near 12° latitude (measured).
        """
        from pyproj import Transformer

        tr = self._cache.get("to_lonlat")
        if tr is None:
            tr = self._cache["to_lonlat"] = Transformer.from_crs(
                self.crs, self.crs.geodetic_crs, always_xy=True
            )
        rows = np.asarray(rows, dtype=np.float64)
        cols = np.asarray(cols, dtype=np.float64)
        t = self.transform
        dc = np.array([0.0, 1.0, 1.0, 0.0])
        dr = np.array([0.0, 0.0, 1.0, 1.0])
        cc = cols[..., None] + dc
        rr = rows[..., None] + dr
        x = t.a * cc + t.b * rr + t.c
        y = t.d * cc + t.e * rr + t.f
        lon, lat = tr.transform(x, y)
        lon = np.radians(np.asarray(lon))
        lat = np.radians(np.asarray(lat))
        ell = self.crs.ellipsoid
        a = ell.semi_major_metre if ell is not None else WGS84_A
        inv_f = ell.inverse_flattening if ell is not None else 1 / WGS84_F
        e2 = 0.0 if not inv_f else (2 - 1 / inv_f) / inv_f
        lat_c = lat.mean(axis=-1, keepdims=True)
        lon_c = lon.mean(axis=-1, keepdims=True)
        s2 = np.sin(lat_c) ** 2
        n_rad = a / np.sqrt(1 - e2 * s2)
        m_rad = a * (1 - e2) / (1 - e2 * s2) ** 1.5
        dlon = (lon - lon_c + np.pi) % (2 * np.pi) - np.pi
        east = n_rad * np.cos(lat_c) * dlon
        north = m_rad * (lat - lat_c)
        area = 0.5 * np.abs(
            np.sum(east * np.roll(north, -1, axis=-1) - np.roll(east, -1, axis=-1) * north, axis=-1)
        )
        bad = ~np.isfinite(area) | (area <= 0)
        return np.where(bad, self.nominal_pixel_area, area)


def ellipsoid_band_area(lat1, lat2, *, a: float = WGS84_A, f: float = WGS84_F):
    """Area (m²) per radian of longitude between latitudes ``lat1`` and ``lat2``.

    Closed form for the zone of an ellipsoid of revolution: the area from the
    equator to latitude φ per radian of longitude is
    ``b²/2 · [sinφ/(1 − e²sin²φ) + artanh(e·sinφ)/e]`` (common practice;
    the authalic-latitude formula of map projection handbooks). Checked in the
    tests against pyproj ``Geod.geometry_area_perimeter`` (Karney 2013).
    """
    lat1 = np.radians(np.asarray(lat1, dtype=np.float64))
    lat2 = np.radians(np.asarray(lat2, dtype=np.float64))
    e2 = f * (2 - f)
    b = a * (1 - f)
    e = math.sqrt(e2)

    def zone(phi):
        s = np.sin(phi)
        if e == 0:
            return b * b * s
        return b * b / 2 * (s / (1 - e2 * s * s) + np.arctanh(e * s) / e)

    return np.abs(zone(lat2) - zone(lat1))
