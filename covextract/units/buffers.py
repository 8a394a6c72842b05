"""Geodesic buffers: true circles of a given radius on the ellipsoid.

A buffer of ``r`` metres around a point is the set of points whose geodesic
distance from it is at most ``r``. Its boundary is traced by solving the
direct geodesic problem (pyproj ``Geod.fwd``, Karney's algorithm) from the
centre at ``n_vertices`` equally spaced azimuths, for all points in one
vectorised call, so no per-point projection is needed.

The polygon is inscribed in the circle: a regular inscribed n-gon covers
``n·sin(2π/n)/(2π)`` of the disc (elementary geometry), 99.84 % for 64
vertices and 99.96 % for 128, so the default of 128 keeps every buffer within
0.1 % of π r² (for radii up to tens of kilometres, where the curvature of
the Earth changes the disc's area by less than 1e-5).
"""

from __future__ import annotations

import numpy as np
import shapely
from pyproj import Geod

from covextract.core.options import MAX_RADIUS_M  # the limit the recipe checks too
from covextract.errors import GeometryError

__all__ = [
    "MAX_RADIUS_M",
    "MIN_VERTICES",
    "geodesic_buffers",
    "buffer_input_problems",
]


#: Fewest vertices accepted for a buffer polygon.
MIN_VERTICES = 8


def _as_geod(ellps) -> Geod:
    if isinstance(ellps, Geod):
        return ellps
    try:
        return Geod(ellps=ellps)
    except Exception as exc:  # pyproj raises GeodError for unknown names
        raise GeometryError(
            f"unknown ellipsoid {ellps!r} for geodesic buffers; use a PROJ ellipsoid name "
            "such as 'WGS84' or 'GRS80', or pass a pyproj.Geod."
        ) from exc


def buffer_input_problems(lon, lat, radius_m, *, ellps="WGS84") -> dict[str, np.ndarray]:
    """Find points for which a geodesic buffer cannot be built.

    Parameters
    ----------
    lon, lat : array_like
        Centres in degrees.
    radius_m : float or array_like
        Radius in metres, broadcast against ``lon``.
    ellps : str or pyproj.Geod
        Ellipsoid.

    Returns
    -------
    dict of str to numpy.ndarray
        Boolean masks, one per problem: ``"not_finite"`` (centre or radius
        NaN/inf), ``"latitude"`` (outside -90..90), ``"radius"`` (not > 0),
        ``"too_large"`` (above :data:`MAX_RADIUS_M`), ``"pole"`` (the circle
        reaches a pole, so it is no longer a simple ring in lon/lat).
    """
    geod = _as_geod(ellps)
    lon, lat, r = np.broadcast_arrays(
        np.asarray(lon, dtype=np.float64),
        np.asarray(lat, dtype=np.float64),
        np.asarray(radius_m, dtype=np.float64),
    )
    lon, lat, r = (np.ravel(a) for a in (lon, lat, r))
    not_finite = ~(np.isfinite(lon) & np.isfinite(lat) & np.isfinite(r))
    latitude = ~not_finite & (np.abs(lat) > 90)
    radius = ~not_finite & ~(r > 0)
    too_large = ~not_finite & (r > MAX_RADIUS_M)
    pole = np.zeros(lon.shape, dtype=bool)
    ok = ~(not_finite | latitude)
    if ok.any():
        pole_lat = np.where(lat[ok] >= 0, 90.0, -90.0)
        _, _, to_pole = geod.inv(lon[ok], lat[ok], lon[ok], pole_lat)
        pole[ok] = r[ok] >= np.asarray(to_pole)
    return {
        "not_finite": not_finite,
        "latitude": latitude,
        "radius": radius,
        "too_large": too_large,
        "pole": pole & ~too_large,
    }


def geodesic_buffers(lon, lat, radius_m, *, n_vertices: int = 128, ellps="WGS84") -> np.ndarray:
    """Geodesic circles of ``radius_m`` metres around points given in lon/lat.

    Parameters
    ----------
    lon, lat : array_like
        Centres in degrees (longitude east, latitude north), 1-D. Longitudes
        may use any wrap (``190`` is ``-170``).
    radius_m : float or array_like
        Radius in metres: one value for all points or one per point.
    n_vertices : int, default 128
        Vertices of each polygon (at least :data:`MIN_VERTICES`). The
        polygon is inscribed in the circle; see the module docstring for the
        area lost.
    ellps : str or pyproj.Geod, default "WGS84"
        PROJ ellipsoid name, or a ready ``Geod`` (for example
        ``crs.get_geod()`` for the ellipsoid of a CRS).

    Returns
    -------
    numpy.ndarray
        Object array of shapely Polygons in lon/lat degrees, counter-clockwise,
        vertex ``k`` at azimuth ``-k·360/n`` degrees from north. A buffer that
        crosses the antimeridian is a MultiPolygon of two parts, both within
        -180..180.

    Raises
    ------
    GeometryError
        A centre or radius is not finite, a latitude is outside -90..90, a
        radius is not positive or exceeds :data:`MAX_RADIUS_M`, or a circle
        would contain a pole.

    Examples
    --------
    >>> from covextract.units.buffers import geodesic_buffers
    >>> polys = geodesic_buffers([10.0], [45.0], 2000.0)
    >>> len(polys[0].exterior.coords)   # 128 vertices plus the closing one
    129
    """
    n_vertices = int(n_vertices)
    if n_vertices < MIN_VERTICES:
        raise GeometryError(
            f"n_vertices is {n_vertices}; a buffer polygon needs at least {MIN_VERTICES} "
            "vertices (128 keeps the area within 0.1 % of the circle)."
        )
    geod = _as_geod(ellps)
    lon, lat, r = np.broadcast_arrays(
        np.atleast_1d(np.asarray(lon, dtype=np.float64)),
        np.atleast_1d(np.asarray(lat, dtype=np.float64)),
        np.asarray(radius_m, dtype=np.float64),
    )
    if lon.ndim != 1:
        raise GeometryError("geodesic_buffers takes 1-D arrays of centres.")
    problems = buffer_input_problems(lon, lat, r, ellps=geod)
    _raise_problems(problems)
    n = lon.size
    if n == 0:
        return np.empty(0, dtype=object)

    # Decreasing azimuth turns anticlockwise in (east, north): shells come out
    # counter-clockwise, the orientation with positive area.
    az = (360.0 - np.arange(n_vertices) * (360.0 / n_vertices)) % 360.0
    lon_v, lat_v, _ = geod.fwd(
        np.repeat(lon, n_vertices),
        np.repeat(lat, n_vertices),
        np.tile(az, n),
        np.repeat(r, n_vertices),
    )
    lon_v = np.asarray(lon_v).reshape(n, n_vertices)
    lat_v = np.asarray(lat_v).reshape(n, n_vertices)

    # Unwrap every vertex to within 180 degrees of its centre. A circle that
    # contains no pole spans less than 90 degrees of longitude either side of
    # its centre, so the unwrapped ring is simple; it only needs cutting where
    # it runs past +-180.
    centre = (lon + 180.0) % 360.0 - 180.0
    lon_u = centre[:, None] + ((lon_v - centre[:, None] + 180.0) % 360.0 - 180.0)
    coords = np.stack([lon_u, lat_v], axis=-1)
    polys = shapely.polygons(coords)
    out = np.asarray(polys, dtype=object)
    crossing = (lon_u.max(axis=1) > 180.0) | (lon_u.min(axis=1) < -180.0)
    for i in np.flatnonzero(crossing):
        out[i] = _split_at_antimeridian(out[i])
    return out


_WORLD = shapely.box(-180.0, -90.0, 180.0, 90.0)
_EAST = shapely.box(180.0, -90.0, 540.0, 90.0)
_WEST = shapely.box(-540.0, -90.0, -180.0, 90.0)


def _split_at_antimeridian(poly):
    """Cut an unwrapped polygon at +-180 and shift the outside part back."""
    parts = []
    for window, shift in ((_WORLD, 0.0), (_EAST, -360.0), (_WEST, 360.0)):
        piece = shapely.intersection(poly, window)
        if piece.is_empty:
            continue
        if shift:
            piece = shapely.transform(piece, lambda c, s=shift: c + np.array([s, 0.0]))
        parts.extend(p for p in shapely.get_parts(piece) if p.geom_type == "Polygon")
    parts = [p for p in parts if p.area > 0]
    if len(parts) == 1:
        return shapely.orient_polygons(parts[0])
    return shapely.orient_polygons(shapely.MultiPolygon(parts))


def _raise_problems(problems: dict[str, np.ndarray]) -> None:
    texts = {
        "not_finite": "centre or radius is not a finite number",
        "latitude": "latitude is outside -90..90",
        "radius": "radius is not a positive number of metres",
        "too_large": f"radius exceeds {MAX_RADIUS_M:g} m",
        "pole": "the circle would contain a pole",
    }
    found = []
    for key, mask in problems.items():
        idx = np.flatnonzero(mask)
        if idx.size:
            shown = ", ".join(str(int(i)) for i in idx[:5])
            more = f" and {idx.size - 5} more" if idx.size > 5 else ""
            found.append(f"{texts[key]} at position(s) {shown}{more}")
    if found:
        raise GeometryError(
            "cannot build geodesic buffers: "
            + "; ".join(found)
            + ". Fix those centres or radii (radius in metres, at most "
            f"{MAX_RADIUS_M:g})."
        )
