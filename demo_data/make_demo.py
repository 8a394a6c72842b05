"""Regenerate the invented demo scenario shipped in ``covextract/demo/data``.

Everything written here is invented: the district, its villages, the survey
clusters, the sub-districts and their population totals, the land-cover
legend and every raster value. The coordinates lie in open ocean in the
South Atlantic (about 4.5..5.5 E, 12.5..11.5 S) on purpose, so that no real
community is described. Do not use any of it for analysis.

Run from the repository root::

    python demo_data/make_demo.py

Options choose other output folders (used to check that two runs give the
same bytes). The output is deterministic: a fixed seed, no timestamps in the
GeoTIFF tags, and a fixed GeoPackage change date.
"""

from __future__ import annotations

import argparse
import csv
import datetime as dt
import hashlib
import math
from pathlib import Path

import numpy as np

SEED = 20210917
HERE = Path(__file__).resolve().parent
REPO = HERE.parent
DEFAULT_DATA_DIR = REPO / "covextract" / "demo" / "data"
DEFAULT_RECIPES_DIR = REPO / "recipes"

# Centre of the invented district and the equirectangular factors used to
# place features in kilometres. The invented fields need no better geodesy;
# the exact geometry (polygons, raster grids) is computed with pyproj.
LON0, LAT0 = 5.0, -12.0
KM_PER_DEG_LON = 111.320 * math.cos(math.radians(12.0))
KM_PER_DEG_LAT = 110.600

# District and raster extents (degrees). Rasters cover the district with a
# margin of 0.1 degree (~11 km) so 5 km buffers never fall off a grid.
DISTRICT = (4.5, -12.5, 5.5, -11.5)
RASTER_BOUNDS = (4.4, -12.6, 5.6, -11.4)

NDVI_RES_DEG = 0.0009
LST_RES_M = 250.0
LIGHTS_RES_M = 500.0
GPKG_DATE = "2021-12-31T00:00:00Z"

# Land cover shares the NDVI grid exactly, so one set of coverage weights
# serves ndvi, cover_2015 and cover_2021. The red/NIR bands and population
# are on a coarser common grid (~200 m) to keep the package small.
LAND_COVER_RES_DEG = NDVI_RES_DEG
BANDS_RES_DEG = 0.0018
POPULATION_RES_DEG = 0.0018

# The invented land-cover legend. The codes were chosen not to match any
# real land-cover product; 0 is nodata.
CROPLAND, ORCHARD, FOREST, SCRUB, GRASSLAND, BUILT, WATER = 11, 12, 21, 22, 31, 41, 51
LAND_COVER_CLASSES = {
    CROPLAND: "cropland", ORCHARD: "orchard", FOREST: "forest", SCRUB: "scrub",
    GRASSLAND: "grassland", BUILT: "built", WATER: "water",
}  # fmt: skip
LAND_COVER_NODATA = 0
# How many rural villages lose forest to new fields between 2015 and 2021:
# those with the most forest within 3 km in 2015.
N_FRONTIER_VILLAGES = 6

# Invented persons per household, used to spread each village's households
# into a population density.
PERSONS_PER_HOUSEHOLD = {"urban": 4.6, "rural": 5.3}

# Four invented districts that partition the study area; the totals of
# district_totals.csv are the population raster's own totals times these
# invented factors (a census rarely agrees with a modelled density surface).
DISTRICTS = [
    ("01", "Velsharrow"),  # east
    ("02", "Corrimund Plain"),  # south and south-west
    ("03", "Brindlemarch"),  # north-west
    ("04", "Upper Tamsin"),  # north and north-east
]
DISTRICT_TOTAL_FACTORS = (1.08, 0.93, 1.12, 0.97)
# Where the district boundaries meet (km from the district centre) and the
# bearing (degrees clockwise from north) of each boundary from there; district
# k lies clockwise between boundaries k and k + 1. Chosen by hand so that
# each district holds 9 to 11 villages, none close to a boundary.
DISTRICT_HUB = (3.0, -4.0)
DISTRICT_SPOKES = (52.0, 160.0, 264.0, 340.0)

VILLAGE_NAMES = [
    "Orrowby", "Kelldown", "Marrish Ford", "Quillanmere", "Tobbery Cross",
    "Vesk Hollow", "Annerlee Quay", "Brisketh", "Cauldry End", "Dunmorrow Scar",
    "Elvanstock", "Fennimar", "Gorsemantle", "Harrowquist", "Ilsworthy Fen",
    "Jessimoor Pike", "Lornsgate", "Mabberlode", "Nethercaul", "Olverstane",
    "Pellimore Reach", "Rusk Elbow", "Sallowmire", "Umbrelleth", "Varrowdene",
    "Wickering Flats", "Yelvermoss", "Brackwater Bend", "Coldmarrow", "Drossingham Tye",
    "Eskerfall", "Fallowquist", "Grimsquell", "Hollin Teague", "Inchbrindle",
    "Jorrick's Landing", "Loamhithe", "Nubbin Lees", "Pottersnare", "Ravelstoke",
]  # fmt: skip

# The six towns, placed by hand (km from the district centre, east/north);
# two of them sit on the invented river and are placed on it further down.
TOWNS = {
    "Orrowby": (-21.0, 19.0),
    "Lornsgate": (27.0, 26.0),
    "Harrowquist": (-31.0, -24.0),
    "Pellimore Reach": (4.0, -33.0),
    "Marrish Ford": None,
    "Brackwater Bend": None,
}

# Free-text notes for a few villages; one holds the text "NA" so a reader
# that turns "NA" into a missing value is caught by the demo.
NOTES = {
    "Kelldown": "NA",
    "Marrish Ford": "ferry crossing, visited by boat",
    "Vesk Hollow": "road washed out; second visit planned",
    "Jorrick's Landing": "market day Tuesday",
    "Nubbin Lees": 'headman said "about 40 compounds"',
    "Eskerfall": "0012 households re-listed",
}

# River control points (km) from the north-west edge, through the lake, to the
# south edge; the lake ("Tarrin Water", invented) sits at LAKE_CENTRE.
RIVER_CONTROL = [
    (-62.0, 41.0), (-46.0, 31.0), (-33.0, 35.0), (-17.0, 23.0), (-6.0, 9.0),
    (2.0, 1.0), (9.0, -7.0), (14.0, -13.0), (17.0, -18.0), (22.0, -27.0),
    (28.0, -40.0), (33.0, -52.0), (36.0, -64.0),
]  # fmt: skip
LAKE_CENTRE = (17.0, -18.0)
LAKE_AXES = (7.5, 4.0)  # semi-axes, km
LAKE_ANGLE = math.radians(35.0)


# ----------------------------------------------------------------- helpers
def to_km(lon, lat):
    """Equirectangular kilometres east/north of the district centre."""
    return (np.asarray(lon) - LON0) * KM_PER_DEG_LON, (np.asarray(lat) - LAT0) * KM_PER_DEG_LAT


def to_lonlat(x, y):
    """Inverse of :func:`to_km`."""
    return LON0 + np.asarray(x) / KM_PER_DEG_LON, LAT0 + np.asarray(y) / KM_PER_DEG_LAT


def gauss_bumps(x, y, cx, cy, sigma, amp):
    """Sum of isotropic Gaussian bumps at (cx, cy), all in km."""
    out = np.zeros(np.shape(x), dtype=np.float64)
    for i in range(len(cx)):
        d2 = (x - cx[i]) ** 2 + (y - cy[i]) ** 2
        out += amp[i] * np.exp(-d2 / (2.0 * sigma[i] ** 2))
    return out


def hash_unit(i, j, salt):
    """Deterministic pseudo-random numbers in [0, 1) from integer cells.

    Integer arithmetic only, so the values are the same on every platform.
    """
    i = np.asarray(i, dtype=np.int64).astype(np.uint64)
    j = np.asarray(j, dtype=np.int64).astype(np.uint64)
    h = (i * np.uint64(0x9E3779B97F4A7C15)) ^ (j * np.uint64(0xC2B2AE3D27D4EB4F))
    h ^= np.uint64(salt)
    h ^= h >> np.uint64(31)
    h *= np.uint64(0xBF58476D1CE4E5B9)
    h ^= h >> np.uint64(29)
    return (h >> np.uint64(11)).astype(np.float64) / float(2**53)


def value_noise(x, y, cell_km, salt):
    """Smooth deterministic noise in [-0.5, 0.5): hashed lattice, smoothstep-interpolated.

    Gives patchy class boundaries that compress well (unlike iid pixel noise).
    """
    gx = np.asarray(x) / cell_km
    gy = np.asarray(y) / cell_km
    i0 = np.floor(gx)
    j0 = np.floor(gy)
    fx = gx - i0
    fy = gy - j0
    sx = fx * fx * (3.0 - 2.0 * fx)
    sy = fy * fy * (3.0 - 2.0 * fy)
    h00 = hash_unit(i0, j0, salt)
    h10 = hash_unit(i0 + 1, j0, salt)
    h01 = hash_unit(i0, j0 + 1, salt)
    h11 = hash_unit(i0 + 1, j0 + 1, salt)
    top = h00 + sx * (h10 - h00)
    bottom = h01 + sx * (h11 - h01)
    return top + sy * (bottom - top) - 0.5


def field_cells(x, y):
    """Integer indices of the field patchwork (~900 m x 600 m, turned 0.4 rad)."""
    c, s = math.cos(0.4), math.sin(0.4)
    u = (x * c + y * s) / 0.9
    v = (-x * s + y * c) / 0.6
    return np.floor(u), np.floor(v)


def river_polyline():
    """A meandering river through the control points, densified (km)."""
    pts = np.array(RIVER_CONTROL, dtype=np.float64)
    out = []
    for a, b in zip(pts[:-1], pts[1:], strict=True):
        seg = b - a
        length = float(np.hypot(*seg))
        n = max(2, int(length / 0.5))
        t = np.linspace(0.0, 1.0, n, endpoint=False)
        normal = np.array([-seg[1], seg[0]]) / length
        wiggle = 0.9 * np.sin(2 * np.pi * t * length / 6.0)
        out.append(a + np.outer(t, seg) + np.outer(wiggle * np.sin(np.pi * t), normal))
    out.append(pts[-1:])
    return np.vstack(out)


def distance_to_polyline(x, y, line):
    """Distance (km) from points to a polyline, by a loop over segments."""
    best = np.full(np.shape(x), np.inf)
    for (x1, y1), (x2, y2) in zip(line[:-1], line[1:], strict=True):
        dx, dy = x2 - x1, y2 - y1
        t = np.clip(((x - x1) * dx + (y - y1) * dy) / (dx * dx + dy * dy), 0.0, 1.0)
        np.minimum(best, np.hypot(x - (x1 + t * dx), y - (y1 + t * dy)), out=best)
    return best


def lake_radius(x, y):
    """Normalised elliptical radius of the lake: < 1 inside (wavy shore)."""
    u = x - LAKE_CENTRE[0]
    v = y - LAKE_CENTRE[1]
    c, s = math.cos(LAKE_ANGLE), math.sin(LAKE_ANGLE)
    a = (u * c + v * s) / LAKE_AXES[0]
    b = (-u * s + v * c) / LAKE_AXES[1]
    theta = np.arctan2(b, a)
    return np.hypot(a, b) / (1.0 + 0.12 * np.sin(3 * theta + 0.7) + 0.06 * np.sin(7 * theta))


# ------------------------------------------------------------- the scenario
class Scenario:
    """Villages, towns and the smooth fields every raster is drawn from."""

    def __init__(self, rng: np.random.Generator) -> None:
        self.rng = rng
        self.river = river_polyline()
        self._place_villages()
        # Large-scale vegetation pattern: greener hills in the north-west,
        # drier plains in the south-east.
        n = 36
        self.veg_cx = rng.uniform(-70, 70, n)
        self.veg_cy = rng.uniform(-70, 70, n)
        self.veg_s = rng.uniform(6, 22, n)
        self.veg_a = rng.uniform(-1.0, 1.0, n)
        # Cloud gaps in the vegetation composite: two placed to cover part of
        # a village buffer, the others at random.
        self.ndvi_clouds = self._clouds(["Sallowmire", "Fennimar"], 4, salt=11)
        self.lst_clouds = self._clouds(["Coldmarrow"], 3, salt=23)

    def _place_villages(self) -> None:
        rng = self.rng
        river = self.river
        seg_len = np.hypot(*np.diff(river, axis=0).T)
        arc = np.concatenate([[0.0], np.cumsum(seg_len)])
        positions = {}
        for name, frac in (("Marrish Ford", 0.30), ("Brackwater Bend", 0.47)):
            i = int(np.searchsorted(arc, frac * arc[-1]))
            positions[name] = (float(river[i, 0]) + 0.6, float(river[i, 1]) + 0.4)
        for name, xy in TOWNS.items():
            if xy is not None:
                positions[name] = xy
        placed = list(positions.values())
        for name in VILLAGE_NAMES:
            if name in positions:
                continue
            for _ in range(10000):
                x, y = rng.uniform(-46, 46), rng.uniform(-46, 46)
                far = all(math.hypot(x - px, y - py) >= 7.0 for px, py in placed)
                if far and lake_radius(np.array(x), np.array(y)) > 1.45:
                    break
            else:
                raise RuntimeError("could not place every village")
            positions[name] = (float(x), float(y))
            placed.append(positions[name])
        self.positions = positions
        self.urban = {name for name in TOWNS}
        hh = {}
        for name in VILLAGE_NAMES:
            if name in self.urban:
                hh[name] = int(rng.integers(900, 4200))
            else:
                hh[name] = int(rng.integers(45, 650))
        self.households = hh

    def _clouds(self, near, n_random, salt, rng=None):
        rng = self.rng if rng is None else rng
        cx, cy, s = [], [], []
        for name in near:
            px, py = self.positions[name]
            ang = rng.uniform(0, 2 * np.pi)
            cx.append(px + 1.6 * math.cos(ang))
            cy.append(py + 1.6 * math.sin(ang))
            s.append(1.3)
        cx += list(rng.uniform(-55, 55, n_random))
        cy += list(rng.uniform(-55, 55, n_random))
        s += list(rng.uniform(1.5, 3.5, n_random))
        return np.array(cx), np.array(cy), np.array(s), salt

    # ------------------------------------------------------------ fields
    def vegetation(self, x, y):
        raw = gauss_bumps(x, y, self.veg_cx, self.veg_cy, self.veg_s, self.veg_a)
        trend = -0.006 * (x - y)  # greener to the north-west
        return np.tanh(0.8 * raw + trend)  # in (-1, 1)

    def riparian(self, x, y):
        return np.exp(-distance_to_polyline(x, y, self.river) / 1.2)

    def settlement(self, x, y, *, urban_only: bool):
        """Built-up intensity: ~1 at town centres, small for rural villages."""
        names = [n for n in VILLAGE_NAMES if n in self.urban or not urban_only]
        cx = np.array([self.positions[n][0] for n in names])
        cy = np.array([self.positions[n][1] for n in names])
        size = np.array([self.households[n] for n in names], dtype=np.float64)
        sigma = 0.35 + 0.45 * np.sqrt(size / 1000.0)
        amp = np.minimum(1.0, size / 3000.0)
        return gauss_bumps(x, y, cx, cy, sigma, amp)

    def cloud_mask(self, x, y, clouds):
        cx, cy, s, salt = clouds
        cover = gauss_bumps(x, y, cx, cy, s, np.ones_like(s))
        # Ragged edges: a coarse hashed texture on a 0.7 km lattice.
        rough = hash_unit(np.floor(x / 0.7), np.floor(y / 0.7), salt) - 0.5
        return cover + 0.35 * rough > 0.55

    def field_texture(self, x, y):
        """A patchwork of fields (~900 m x 600 m), five crop levels in [-1, 1].

        Few discrete levels in blocks of several pixels give within-village
        spread at a small cost in file size (iid pixel noise does not
        compress).
        """
        fu, fv = field_cells(x, y)
        level = np.floor(5.0 * hash_unit(fu, fv, 7))
        return level / 2.0 - 1.0


# --------------------------------------------------------------- the grids
def latlon_grid(res):
    """A lat/lon grid of ``res`` degrees from the north-west corner of RASTER_BOUNDS."""
    from rasterio.transform import from_origin

    west, south, east, north = RASTER_BOUNDS
    width = int(math.ceil(round((east - west) / res, 6)))
    height = int(math.ceil(round((north - south) / res, 6)))
    return from_origin(west, north, res, res), width, height


def ndvi_grid():
    return latlon_grid(NDVI_RES_DEG)


def projected_grid(crs, res):
    """A grid in ``crs`` snapped to ``res`` that covers RASTER_BOUNDS."""
    from pyproj import Transformer
    from rasterio.transform import from_origin

    tr = Transformer.from_crs("EPSG:4326", crs, always_xy=True)
    west, south, east, north = RASTER_BOUNDS
    t = np.linspace(0.0, 1.0, 101)
    lons = np.concatenate(
        [west + (east - west) * t, np.full(101, east), east - (east - west) * t, np.full(101, west)]
    )
    lats = np.concatenate(
        [
            np.full(101, south),
            south + (north - south) * t,
            np.full(101, north),
            north - (north - south) * t,
        ]
    )
    xs, ys = tr.transform(lons, lats)
    x0 = math.floor(min(xs) / res) * res
    y1 = math.ceil(max(ys) / res) * res
    width = int(math.ceil((max(xs) - x0) / res))
    height = int(math.ceil((y1 - min(ys)) / res))
    return from_origin(x0, y1, res, res), width, height


def pixel_centres_km(transform, width, height, crs):
    """Pixel centres of a grid as km east/north of the district centre."""
    cols, rows = np.meshgrid(np.arange(width) + 0.5, np.arange(height) + 0.5)
    xs, ys = transform * (cols, rows)
    if crs != "EPSG:4326":
        from pyproj import Transformer

        tr = Transformer.from_crs(crs, "EPSG:4326", always_xy=True)
        xs, ys = tr.transform(xs, ys)
    return to_km(xs, ys)


# -------------------------------------------------------------- the rasters
def land_ndvi(sc, x, y):
    """NDVI of the land surface (the lake not yet drawn), without noise."""
    veg = sc.vegetation(x, y)
    built = sc.settlement(x, y, urban_only=False)
    ndvi = 0.42 + 0.26 * veg + 0.22 * sc.riparian(x, y)
    # Fields where vegetation is middling (farmland), not in forest or scrub.
    farmland = np.abs(veg) < 0.55
    ndvi += np.where(farmland, 0.05 * sc.field_texture(x, y), 0.0)
    ndvi -= 0.40 * np.minimum(built, 1.0)
    return np.clip(ndvi, 0.02, 0.9)


def make_ndvi(sc, rng):
    transform, width, height = ndvi_grid()
    x, y = pixel_centres_km(transform, width, height, "EPSG:4326")
    ndvi = land_ndvi(sc, x, y)
    # Open water: negative NDVI, with a narrow wet shore.
    r = lake_radius(x, y)
    shore = np.clip((r - 1.0) / 0.08, 0.0, 1.0)
    water = -0.16 + 0.03 * np.sin(x * 1.7) + rng.normal(0.0, 0.01, ndvi.shape)
    ndvi = np.where(r < 1.08, shore * ndvi + (1 - shore) * water, ndvi)
    ndvi = np.clip(ndvi, -0.2, 0.9)
    stored = np.round(ndvi * 10000.0).astype(np.int16)
    stored[sc.cloud_mask(x, y, sc.ndvi_clouds)] = -3000
    return stored, transform, width, height


def make_surface_temp(sc, rng, crs):
    transform, width, height = projected_grid(crs, LST_RES_M)
    x, y = pixel_centres_km(transform, width, height, crs)
    veg = sc.vegetation(x, y)
    lst = 304.0 - 3.0 * veg - 2.5 * sc.riparian(x, y)
    lst += 3.5 * np.minimum(sc.settlement(x, y, urban_only=True), 1.0)
    lst -= 0.02 * y  # slightly warmer to the south
    lst += rng.normal(0.0, 0.25, lst.shape)
    r = lake_radius(x, y)
    lst = np.where(r < 1.0, 297.0 + rng.normal(0.0, 0.2, lst.shape), lst)
    lst = np.clip(lst, 295.0, 310.0)
    # Round to 1/32 K: exact in float32, so the file compresses well.
    lst = (np.round(lst * 32.0) / 32.0).astype(np.float32)
    lst[sc.cloud_mask(x, y, sc.lst_clouds)] = np.nan
    return lst, transform, width, height


def make_night_lights(sc, rng, crs):
    transform, width, height = projected_grid(crs, LIGHTS_RES_M)
    x, y = pixel_centres_km(transform, width, height, crs)
    background = 0.08 + 0.12 * (1.0 + sc.vegetation(x, y) * -0.5)
    background *= rng.gamma(4.0, 0.25, x.shape)
    background = np.clip(background, 0.0, 0.5)
    names = VILLAGE_NAMES
    cx = np.array([sc.positions[n][0] for n in names])
    cy = np.array([sc.positions[n][1] for n in names])
    hh = np.array([sc.households[n] for n in names], dtype=np.float64)
    urban = np.array([n in sc.urban for n in names])
    amp = np.where(urban, 14.0 + 46.0 * (hh - 900) / 3300.0, 0.25 + 4.0 * hh / 650.0)
    sigma = np.where(urban, 0.9 + 0.5 * hh / 4200.0, 0.45)
    core = gauss_bumps(x, y, cx, cy, sigma, amp)
    halo = gauss_bumps(x, y, cx, cy, 3.0 * sigma + 1.5, 0.06 * amp)
    light = background + core + halo
    light *= rng.uniform(0.93, 1.07, light.shape)
    light = np.minimum(light, 60.0)
    # Round to 2**-10 radiance units: exact in float32, compresses well.
    light = (np.round(light * 1024.0) / 1024.0).astype(np.float32)
    # A stray-light gap in the south-east margin, outside the district.
    lon, lat = to_lonlat(x, y)
    light[(lon > 5.52) & (lat < -12.48)] = -1.0
    return light, transform, width, height


def write_tif(path, array, transform, crs, nodata, *, block, predictor, description, unit):
    import rasterio

    if path.exists():
        path.unlink()
    profile = dict(
        driver="GTiff",
        width=array.shape[1],
        height=array.shape[0],
        count=1,
        dtype=array.dtype.name,
        crs=crs,
        transform=transform,
        nodata=nodata,
        tiled=True,
        blockxsize=block,
        blockysize=block,
        compress="deflate",
        zlevel=9,
        predictor=predictor,
        interleave="band",
    )
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(array, 1)
        dst.set_band_description(1, description)
        dst.update_tags(
            DEMO="covextract demo scenario (Tamsin Vale district): invented values, "
            "not for analysis"
        )
        dst.units = (unit,)


# ------------------------------------------- land cover, bands, population
def built_radius_km(sc, names, year, frontier):
    """Radius (km) of each village's built-up core in ``year`` (2015 or 2021).

    Towns grow between the years, the larger (brighter) ones most; the
    frontier villages grow too; the other rural villages stay as they were.
    """
    hh = np.array([sc.households[n] for n in names], dtype=np.float64)
    urban = np.array([n in sc.urban for n in names])
    r = np.where(urban, 0.55 + 0.9 * np.sqrt(hh / 4200.0), 0.12 + 0.28 * np.sqrt(hh / 650.0))
    if year == 2021:
        grown_town = r * (1.15 + 0.25 * hh / 4200.0) + 0.2
        grown_village = np.where(np.isin(names, list(frontier)), 1.6 * r + 0.1, r)
        r = np.where(urban, grown_town, grown_village)
    return r


def built_mask(sc, x, y, year, frontier):
    """Pixels of built-up land in ``year``; the 2015 mask lies inside the 2021 one."""
    names = VILLAGE_NAMES
    radius = built_radius_km(sc, names, year, frontier)
    nearest = np.full(np.shape(x), np.inf)
    for name, r in zip(names, radius, strict=True):
        px, py = sc.positions[name]
        np.minimum(nearest, np.hypot(x - px, y - py) / r, out=nearest)
    # The same ragged edge in both years, so growth never removes built land.
    return nearest < 1.0 + 0.7 * value_noise(x, y, 0.35, 83)


def land_cover_maps(sc, x, y, frontier=None):
    """Invented land-cover codes of 2015 and 2021 at points ``(x, y)`` in km.

    Returns ``(cover_2015, cover_2021, frontier)``: two uint8 arrays with
    the codes of LAND_COVER_CLASSES, and the names of the villages that clear
    forest (chosen from the 2015 map when ``frontier`` is None, which needs
    a grid fine and wide enough to see 3 km around every village).
    """
    veg = sc.vegetation(x, y)
    river_km = distance_to_polyline(x, y, sc.river)
    riparian = np.exp(-river_km / 1.2)
    # Natural zones from the vegetation field, with patchy edges and gallery
    # forest along the river.
    zone = veg + 0.9 * value_noise(x, y, 2.5, 31) + 0.5 * value_noise(x, y, 0.6, 37)
    zone += 0.45 * riparian
    fu, fv = field_cells(x, y)
    field = hash_unit(fu, fv, 41)
    cover = np.where(field < 0.52, CROPLAND, np.where(field < 0.64, ORCHARD, GRASSLAND))
    cover = np.where(zone > 0.55, FOREST, cover)
    cover = np.where(zone < -0.6, SCRUB, cover)
    water = (lake_radius(x, y) < 1.0) | (river_km < 0.075)

    early = cover.copy()
    early[built_mask(sc, x, y, 2015, ())] = BUILT
    early[water] = WATER
    if frontier is None:
        frontier = frontier_villages(sc, x, y, early)

    late = cover.copy()
    # Forest cleared for fields: whole fields at a time, most often within a
    # few km of the frontier villages, rarely anywhere else.
    p_clear = np.full(np.shape(x), 0.03)
    for name in frontier:
        px, py = sc.positions[name]
        p_clear += 0.7 * np.exp(-((x - px) ** 2 + (y - py) ** 2) / (2.0 * 2.0**2))
    change = hash_unit(fu, fv, 43)
    late[(cover == FOREST) & (change < np.minimum(p_clear, 0.9))] = CROPLAND
    # Fallow rotation and a few new orchards on the farmland.
    rotate = hash_unit(fu, fv, 47)
    late[(cover == CROPLAND) & (rotate < 0.08)] = GRASSLAND
    late[(cover == GRASSLAND) & (rotate < 0.10)] = CROPLAND
    late[(cover == CROPLAND) & (rotate > 0.97)] = ORCHARD
    late[built_mask(sc, x, y, 2021, frontier)] = BUILT
    late[water] = WATER
    return early.astype(np.uint8), late.astype(np.uint8), tuple(frontier)


def frontier_villages(sc, x, y, cover_2015):
    """The rural villages with the most forest within 3 km in 2015."""
    forest = cover_2015 == FOREST
    shares = []
    for name in VILLAGE_NAMES:
        if name in sc.urban:
            continue
        px, py = sc.positions[name]
        near = (x - px) ** 2 + (y - py) ** 2 < 9.0
        shares.append((-float(forest[near].mean()), name))
    return tuple(name for _, name in sorted(shares)[:N_FRONTIER_VILLAGES])


def make_land_cover(sc):
    transform, width, height = latlon_grid(LAND_COVER_RES_DEG)
    x, y = pixel_centres_km(transform, width, height, "EPSG:4326")
    early, late, frontier = land_cover_maps(sc, x, y)
    # A strip without data in the north-east margin, outside every buffer.
    lon, lat = to_lonlat(x, y)
    gap = (lon > 5.53) & (lat > -11.47)
    early[gap] = LAND_COVER_NODATA
    late[gap] = LAND_COVER_NODATA
    return early, late, frontier, transform


#: NDVI typical of each invented class, blended with the scenario's own field.
CLASS_NDVI = {
    CROPLAND: 0.48, ORCHARD: 0.62, FOREST: 0.80, SCRUB: 0.30, GRASSLAND: 0.40,
    BUILT: 0.12, WATER: -0.15,
}  # fmt: skip


def make_red_nir(sc, rng, frontier):
    """Red and near-infrared reflectance x 10000 (int16) of 2021; 0 in cloud gaps.

    The NDVI they imply follows the 2021 land cover (cleared forest and new
    built land are less green than in ndvi_2021.tif, which predates them).
    """
    transform, width, height = latlon_grid(BANDS_RES_DEG)
    x, y = pixel_centres_km(transform, width, height, "EPSG:4326")
    _, cover, _ = land_cover_maps(sc, x, y, frontier)
    typical = np.zeros(np.shape(x))
    for code, value in CLASS_NDVI.items():
        typical[cover == code] = value
    lake = lake_radius(x, y) < 1.0
    # The river is much narrower than a pixel: those pixels are mostly land.
    typical[(cover == WATER) & ~lake] = 0.3
    ndvi = 0.5 * land_ndvi(sc, x, y) + 0.5 * typical
    ndvi = np.where(lake, -0.15 + 0.03 * np.sin(x * 1.7), ndvi)
    greenness = np.clip(ndvi, 0.0, 0.9) / 0.9
    red = np.where(lake, 0.045, 0.03 + 0.17 * (1.0 - greenness) ** 1.5)
    nir = red * (1.0 + ndvi) / (1.0 - ndvi)
    # Soil and canopy brightness vary smoothly; the ratio (NDVI) does not.
    bright = 1.0 + 0.16 * value_noise(x, y, 4.0, 53)
    # Stored to 0.001 reflectance (multiples of 10): the files are a third smaller.
    red_stored = np.clip(np.round(red * bright * 1000.0) * 10, 10, 10000).astype(np.int16)
    nir_stored = np.clip(np.round(nir * bright * 1000.0) * 10, 10, 10000).astype(np.int16)
    gap = sc.cloud_mask(x, y, band_clouds(sc, rng))
    red_stored[gap] = 0
    nir_stored[gap] = 0
    return red_stored, nir_stored, transform


def band_clouds(sc, rng):
    """Cloud gaps of the red/NIR scene: one over part of Wickering Flats, three
    elsewhere at least 8 km from every village (so no village loses all its data)."""
    px, py = sc.positions["Wickering Flats"]
    ang = rng.uniform(0, 2 * np.pi)
    cx, cy, s = [px + 1.6 * math.cos(ang)], [py + 1.6 * math.sin(ang)], [1.3]
    while len(cx) < 4:
        x, y = rng.uniform(-55, 55), rng.uniform(-55, 55)
        if all(math.hypot(x - vx, y - vy) >= 8.0 for vx, vy in sc.positions.values()):
            cx.append(x)
            cy.append(y)
            s.append(rng.uniform(1.5, 3.0))
    return np.array(cx), np.array(cy), np.array(s), 29


def make_population(sc, frontier):
    """People per km² (float32) in 2021; -1 in a corner of the margin."""
    transform, width, height = latlon_grid(POPULATION_RES_DEG)
    x, y = pixel_centres_km(transform, width, height, "EPSG:4326")
    _, cover, _ = land_cover_maps(sc, x, y, frontier)
    names = VILLAGE_NAMES
    cx = np.array([sc.positions[n][0] for n in names])
    cy = np.array([sc.positions[n][1] for n in names])
    hh = np.array([sc.households[n] for n in names], dtype=np.float64)
    urban = np.array([n in sc.urban for n in names])
    people = hh * np.where(urban, PERSONS_PER_HOUSEHOLD["urban"], PERSONS_PER_HOUSEHOLD["rural"])
    sigma = np.where(urban, 0.7 + 0.4 * np.sqrt(hh / 4200.0), 0.45 + 0.2 * np.sqrt(hh / 650.0))
    # Each village's people spread as a Gaussian: its integral is ``people``.
    density = gauss_bumps(x, y, cx, cy, sigma, people / (2.0 * math.pi * sigma**2))
    # Scattered homesteads: more on farmland, few in forest and scrub.
    spread = np.select(
        [cover == FOREST, cover == SCRUB, cover == WATER], [0.25, 0.4, 0.0], default=1.0
    )
    density += spread * (5.0 + 6.0 * value_noise(x, y, 3.0, 61))
    density = np.where(cover == WATER, 0.0, density)
    # Whole people per km2: exact in float32, and the file stays small.
    density = np.round(density).astype(np.float32)
    lon, lat = to_lonlat(x, y)
    density[(lon < 4.47) & (lat < -12.53)] = -1.0
    return density, transform


def district_polygons(sc):
    """Four district polygons that partition the study area (EPSG:4326).

    Four wavy boundaries run from a common hub to the edge of the area;
    neighbouring districts share the boundary's vertices exactly, so the
    polygons neither overlap nor leave gaps.
    """
    from shapely.geometry import Point, Polygon, box

    hx, hy = DISTRICT_HUB
    west, south, east, north = DISTRICT
    ex0, ey0 = to_km(west, south)
    ex1, ey1 = to_km(east, north)
    spokes = []
    for k, bearing in enumerate(DISTRICT_SPOKES):
        dx, dy = math.sin(math.radians(bearing)), math.cos(math.radians(bearing))
        # Distance from the hub to the edge of the area along the bearing.
        reach = min(
            ((ex1 if dx > 0 else ex0) - hx) / dx if abs(dx) > 1e-12 else np.inf,
            ((ey1 if dy > 0 else ey0) - hy) / dy if abs(dy) > 1e-12 else np.inf,
        )
        t = np.linspace(0.0, 1.0, 61)
        wiggle = 2.2 * np.sin(np.pi * t) * np.sin(2 * np.pi * t * (2.0 + 0.5 * k) + k)
        px = hx + t * reach * dx + wiggle * dy
        py = hy + t * reach * dy - wiggle * dx
        lon, lat = to_lonlat(px, py)
        pts = [(round(float(a), 7), round(float(b), 7)) for a, b in zip(lon, lat, strict=True)]
        # The last vertex exactly on the edge, so the districts fill the area.
        end_lon = min(max(pts[-1][0], west), east)
        end_lat = min(max(pts[-1][1], south), north)
        pts[-1] = (end_lon, end_lat)
        spokes.append(pts)
    # Corners clockwise from the north-east; a position along the edge,
    # measured clockwise from that corner, orders spoke ends and corners.
    corners = [(east, north), (east, south), (west, south), (west, north)]
    w, h = east - west, north - south
    perimeter = 2 * (w + h)

    def edge_position(pt):
        lon, lat = pt
        if abs(lon - east) < 1e-6:
            return north - lat
        if abs(lat - south) < 1e-6:
            return h + (east - lon)
        if abs(lon - west) < 1e-6:
            return h + w + (lat - south)
        return 2 * h + w + (lon - west)

    corner_pos = [0.0, h, h + w, 2 * h + w]
    polys = []
    for k in range(len(spokes)):
        a, b = spokes[k], spokes[(k + 1) % len(spokes)]
        pa, pb = edge_position(a[-1]), edge_position(b[-1])
        if pb <= pa:
            pb += perimeter
        between = sorted(
            (pc + lap, c)
            for lap in (0.0, perimeter)
            for c, pc in zip(corners, corner_pos, strict=True)
            if pa < pc + lap < pb
        )
        ring = a + [c for _, c in between] + b[::-1][:-1]
        poly = Polygon(ring)
        if not poly.is_valid:
            raise RuntimeError(f"invalid district polygon {DISTRICTS[k][0]}")
        polys.append(poly)
    area = box(*DISTRICT)
    total_area = sum(p.area for p in polys)
    if abs(total_area - area.area) > 1e-9 * area.area:
        raise RuntimeError("the districts do not partition the study area")
    for name in VILLAGE_NAMES:
        lon, lat = to_lonlat(*sc.positions[name])
        inside = [p.contains(Point(float(lon), float(lat))) for p in polys]
        if sum(inside) != 1:
            raise RuntimeError(f"village {name} is not in exactly one district")
    return polys


def district_totals(polys, density, transform):
    """Invented census totals: each district's raster total times its factor, to 10 people."""
    import shapely
    from pyproj import Geod

    height, width = density.shape
    cols, rows = np.meshgrid(np.arange(width) + 0.5, np.arange(height) + 0.5)
    lon, lat = transform * (cols, rows)
    # Ground area of one pixel per row (km2), on the WGS84 ellipsoid.
    geod = Geod(ellps="WGS84")
    res_x, res_y = transform.a, -transform.e
    row_area = np.empty(height)
    for r in range(height):
        top = transform.f - r * res_y
        xs = [0.0, res_x, res_x, 0.0]
        ys = [top, top, top - res_y, top - res_y]
        row_area[r] = abs(geod.polygon_area_perimeter(xs, ys)[0]) / 1e6
    people = np.where(density >= 0, density, 0.0) * row_area[:, None]
    totals = []
    for poly, factor in zip(polys, DISTRICT_TOTAL_FACTORS, strict=True):
        inside = shapely.contains_xy(poly, lon, lat)
        totals.append(int(round(float(people[inside].sum()) * factor, -1)))
    return totals


def write_districts(path, polys):
    import geopandas as gpd

    gdf = gpd.GeoDataFrame(
        {
            "district_id": [d for d, _ in DISTRICTS],
            "district_name": [n for _, n in DISTRICTS],
        },
        geometry=polys,
        crs="EPSG:4326",
    )
    write_gpkg_frame(path, gdf, "districts")


# ------------------------------------------------------ villages & clusters
def village_table(sc, rng):
    ids = sorted(rng.choice(np.arange(1, 121), size=len(VILLAGE_NAMES), replace=False))
    start = dt.date(2021, 1, 11)
    days = sorted(rng.choice(np.arange(0, 340), size=len(VILLAGE_NAMES), replace=False))
    order = rng.permutation(len(VILLAGE_NAMES))
    rows = []
    for k, idx in enumerate(order):
        name = VILLAGE_NAMES[idx]
        x, y = sc.positions[name]
        lon, lat = to_lonlat(x, y)
        urban = name in sc.urban
        rows.append(
            {
                "village_id": f"{ids[k]:03d}",
                "village_name": name,
                "lon": f"{float(lon):.6f}",
                "lat": f"{float(lat):.6f}",
                "settlement": "urban" if urban else "rural",
                "buffer_radius_m": "2000" if urban else "5000",
                "visit_date": (start + dt.timedelta(days=int(days[k]))).isoformat(),
                "households": str(sc.households[name]),
                "notes": NOTES.get(name, ""),
            }
        )
    return rows


def village_polygons(sc, rows, rng):
    """Irregular star-shaped polygons 1-3 km across around each village."""
    from pyproj import Geod
    from shapely.geometry import Polygon

    geod = Geod(ellps="WGS84")
    polys = {}
    for row in rows:
        lon, lat = float(row["lon"]), float(row["lat"])
        urban = row["settlement"] == "urban"
        n = int(rng.integers(14, 23))
        base = rng.uniform(950, 1250) if urban else rng.uniform(550, 950)
        az = np.sort((np.arange(n) + rng.uniform(-0.3, 0.3, n)) * 360.0 / n) % 360.0
        az = np.sort(az)
        phase = rng.uniform(0, 2 * np.pi, 2)
        wobble = 0.14 * np.sin(2 * np.radians(az) + phase[0])
        wobble += 0.08 * np.sin(5 * np.radians(az) + phase[1])
        dist = np.minimum(base * (1.0 + wobble + rng.uniform(-0.06, 0.06, n)), 1480.0)
        dist = np.maximum(dist, 480.0)
        plon, plat, _ = geod.fwd(np.full(n, lon), np.full(n, lat), az, dist)
        ring = [(round(a, 7), round(b, 7)) for a, b in zip(plon, plat, strict=True)]
        poly = Polygon(ring)
        if not poly.is_valid:
            raise RuntimeError(f"invalid polygon for village {row['village_id']}")
        polys[row["village_id"]] = poly
    return polys


def cluster_table(sc, rng):
    """Sixty invented survey clusters with their displacement radius."""
    rows = []
    towns = sorted(sc.urban)
    start = dt.date(2021, 5, 10)
    coords = []
    for k in range(60):
        urban = k % 5 == 0  # 12 urban clusters
        for _ in range(10000):
            if urban:
                tx, ty = sc.positions[towns[(k // 5) % len(towns)]]
                x = tx + rng.uniform(-2.5, 2.5)
                y = ty + rng.uniform(-2.5, 2.5)
            else:
                x, y = rng.uniform(-48, 48), rng.uniform(-48, 48)
            ok = lake_radius(np.array(x), np.array(y)) > 1.2
            ok = ok and all(math.hypot(x - a, y - b) >= 1.0 for a, b in coords)
            if ok:
                break
        coords.append((x, y))
        lon, lat = to_lonlat(x, y)
        day = start + dt.timedelta(days=int(rng.integers(0, 110)))
        rows.append(
            {
                "cluster_id": f"{k + 1:03d}",
                "lon": f"{float(lon):.6f}",
                "lat": f"{float(lat):.6f}",
                "residence": "urban" if urban else "rural",
                "radius_m": "2000" if urban else "5000",
                "interview_date": day.isoformat(),
            }
        )
    return rows


def write_csv(path, rows):
    with open(path, "w", newline="", encoding="utf-8") as f:
        w = csv.DictWriter(f, fieldnames=list(rows[0]), lineterminator="\n")
        w.writeheader()
        w.writerows(rows)


def write_gpkg(path, rows, polys, rng):
    import geopandas as gpd

    # Features in a different order from villages.csv, so a join by position
    # instead of by id gives visibly wrong results.
    ids = [row["village_id"] for row in rows]
    order = rng.permutation(len(ids))
    ids = [ids[i] for i in order]
    gdf = gpd.GeoDataFrame({"village_id": ids}, geometry=[polys[i] for i in ids], crs="EPSG:4326")
    gdf["village_id"] = gdf["village_id"].astype(object)
    write_gpkg_frame(path, gdf, "village_areas")


def write_gpkg_frame(path, gdf, layer):
    import pyogrio

    if path.exists():
        path.unlink()
    # GDAL stamps gpkg_contents.last_change with the current time unless told.
    pyogrio.set_gdal_config_options({"OGR_CURRENT_DATE": GPKG_DATE})
    try:
        pyogrio.write_dataframe(gdf, path, layer=layer, driver="GPKG")
    finally:
        pyogrio.set_gdal_config_options({"OGR_CURRENT_DATE": None})


# ------------------------------------------------------ monthly series
# A coarse lat/lon grid (0.01 degree, ~1.1 km; 120 x 120 pixels over
# RASTER_BOUNDS) for the monthly rainfall and NDVI series: rainfall varies
# smoothly, and the small pixels of the other rasters would make 60 files
# too large for the package.
SERIES_RES_DEG = 0.01
RAIN_MONTHS = [(y, m) for y in (2019, 2020, 2021) for m in range(1, 13)]
NDVI_MONTHS = [(y, m) for y in (2020, 2021) for m in range(1, 13)]
RAIN_NODATA = -9999.0
NDVI_SERIES_NODATA = -3000
# Invented monthly rainfall of an average year (mm, January to December): a
# wet season from November to April, a dry season from June to September.
RAIN_CLIMATE_MM = (255.0, 270.0, 220.0, 130.0, 45.0, 12.0, 5.0, 6.0, 18.0, 60.0, 140.0, 215.0)
# Invented wetness of each year: 2020 wetter than usual, 2021 drier.
RAIN_YEAR_FACTOR = {2019: 1.00, 2020: 1.12, 2021: 0.88}
# Rainfall gaps (missing pixels): one month loses the whole 5 km buffer of a
# village, so windows over that month show QA window_gap; another has a gap
# in the margin that touches no buffer.
RAIN_GAP_VILLAGE = ("Elvanstock", (2021, 3), 7.0)  # name, month, radius (km)
RAIN_GAP_MARGIN = ((2019, 8), (-58.0, -56.0), 6.0)  # month, centre (km), radius (km)
# A cloud gap in the NDVI series, over part of one village's 5 km buffer.
NDVI_GAP = ("Pottersnare", (2021, 1), 4.0, 2.5)  # name, month, offset (km), radius (km)


def series_grid():
    return latlon_grid(SERIES_RES_DEG)


def _gap(x, y, cx, cy, radius_km, salt):
    """A round gap with a ragged edge (hashed texture on a 1.5 km lattice)."""
    rough = hash_unit(np.floor(x / 1.5), np.floor(y / 1.5), salt) - 0.5
    return np.hypot(x - cx, y - cy) < radius_km + 1.0 * rough


def make_rain_series(sc, rng):
    """Monthly rainfall (mm, float32) for 2019-01..2021-12; NaN in the gaps.

    Each month is the invented average of its calendar month times the
    year's wetness, a random factor for the month, a fixed spatial pattern
    (wetter in the north-west and near the river), a smooth storm pattern
    of its own and 3 % pixel noise; rounded to whole millimetres (exact in
    float32, so the files compress well).
    """
    transform, width, height = series_grid()
    x, y = pixel_centres_km(transform, width, height, "EPSG:4326")
    pattern = 1.0 + 0.18 * np.tanh((y - x) / 60.0) + 0.06 * sc.riparian(x, y)
    out = {}
    for k, (year, month) in enumerate(RAIN_MONTHS):
        level = RAIN_CLIMATE_MM[month - 1] * RAIN_YEAR_FACTOR[year] * rng.uniform(0.8, 1.2)
        broad = value_noise(x, y, 18.0, 100 + k)
        local = value_noise(x, y, 5.0, 200 + k)
        storms = 1.0 + 0.5 * broad + 0.2 * local
        rain = level * pattern * storms * rng.uniform(0.97, 1.03, x.shape)
        out[(year, month)] = np.round(np.maximum(rain, 0.0))
    name, when, radius = RAIN_GAP_VILLAGE
    out[when][_gap(x, y, *sc.positions[name], radius, 301)] = np.nan
    when, (cx, cy), radius = RAIN_GAP_MARGIN
    out[when][_gap(x, y, cx, cy, radius, 302)] = np.nan
    return {k: v.astype(np.float32) for k, v in out.items()}, transform


def make_ndvi_series(sc, rain):
    """Monthly NDVI x 10000 (int16) for 2020-01..2021-12; -3000 in a cloud gap.

    The invented land NDVI of the scenario (without fields, too fine for
    this grid) greens up with the rain of the two months before, and the
    lake stays negative. Stored to 0.001 NDVI (multiples of 10).
    """
    transform, width, height = series_grid()
    x, y = pixel_centres_km(transform, width, height, "EPSG:4326")
    veg = sc.vegetation(x, y)
    base = 0.40 + 0.24 * veg + 0.18 * sc.riparian(x, y)
    base -= 0.35 * np.minimum(sc.settlement(x, y, urban_only=False), 1.0)
    lake = lake_radius(x, y) < 1.0
    out = {}
    for year, month in NDVI_MONTHS:
        prev = [(year + (month - d - 1) // 12, (month - d - 1) % 12 + 1) for d in (1, 2)]
        wet = sum(np.nan_to_num(rain[p], nan=RAIN_CLIMATE_MM[p[1] - 1]) for p in prev) / 500.0
        ndvi = base + 0.16 * (np.clip(wet, 0.0, 1.2) - 0.5)
        ndvi = np.where(lake, -0.15, np.clip(ndvi, 0.02, 0.88))
        stored = (np.round(ndvi * 1000.0) * 10.0).astype(np.int16)
        out[(year, month)] = stored
    name, when, offset, radius = NDVI_GAP
    px, py = sc.positions[name]
    out[when][_gap(x, y, px + offset, py, radius, 303)] = NDVI_SERIES_NODATA
    return out, transform


def write_rain_cube(path, rain, transform):
    """The rainfall series as one NetCDF cube (CF conventions, deterministic bytes).

    Variable ``precip`` (time, lat, lon), latitude descending (north first,
    like the GeoTIFFs), a ``crs`` grid-mapping variable, monthly
    ``time_bnds``; gaps stored as the fill value -9999. No history or date
    attribute, so two runs give the same bytes.
    """
    import pandas as pd
    import xarray as xr
    from pyproj import CRS

    if path.exists():
        path.unlink()
    stack = np.stack([rain[k] for k in RAIN_MONTHS])
    _, height, width = stack.shape
    lon = np.round(transform.c + transform.a * (np.arange(width) + 0.5), 6)
    lat = np.round(transform.f + transform.e * (np.arange(height) + 0.5), 6)
    starts = pd.to_datetime([f"{y}-{m:02d}-01" for y, m in RAIN_MONTHS])
    ends = starts + pd.offsets.MonthBegin(1)
    mids = starts + (ends - starts) / 2
    ds = xr.Dataset(
        {
            "precip": (("time", "lat", "lon"), stack),
            "time_bnds": (("time", "nv"), np.stack([starts, ends], axis=1)),
            "crs": ((), np.int32(0)),
        },
        coords={"time": mids, "lat": lat, "lon": lon},
    )
    ds["precip"].attrs = {
        "long_name": "monthly rainfall total (invented)",
        "units": "mm",
        "cell_methods": "time: sum",
        "grid_mapping": "crs",
    }
    ds["crs"].attrs = {
        "grid_mapping_name": "latitude_longitude",
        "semi_major_axis": 6378137.0,
        "inverse_flattening": 298.257223563,
        "crs_wkt": CRS.from_epsg(4326).to_wkt(),
    }
    ds["time"].attrs = {"standard_name": "time", "axis": "T", "bounds": "time_bnds"}
    ds["lat"].attrs = {"standard_name": "latitude", "units": "degrees_north", "axis": "Y"}
    ds["lon"].attrs = {"standard_name": "longitude", "units": "degrees_east", "axis": "X"}
    ds.attrs = {
        "Conventions": "CF-1.8",
        "title": "Tamsin Vale monthly rainfall 2019-2021 (covextract demo scenario)",
        "comment": "invented values, not for analysis",
    }
    time_units = {"units": "days since 2019-01-01", "calendar": "standard", "dtype": "float64"}
    ds.to_netcdf(
        path,
        engine="netcdf4",
        format="NETCDF4",
        encoding={
            "precip": {
                "dtype": "float32",
                "_FillValue": np.float32(RAIN_NODATA),
                "zlib": True,
                "complevel": 9,
                "shuffle": True,
                "chunksizes": (1, height, width),
            },
            "time": time_units,
            "time_bnds": time_units,
            "lat": {"_FillValue": None},
            "lon": {"_FillValue": None},
            "crs": {"_FillValue": None},
        },
    )


def write_series(data_dir, sc):
    """Write the rainfall and NDVI series and the rainfall cube.

    Drawn from a generator of their own after every other file, so the
    earlier files keep their bytes.
    """
    from pyproj import CRS

    rng_series = np.random.default_rng([SEED, 3])
    rain, tr = make_rain_series(sc, rng_series)
    (data_dir / "rain").mkdir(exist_ok=True)
    for (year, month), values in rain.items():
        write_tif(
            data_dir / "rain" / f"rain_{year}{month:02d}.tif",
            np.where(np.isnan(values), np.float32(RAIN_NODATA), values),
            tr,
            CRS.from_epsg(4326),
            RAIN_NODATA,
            block=128,
            predictor=3,
            description=f"rainfall total {year}-{month:02d} (invented)",
            unit="mm",
        )
    write_rain_cube(data_dir / "rain_2019_2021.nc", rain, tr)
    ndvi, tr = make_ndvi_series(sc, rain)
    (data_dir / "ndvi_monthly").mkdir(exist_ok=True)
    for (year, month), values in ndvi.items():
        write_tif(
            data_dir / "ndvi_monthly" / f"ndvi_{year}{month:02d}.tif",
            values,
            tr,
            CRS.from_epsg(4326),
            NDVI_SERIES_NODATA,
            block=128,
            predictor=2,
            description=f"NDVI x 10000, {year}-{month:02d} (invented)",
            unit="NDVI x 10000, unitless",
        )


# ---------------------------------------------------------------- recipes
RECIPE_TEMPLATE = """\
# covextract recipe: the demo scenario (Tamsin Vale district, invented).
#
# EVERY VALUE IN THE DEMO DATA IS INVENTED. The district, its villages and all
# raster values were made up by demo_data/make_demo.py; the coordinates lie in
# open ocean on purpose, so no real community is described. Do not use any of
# it for analysis.
#
# A recipe answers three questions: which study records (here: 40 villages),
# which rasters (vegetation, surface temperature, night lights, land cover in
# 2015 and 2021), and which summaries of each raster to add as new columns.
# Relative paths are relative to the folder of this file.{header_note}

version: 1                      # recipe format version; always 1 for now

study:
  # The study table: one row per village. Cells are read as text and written
  # back unchanged in the output (ids such as "007", the note "NA", dates and
  # long decimals survive as they are).
  table: {prefix}villages.csv
  id: village_id                # unique key of each row, kept as text
  # Each village is a point given by two columns, in WGS84 longitude/latitude.
  points: {{x: lon, y: lat, crs: "EPSG:4326"}}
  date: visit_date              # date of the field visit, written YYYY-MM-DD

units:
  # The area each village is summarised over: a circle of 2 km radius around
  # its point. The circle is drawn on the ground (true metres on the WGS84
  # ellipsoid), whatever the raster's own coordinate system.
  buffer_m: 2000

layers:
  # One entry per raster, under a short name of your choice; the name starts
  # the output columns (ndvi_mean, ...). The rasters use three different
  # coordinate systems; the buffers are projected to each raster, the rasters
  # are never resampled.
  ndvi:
    # Vegetation index on a lat/lon grid (EPSG:4326, ~100 m pixels), stored
    # as NDVI x 10000 in 16-bit integers. The file carries no scale factor,
    # so the recipe gives it: NDVI = stored value x 0.0001.
    file: {prefix}ndvi_2021.tif
    kind: continuous            # a measured quantity (not land-cover classes)
    scale: 0.0001
    nodata: -3000               # stored code of cloud gaps: left out, never averaged
    unit: "NDVI, unitless"      # unit of the physical value, for the codebook
    # Where the layer comes from, copied into the codebook and manifest.
    source: "invented demo data (covextract demo scenario)"
    version: "demo 2021"
    citation: "invented demo data; not a real product, not for analysis"
    license: "invented demo data, distributed with covextract (MIT)"
  surface_temp:
    # Land surface temperature in kelvin on a UTM grid (EPSG:32731, 250 m).
    # Gaps are NaN in the file and count as missing; no nodata: key needed.
    file: {prefix}surface_temp_2021.tif
    unit: "K"
    source: "invented demo data (covextract demo scenario)"
    version: "demo 2021"
    citation: "invented demo data; not a real product, not for analysis"
    license: "invented demo data, distributed with covextract (MIT)"
  lights:
    # Night-time light radiance on a Web Mercator grid (EPSG:3857, ~500 m
    # nominal). The file declares its own nodata code (-1).
    file: {prefix}night_lights_2021.tif
    unit: "nW/cm2/sr"
    source: "invented demo data (covextract demo scenario)"
    version: "demo 2021"
    citation: "invented demo data; not a real product, not for analysis"
    license: "invented demo data, distributed with covextract (MIT)"
  cover_2015:
    # Land cover in 2015: one class code per pixel (8-bit integers) on the
    # same lat/lon grid as ndvi; 0 means no data (the file says so itself).
    # The legend below is invented for the demo; its codes were chosen not to
    # match any real land-cover product. Codes found in the file but missing
    # from classes are counted as "other" (with a warning).
    file: {prefix}land_cover_2015.tif
    kind: categorical           # class codes, not measured quantities
    classes: {classes}
    groups: {{tree_cover: [12, 21]}}   # orchard and forest, also counted together
    source: "invented demo data (covextract demo scenario)"
    version: "demo 2015"
    citation: "invented demo data; not a real product, not for analysis"
    license: "invented demo data, distributed with covextract (MIT)"
  cover_2021:
    # The same legend six years later, on the same grid: some forest became
    # fields or houses, and the towns grew.
    file: {prefix}land_cover_2021.tif
    kind: categorical
    classes: {classes}
    groups: {{tree_cover: [12, 21]}}
    source: "invented demo data (covextract demo scenario)"
    version: "demo 2021"
    citation: "invented demo data; not a real product, not for analysis"
    license: "invented demo data, distributed with covextract (MIT)"

  veg:
    # NDVI computed here from red and near-infrared reflectance (Rouse et al.
    # 1974), each band scaled to reflectance and its fill value 0 left out
    # before the index; division by zero gives nodata.
    bands:
      red: {{file: {prefix}red_2021.tif, scale: 0.0001, nodata: 0}}
      nir: {{file: {prefix}nir_2021.tif, scale: 0.0001, nodata: 0}}
    index: ndvi
    unit: "NDVI, unitless"
    source: "invented demo data (covextract demo scenario)"
  pop:
    # Invented population density, people per km2, on the red/NIR grid.
    file: {prefix}population_2021.tif
    unit: "people/km2"
    source: "invented demo data (covextract demo scenario)"

covariates:
  # Each entry adds columns named <layer>_<statistic>, plus one <layer>_qa
  # column that is empty when all is well and otherwise holds short reason
  # codes (explained in the codebook).
  - layer: ndvi
    # mean, std: weighted by the share of each pixel inside the buffer and by
    # each pixel's true ground area; q90: weighted 90th percentile (the
    # greenest tenth of the area); valid_share: share of the buffer's area
    # with a usable value. Two villages lose part of their buffer to clouds.
    stats: [mean, std, q90, valid_share]
    pixels: overlap             # overlap (partial pixels count by their share
                                # inside), center (pixel centre inside) or
                                # touched (every pixel the buffer touches)
  - layer: surface_temp
    stats: [mean, min, max]     # in kelvin; subtract 273.15 for degrees Celsius
  - layer: lights
    # density_total: radiance x pixel area (km2), summed over the buffer: a
    # proxy of settlement size. mean: average radiance. area_above: km2 of the
    # buffer brighter than the threshold below, which leaves out the dim
    # background glow.
    stats: [density_total, mean, area_above]
    threshold: 1.0              # nW/cm2/sr
  - layer: cover_2021
    # share: one column per class and group (cover_2021_share_forest, ...,
    # cover_2021_share_tree_cover) plus cover_2021_share_other for codes
    # outside the legend; the class shares and "other" add up to 1. dominant:
    # the class covering most of the buffer. shannon: Shannon diversity of the
    # classes, 0 when one class covers everything, higher for a finer mix.
    stats: [share, dominant, shannon]
  - layer: cover_2021
    name: cover_change          # columns cover_change_..., not cover_2021_...
    since: cover_2015           # compare with the 2015 map (same grid, same classes)
    # transition: cover_change_A_to_B, the share of the buffer that was A in
    # 2015 and is B in 2021 ("any" as A: any class other than B). net_change:
    # cover_change_net_<class>, 2021 share minus 2015 share, one column per
    # class and group.
    stats: [transition, net_change]
    pairs: [[forest, cropland], [any, built]]

  - layer: veg
    # NDVI from the bands, and the same weighted by where people live
    # (weight = share of pixel inside x pixel area x population density).
    stats: [mean, valid_share]
  - layer: veg
    name: veg_popw
    weight_by: pop
    stats: [mean]
  - layer: lights
    # Population proxy: each invented district total spread over its pixels
    # in proportion to light, then summed over the buffer. A proxy, not a count.
    name: pop_alloc
    stats: [allocated]
    reallocate:
      zones: {{file: {prefix}districts.gpkg, id: district_id}}
      totals: {{file: {prefix}district_totals.csv, id: district_id, column: population}}
  - layer: lights
    # Population proxy by calibration: log(households) = a + b log(light) fitted
    # on villages with a known count; prediction with a 95 % interval.
    name: hh_fit
    stats: [predicted]
    calibrate: {{known: households, light: density_total}}

output:
  table: out/villages_covariates.csv   # the study table with the new columns
  codebook: out/codebook.csv           # one row per new column: what it means
  # manifest: out/manifest.json        # inputs, versions and fingerprints
  drop: [lat, lon]                     # leave coordinates out of the shared table
"""


def recipe_text(prefix, header_note=""):
    classes = "{" + ", ".join(f"{c}: {lbl}" for c, lbl in LAND_COVER_CLASSES.items()) + "}"
    return RECIPE_TEMPLATE.format(prefix=prefix, header_note=header_note, classes=classes)


# ------------------------------------------------------------------- main
def build(data_dir: Path, recipes_dir: Path | None) -> dict[str, str]:
    from pyproj import CRS

    data_dir.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(SEED)
    sc = Scenario(rng)

    villages = village_table(sc, rng)
    write_csv(data_dir / "villages.csv", villages)
    polys = village_polygons(sc, villages, rng)
    write_gpkg(data_dir / "village_areas.gpkg", villages, polys, rng)
    write_csv(data_dir / "survey_clusters.csv", cluster_table(sc, rng))

    ndvi, tr, _, _ = make_ndvi(sc, rng)
    write_tif(
        data_dir / "ndvi_2021.tif",
        ndvi,
        tr,
        CRS.from_epsg(4326),
        -3000,
        block=256,
        predictor=2,
        description="NDVI x 10000 (invented)",
        unit="NDVI x 10000, unitless",
    )
    lst, tr, _, _ = make_surface_temp(sc, rng, "EPSG:32731")
    write_tif(
        data_dir / "surface_temp_2021.tif",
        lst,
        tr,
        CRS.from_epsg(32731),
        float("nan"),
        block=128,
        predictor=3,
        description="land surface temperature (invented)",
        unit="K",
    )
    lights, tr, _, _ = make_night_lights(sc, rng, "EPSG:3857")
    write_tif(
        data_dir / "night_lights_2021.tif",
        lights,
        tr,
        CRS.from_epsg(3857),
        -1.0,
        block=128,
        predictor=3,
        description="night-time light radiance (invented)",
        unit="nW/cm2/sr",
    )

    # The layers added later draw from their own generator, so the files
    # above keep their bytes whatever is added here.
    rng_more = np.random.default_rng([SEED, 2])
    early, late, frontier, tr = make_land_cover(sc)
    for year, cover in ((2015, early), (2021, late)):
        write_tif(
            data_dir / f"land_cover_{year}.tif",
            cover,
            tr,
            CRS.from_epsg(4326),
            LAND_COVER_NODATA,
            block=256,
            predictor=1,  # class codes: differencing neighbours does not help
            description=f"land cover {year}, invented legend: "
            + ", ".join(f"{c} = {lbl}" for c, lbl in LAND_COVER_CLASSES.items()),
            unit="class code",
        )
    red, nir, tr = make_red_nir(sc, rng_more, frontier)
    for band, values in (("red", red), ("nir", nir)):
        write_tif(
            data_dir / f"{band}_2021.tif",
            values,
            tr,
            CRS.from_epsg(4326),
            0,
            block=256,
            predictor=2,
            description=f"{band} reflectance x 10000 (invented)",
            unit="reflectance x 10000",
        )
    population, tr = make_population(sc, frontier)
    write_tif(
        data_dir / "population_2021.tif",
        population,
        tr,
        CRS.from_epsg(4326),
        -1.0,
        block=256,
        predictor=3,
        description="population density (invented)",
        unit="people per km2",
    )
    districts = district_polygons(sc)
    write_districts(data_dir / "districts.gpkg", districts)
    totals = district_totals(districts, population, tr)
    write_csv(
        data_dir / "district_totals.csv",
        [
            {"district_id": d, "population": str(n)}
            for (d, _), n in zip(DISTRICTS, totals, strict=True)
        ],
    )

    # The monthly series come last, from a generator of their own.
    write_series(data_dir, sc)

    (data_dir / "recipe.yaml").write_text(recipe_text(""), encoding="utf-8")
    if recipes_dir is not None:
        note = (
            "\n#\n# This copy lives in recipes/ and reads the demo data shipped in the"
            "\n# package; it is written by demo_data/make_demo.py from the same text as"
            "\n# covextract/demo/data/recipe.yaml, so edit the script, not this file."
            "\n# Run it from the repository root:  covextract run recipes/demo.yaml"
            "\n# (outputs go to recipes/out/)."
        )
        recipes_dir.mkdir(parents=True, exist_ok=True)
        (recipes_dir / "demo.yaml").write_text(
            recipe_text("../covextract/demo/data/", note), encoding="utf-8"
        )

    digests = {}
    for p in sorted(data_dir.rglob("*")):
        # Only the demo files: not a weights cache left by a run in the folder.
        if p.is_file() and not any(part.startswith(".") for part in p.relative_to(data_dir).parts):
            digests[p.relative_to(data_dir).as_posix()] = hashlib.sha256(p.read_bytes()).hexdigest()
    return digests


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument(
        "--data-dir",
        type=Path,
        default=DEFAULT_DATA_DIR,
        help="where to write the demo data (default: the package's data folder)",
    )
    parser.add_argument(
        "--recipes-dir",
        type=Path,
        default=DEFAULT_RECIPES_DIR,
        help="where to write recipes/demo.yaml (default: the repo's recipes/)",
    )
    parser.add_argument("--no-recipes", action="store_true", help="do not write recipes/demo.yaml")
    args = parser.parse_args(argv)
    digests = build(args.data_dir, None if args.no_recipes else args.recipes_dir)
    for name, digest in digests.items():
        size = (args.data_dir / name).stat().st_size
        print(f"{digest[:16]}  {size:>9,d}  {name}")


if __name__ == "__main__":
    main()
