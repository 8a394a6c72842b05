"""Population proxies: dasymetric reallocation of zone totals and the log-log light calibration.

Reallocation fixtures are tiny rasters whose allocations can be worked out by
hand; the volume-preservation checks follow Tobler (1979), JASA 74:519-530
(the pycnophylactic property: a zone's total spread over its pixels sums back
to the total). The calibration is checked against numpy.polyfit and
scipy.stats.linregress on the same log points, the smearing factor against
Duan (1983), JASA 78:605-610, and the prediction interval against the
textbook OLS prediction interval (common practice) with Student's t from
scipy.stats.t.
"""

from collections import Counter

import numpy as np
import pytest
from affine import Affine
from numpy.testing import assert_allclose, assert_array_equal
from pyproj import CRS, Geod
from scipy import stats
from shapely.geometry import Point, Polygon, box

from covextract.core.grid import Grid
from covextract.derive.calibration import CalibrationWarning, calibrate
from covextract.derive.reallocation import REALLOCATION_QA_CODES, ReallocationWarning, reallocate
from covextract.engine.zonal import build_weights
from covextract.errors import GeometryError, RasterError, RecipeError, TableError
from covextract.io.rasters import open_layer

X0, Y0, PX = 500_000.0, 8_700_000.0, 100.0
NODATA = -9999.0

# Light in nW·cm⁻²·sr⁻¹ (invented), 5 rows x 6 columns of 100 m pixels. The
# -0.3 is valid negative radiance (noise of a background-subtracted composite);
# NODATA is a gap. Row 4 lies outside every zone.
LIGHT = np.array(
    [
        [1.0, 2.0, 0.0, 0.0, 0.0, 0.0],
        [3.0, 4.0, 0.0, 0.0, 0.0, 0.0],
        [-0.3, NODATA, 0.0, 0.0, 0.0, 0.0],
        [5.0, 0.0, 0.0, 0.0, 0.0, 0.0],
        [7.0, 7.0, 7.0, 7.0, 7.0, 7.0],
    ]
)


class ArraySource:
    """An in-memory light layer with the engine's reader protocol, counting block reads."""

    def __init__(self, data, transform=None, crs=32731, block=(2, 4)):
        self.data = np.asarray(data, dtype=np.float64)
        t = transform or Affine(PX, 0, X0, 0, -PX, Y0)
        self.grid = Grid(t, self.data.shape[1], self.data.shape[0], CRS.from_epsg(crs), block)
        self.reads = Counter()

    def read_block(self, window):
        self.reads[window] += 1
        r0, c0, h, w = window
        return self.data[r0 : r0 + h, c0 : c0 + w]

    def to_values(self, stored):
        values = stored.astype(np.float64)
        return values, np.isfinite(values) & (stored != NODATA)


def cells(c0, r0, c1, r1):
    """A box given in pixel coordinates (columns c0..c1, rows r0..r1) of the fixture grid."""
    return box(X0 + PX * c0, Y0 - PX * r1, X0 + PX * c1, Y0 - PX * r0)


# Zone A: columns 0-2.5, rows 0-3.5 (cuts column 2 and row 3 in half), total 250.
# Zone B: columns 2.5-6, rows 0-4, no light at all (dark), total 70.
ZONES = [cells(0, 0, 2.5, 3.5), cells(2.5, 0, 6, 4)]
TOTALS = [250.0, 70.0]

# By hand, A (pixel areas are equal on this grid, so they cancel): Σ c·L over
# valid pixels = 1 + 2 + 3 + 4 + 0.5·5 = 12.5 (the -0.3 carries no weight,
# the gap none), i.e. 20 people per unit of light of a whole pixel. B is dark:
# its valid area is 0.5·4 + 12 = 14 pixels, i.e. 5 people per whole pixel.
PER_LIGHT_A = 250.0 / 12.5
PER_PIXEL_B = 70.0 / 14.0


def run(units, *, zones=ZONES, totals=TOTALS, source=None, **kw):
    kw.setdefault("threads", 1)
    return reallocate(source or ArraySource(LIGHT), zones, totals, units, **kw)


# ---------------------------------------------------------------- volume
def test_zone_totals_are_preserved_on_the_pixels():
    # Tobler (1979): the people allocated to a zone's pixels sum to its total.
    res = run([cells(0, 0, 1, 1)])
    assert_allclose(res.zone_allocated, TOTALS, rtol=1e-9)
    assert_array_equal(res.dark_zones, [1])
    assert res.unallocated_zones.size == 0
    assert_allclose(res.zone_valid_share, [7.75 / 8.75, 1.0], rtol=1e-12)  # the gap pixel
    area = res.zone_area_km2 / np.array([8.75, 14.0])  # km² of one pixel, both zones
    assert_allclose(area, area[0], rtol=1e-12)
    assert_allclose(res.zone_signal, [12.5 * area[0], 0.0], rtol=1e-12)


def test_units_partitioning_a_zone_sum_to_its_total():
    # Tobler (1979) volume preservation, with cuts that run through pixels.
    cut_a = [cells(0, 0, 0.7, 3.5), cells(0.7, 0, 2.5, 1.3), cells(0.7, 1.3, 2.5, 3.5)]
    cut_b = [cells(2.5, 0, 4.2, 4), cells(4.2, 0, 6, 2.6), cells(4.2, 2.6, 6, 4)]
    res = run(cut_a + cut_b)
    assert_allclose(res.values[:3].sum(), 250.0, rtol=1e-9)
    assert_allclose(res.values[3:].sum(), 70.0, rtol=1e-9)
    # A unit that straddles both zones is cut into pieces; units that
    # partition the zones' union sum to the sum of the totals.
    straddle = [cells(0, 0, 3.3, 2), cells(3.3, 0, 6, 2), cells(0, 2, 6, 4)]
    res = run(straddle)
    assert_allclose(np.nansum(res.values), 320.0, rtol=1e-9)
    assert res.n_pieces == 5


def test_unit_values_worked_out_by_hand():
    units = [
        ZONES[0],  # the whole of zone A
        cells(0, 0, 1, 3.5),  # column 0: 20·(1 + 3) + 20·0.5·5 = 130
        cells(1, 0, 2.5, 3.5),  # 20·(2 + 4) = 120
        cells(1, 0, 4, 2),  # 20·(2 + 4) from A; 4·0.5·5 + 2·5 from dark B = 135
        cells(0.5, 0.5, 1.5, 1.5),  # quarters of 4 pixels: 20·(1 + 2 + 3 + 4)/4 = 50
    ]
    res = run(units)
    assert_allclose(res.values, [250.0, 130.0, 120.0, 135.0, 50.0], rtol=1e-12)
    assert res.qa[:3] == [[], [], []]
    assert res.qa[3] == ["dark_zone"]  # overlapping units are fine: each gets its own share


def test_dark_zone_spreads_its_total_evenly_over_its_area():
    # By hand: 70 people over B's 14 pixel areas, 5 per pixel, whatever the light.
    units = [cells(3, 0, 4, 1), cells(2.5, 0, 3, 2), cells(3, 1, 5.5, 3.5), ZONES[1]]
    res = run(units)
    assert_allclose(res.values, [5.0, 2 * 0.5 * 5.0, 2.5 * 2.5 * 5.0, 70.0], rtol=1e-12)
    assert all(codes == ["dark_zone"] for codes in res.qa)
    assert_allclose(res.valid_share, 1.0, rtol=1e-12)


def test_unit_outside_every_zone_is_missing_not_zero():
    units = [
        cells(0, 4, 6, 5),  # row 4: lit, on the grid, but in no zone
        cells(20, 0, 21, 1),  # off the grid and off the zones
        cells(0, 3, 2, 5),  # half in zone A: 0.5·5·20 = 50 (people sit in the zone's half)
        cells(-1, 0, 1, 1),  # partly off the grid and outside the zones: 20·1
    ]
    res = run(units)
    assert np.isnan(res.values[0]) and res.qa[0] == ["outside_zones"]
    assert np.isnan(res.values[1]) and res.qa[1] == ["outside_layer"]
    assert_allclose(res.values[2], 50.0, rtol=1e-12)
    assert res.qa[2] == ["partly_outside_zones"]
    assert_allclose(res.values[3], PER_LIGHT_A * 1.0, rtol=1e-12)
    assert res.qa[3] == ["partly_outside_zones"]
    assert set(REALLOCATION_QA_CODES) >= {c for codes in res.qa for c in codes}


def test_nodata_pixels_receive_nothing_and_are_reported():
    units = [cells(1, 2, 2, 3), cells(1, 2, 2, 3.5), cells(0, 2, 1, 3)]
    res = run(units)
    assert np.isnan(res.values[0]) and res.qa[0] == ["no_valid_pixel"]
    # the gap pixel (1 area) and half of pixel (3, 1) (valid, unlit): share 0.5/1.5
    assert_allclose(res.values[1], 0.0, atol=1e-12)
    assert_allclose(res.valid_share[1], 0.5 / 1.5, rtol=1e-12)
    assert res.qa[1] == ["low_valid"]
    # negative radiance carries no people (threshold 0 by default)
    assert_allclose(res.values[2], 0.0, atol=1e-12)
    assert res.qa[2] == []


def test_lit_area_and_light_thresholds():
    units = [cells(0, 0, 1, 3.5), cells(1, 0, 2.5, 3.5)]
    # by hand, lit area above 2.5: pixels (1,0), (1,1) and half of (3,0): 2.5 pixels, 100 each
    res = run(units, by="lit_area", threshold=2.5)
    assert_allclose(res.values, [100.0 + 50.0, 100.0], rtol=1e-12)
    assert_allclose(res.zone_allocated, TOTALS, rtol=1e-9)
    assert_allclose(res.zone_signal[0] / res.zone_area_km2[0], 2.5 / 8.75, rtol=1e-12)
    # by hand, light above 2.5: 3 + 4 + 0.5·5 = 9.5
    res = run(units, by="light", threshold=2.5)
    assert_allclose(res.values, [250 * (3 + 2.5) / 9.5, 250 * 4 / 9.5], rtol=1e-12)
    # thresholds are strict (as area_above, DEVELOPERS.md): light 3 is not above 3, so
    # only (1,1) and half of (3,0) are lit: 1.5 pixels
    res = run(units, by="lit_area", threshold=3.0)
    assert_allclose(res.values, [0.5 * 250 / 1.5, 250 / 1.5], rtol=1e-12)
    # lit area with the default threshold: every pixel with light > 0 (5 pixels, one half)
    res = run(units, by="lit_area")
    assert_allclose(res.values, [250 * 2.5 / 4.5, 250 * 2 / 4.5], rtol=1e-12)


def test_light_is_weighted_by_true_pixel_area_on_a_latlon_grid():
    # Equal radiance on 1° pixels at 60-63° N: each row's share of the total is
    # its share of the ground area. Reference: pyproj Geod.geometry_area_perimeter
    # (Karney 2013, J. Geodesy 87:43-55), parallels densified so that the
    # geodesic edges follow them (error far below 1e-6).
    geod = Geod(ellps="WGS84")

    def geod_area(lat_top):
        lons = np.linspace(10.0, 12.0, 400)
        ring = [(x, lat_top) for x in lons] + [(x, lat_top - 1.0) for x in lons[::-1]]
        return abs(geod.geometry_area_perimeter(Polygon(ring))[0])

    src = ArraySource(np.ones((3, 2)), transform=Affine(1.0, 0, 10.0, 0, -1.0, 63.0), crs=4326)
    rows = [box(10.0, 62.0 - r, 12.0, 63.0 - r) for r in range(3)]
    res = reallocate(src, [box(10.0, 60.0, 12.0, 63.0)], [1000.0], rows, threads=1)
    ref = np.array([geod_area(63.0 - r) for r in range(3)])
    assert_allclose(res.values, 1000.0 * ref / ref.sum(), rtol=1e-6)
    assert_allclose(res.zone_area_km2, ref.sum() / 1e6, rtol=1e-6)


def _shapely_reallocation(light, zones, totals, units):
    """Independent reallocation with shapely intersection areas as pixel coverage.

    Pixel p's share of zone z is area(p ∩ z) / area(p) (the project's test
    oracle for coverage); the people of p ∩ z are uniform over it, so a unit
    gets T_z/S_z · Σ_p area(p ∩ z ∩ u)/area(p) · L(p) from each zone.
    """
    h, w = light.shape
    values = np.zeros(len(units))
    for z, zone in enumerate(zones):
        lit = np.where(light > 0, light, 0.0)
        cov = np.array(
            [
                [cells(c, r, c + 1, r + 1).intersection(zone).area / PX**2 for c in range(w)]
                for r in range(h)
            ]
        )
        factor = totals[z] / np.sum(cov * lit)
        for i, unit in enumerate(units):
            piece = unit.intersection(zone)
            pc = np.array(
                [
                    [cells(c, r, c + 1, r + 1).intersection(piece).area / PX**2 for c in range(w)]
                    for r in range(h)
                ]
            )
            values[i] += factor * np.sum(pc * lit)
    return values


def test_matches_an_independent_shapely_computation():
    rng = np.random.default_rng(7)
    light = rng.gamma(1.5, 4.0, size=(8, 10))
    light[rng.random(light.shape) < 0.3] = 0.0
    zones = [
        Polygon([(X0, Y0), (X0 + 430, Y0), (X0 + 610, Y0 - 800), (X0, Y0 - 800)]),
        Polygon([(X0 + 430, Y0), (X0 + 1000, Y0), (X0 + 1000, Y0 - 800), (X0 + 610, Y0 - 800)]),
    ]
    totals = [1234.0, 567.0]
    units = [
        Point(X0 + x, Y0 - y).buffer(r, quad_segs=16)
        for x, y, r in [(250, 300, 180), (520, 420, 230), (800, 650, 120), (540, 120, 90)]
    ]
    src = ArraySource(light, block=(4, 4))
    res = reallocate(src, zones, totals, units, threads=1)
    assert_allclose(res.values, _shapely_reallocation(light, zones, totals, units), rtol=1e-9)
    assert_allclose(res.zone_allocated, totals, rtol=1e-9)


# ---------------------------------------------------------------- engine use
def test_each_block_is_read_once_and_threads_do_not_change_values():
    # DESIGN.md invariants: each block read once per pass; fixed merge order.
    units = [cells(0.3, 0.2, 3.7, 2.9), cells(1, 1, 5, 4), cells(2, 0, 6, 1)]
    src1, src2 = ArraySource(LIGHT), ArraySource(LIGHT)
    one = reallocate(src1, ZONES, TOTALS, units, threads=1)
    two = reallocate(src2, ZONES, TOTALS, units, threads=2)
    assert set(src1.reads.values()) == {1}
    assert one.blocks_read == len(src1.reads) == 4  # row 4 holds no zone and no unit
    assert_array_equal(one.values, two.values)
    assert_array_equal(one.zone_allocated, two.zone_allocated)


def test_works_on_a_geotiff_layer(tmp_path, make_raster):
    transform = Affine(PX, 0, X0, 0, -PX, Y0)
    path = make_raster(tmp_path / "lights.tif", LIGHT.astype(np.float32), transform, nodata=NODATA)
    layer = open_layer(path)
    units = [cells(0, 0, 1, 3.5), cells(1, 0, 4, 2), cells(1, 2, 2, 3)]
    res = reallocate(layer, ZONES, TOTALS, units, threads=1)
    # the hand values of test_unit_values_worked_out_by_hand; the file's nodata is honoured
    assert_allclose(res.values, [130.0, 135.0, np.nan], rtol=1e-12)
    assert res.qa == [[], ["dark_zone"], ["no_valid_pixel"]]


def test_prebuilt_zone_weights_are_used_and_checked():
    src = ArraySource(LIGHT)
    ws = build_weights(np.array(ZONES, dtype=object), src.grid, "overlap")
    res = reallocate(src, ZONES, TOTALS, [ZONES[0]], zone_weights=ws, threads=1)
    assert_allclose(res.values, [250.0], rtol=1e-12)
    other = ArraySource(np.ones((3, 3)))
    with pytest.raises(RasterError, match="rebuild"):
        reallocate(other, ZONES, TOTALS, [ZONES[0]], zone_weights=ws, threads=1)


# ---------------------------------------------------------------- bad input
def test_zone_without_a_total_is_named():
    with pytest.raises(TableError, match=r"'South Vale' \(position 1\)"):
        run([ZONES[0]], totals=[250.0, np.nan], zone_ids=["North Fell", "South Vale"])
    with pytest.raises(TableError, match="zone 0"):
        run([ZONES[0]], totals=[np.inf, 3.0])


def test_negative_totals_and_wrong_counts_are_errors():
    with pytest.raises(TableError, match="negative total.*'North Fell'"):
        run([ZONES[0]], totals=[-5.0, 70.0], zone_ids=["North Fell", "South Vale"])
    with pytest.raises(TableError, match="3 zone totals were given for 2 zone polygons"):
        run([ZONES[0]], totals=[1.0, 2.0, 3.0])
    with pytest.raises(TableError, match="must be numbers"):
        run([ZONES[0]], totals=["many", 2.0])


def test_bad_geometries_and_settings_are_errors():
    with pytest.raises(GeometryError, match="no geometry.*zone 1"):
        run([ZONES[0]], zones=[ZONES[0], None])
    with pytest.raises(GeometryError, match="not polygons"):
        run([Point(X0 + 50, Y0 - 50)])
    bowtie = Polygon([(X0, Y0), (X0 + 200, Y0 - 200), (X0 + 200, Y0), (X0, Y0 - 200)])
    with pytest.raises(GeometryError, match="invalid"):
        run([bowtie])
    with pytest.raises(RecipeError, match="light, lit_area"):
        run([ZONES[0]], by="people")
    with pytest.raises(RecipeError, match=">= 0"):
        run([ZONES[0]], threshold=-1.0)
    with pytest.raises(RecipeError, match="pixel rule"):
        run([ZONES[0]], rule="nearest")


def test_zone_off_the_layer_is_unallocated_with_a_warning():
    zones = ZONES + [cells(30, 0, 32, 2)]
    with pytest.warns(ReallocationWarning, match="not placed: zone 2"):
        res = run([ZONES[0]], zones=zones, totals=TOTALS + [40.0])
    assert_array_equal(res.unallocated_zones, [2])
    assert_allclose(res.zone_allocated, [250.0, 70.0, 0.0], rtol=1e-9)
    assert res.zone_valid_share[2] == 0.0
    assert_allclose(res.values, [250.0], rtol=1e-12)


def test_zone_half_off_the_layer_warns_and_codes_its_units():
    # By hand: 60 people over the 3 x 4 on-grid pixels of a zone 7 x 4 in size, 5 per pixel.
    src = ArraySource(np.ones((5, 6)))
    zone = [cells(3, 0, 10, 4)]
    with pytest.warns(ReallocationWarning, match="less than 50%"):
        res = reallocate(src, zone, [60.0], [cells(5, 0, 7, 1), cells(3, 0, 4, 1)], threads=1)
    assert_allclose(res.zone_valid_share, [3 / 7], rtol=1e-12)
    assert_allclose(res.zone_allocated, [60.0], rtol=1e-9)
    assert_allclose(res.values, [5.0, 5.0], rtol=1e-12)
    assert res.qa == [["partly_outside", "zone_low_valid"], ["zone_low_valid"]]
    assert_allclose(res.valid_share, [0.5, 1.0], rtol=1e-12)


def test_overlapping_zones_warn():
    zones = [cells(0, 0, 3, 4), cells(2, 0, 6, 4)]
    with pytest.warns(ReallocationWarning, match="overlap"):
        res = run([cells(0, 0, 6, 4)], zones=zones)
    assert_allclose(res.zone_overlap_share, 4.0 / 28.0, rtol=1e-12)


def test_empty_unit_gets_a_missing_value_without_a_code():
    res = run([None, ZONES[0]])
    assert np.isnan(res.values[0]) and res.qa[0] == []
    assert_allclose(res.values[1], 250.0, rtol=1e-12)
    none = run([ZONES[0]], zones=[], totals=[])  # no zone at all: every unit outside them
    assert np.isnan(none.values[0]) and none.qa == [["outside_zones"]]
    no_units = run([])
    assert no_units.values.size == 0
    assert_allclose(no_units.zone_allocated, TOTALS, rtol=1e-9)


# ================================================================ calibration
def _calibration_data():
    """Invented villages: log(pop) = 2 + 0.8·log(light) + noise; a few unlit or unknown."""
    rng = np.random.default_rng(20240611)
    light = np.exp(rng.uniform(np.log(0.5), np.log(500.0), 40))
    light[0] = 1.0  # log(light) = 0: the prediction there is the intercept
    pop = np.exp(2.0 + 0.8 * np.log(light) + rng.normal(0.0, 0.3, light.size))
    light = np.append(light, [0.0, -0.2, np.nan, 3.0, 30.0])
    pop = np.append(pop, [120.0, 80.0, 60.0, np.nan, 0.0])  # three unlit, one unknown, one zero
    return light, pop


def test_fit_equals_polyfit_and_linregress():
    light, pop = _calibration_data()
    cal = calibrate(light, pop)
    x, y = np.log(light[:40]), np.log(pop[:40])
    b_ref, a_ref = np.polyfit(x, y, 1)  # numpy.polyfit, least squares
    lr = stats.linregress(x, y)  # scipy.stats.linregress
    assert cal.n == 40 and cal.df == 38
    assert_allclose([cal.a, cal.b], [a_ref, b_ref], rtol=1e-10)
    assert_allclose([cal.a, cal.b], [lr.intercept, lr.slope], rtol=1e-10)
    assert_allclose(cal.r2, lr.rvalue**2, rtol=1e-10)
    resid = y - np.polyval([b_ref, a_ref], x)
    assert_allclose(cal.rmse, np.sqrt(np.mean(resid**2)), rtol=1e-10)
    # linregress: stderr of the slope = s / sqrt(Sxx)
    sxx = np.sum((x - x.mean()) ** 2)
    assert_allclose(cal.residual_se, lr.stderr * np.sqrt(sxx), rtol=1e-10)
    assert cal.light_range == (light[:40].min(), light[:40].max())
    assert set(cal.summary()) == {
        "a",
        "b",
        "r2",
        "rmse",
        "n",
        "smearing",
        "light_min",
        "light_max",
        "level",
    }


def test_smearing_factor_is_duans_formula():
    # Duan (1983), JASA 78:605-610: E[pop | x] ≈ exp(a + b·x) · mean(exp(residual)).
    light, pop = _calibration_data()
    cal = calibrate(light, pop)
    x, y = np.log(light[:40]), np.log(pop[:40])
    b_ref, a_ref = np.polyfit(x, y, 1)
    smear = np.mean(np.exp(y - (a_ref + b_ref * x)))
    assert_allclose(cal.smearing, smear, rtol=1e-10)
    est, _, _, qa = cal.predict([10.0])
    assert_allclose(est, np.exp(a_ref + b_ref * np.log(10.0)) * smear, rtol=1e-10)
    assert qa == [[]]


def test_prediction_interval_is_the_ols_prediction_interval():
    # Textbook OLS prediction interval (common practice):
    # ŷ ± t_{(1+level)/2, n-2} · s · sqrt(1 + 1/n + (x0 - x̄)²/Sxx), back-transformed by exp.
    light, pop = _calibration_data()
    cal = calibrate(light, pop, level=0.9)
    x, y = np.log(light[:40]), np.log(pop[:40])
    lr = stats.linregress(x, y)
    n = x.size
    s = np.sqrt(np.sum((y - lr.intercept - lr.slope * x) ** 2) / (n - 2))
    t = stats.t.ppf(0.95, n - 2)  # scipy.stats.t quantile
    x0 = np.log(np.array([2.0, 40.0, 400.0]))
    yhat = lr.intercept + lr.slope * x0
    se = s * np.sqrt(1 + 1 / n + (x0 - x.mean()) ** 2 / np.sum((x - x.mean()) ** 2))
    _, lo, hi, _ = cal.predict(np.exp(x0))
    assert_allclose(lo, np.exp(yhat - t * se), rtol=1e-10)
    assert_allclose(hi, np.exp(yhat + t * se), rtol=1e-10)
    # At light 1 (x0 = 0) the predicted mean is the intercept, whose standard
    # error scipy reports: se_pred² = s² + intercept_stderr².
    _, lo1, hi1, _ = cal.predict([1.0])
    se0 = np.sqrt(s**2 + lr.intercept_stderr**2)
    assert_allclose(
        [lo1[0], hi1[0]], np.exp(lr.intercept + np.array([-1, 1]) * t * se0), rtol=1e-10
    )


def test_unlit_units_are_left_out_and_get_no_prediction():
    light, pop = _calibration_data()
    cal = calibrate(light, pop)
    assert_array_equal(cal.used, np.r_[np.ones(40, bool), np.zeros(5, bool)])
    assert cal.n_unlit == 3 and cal.n_zero_known == 1
    # same fit as on the lit, known points alone
    alone = calibrate(light[:40], pop[:40])
    assert_allclose([cal.a, cal.b, cal.smearing], [alone.a, alone.b, alone.smearing], rtol=1e-12)
    est, lo, hi, qa = cal.predict([0.0, -0.2, np.nan, 3.0])
    assert np.isnan(est[:3]).all() and np.isnan(lo[:3]).all() and np.isnan(hi[:3]).all()
    assert qa == [["unlit"], ["unlit"], ["no_light_value"], []]
    assert lo[3] < est[3] < hi[3]


def test_few_calibrating_units_warn_and_too_few_are_an_error():
    light = np.array([1.0, 5.0, 20.0, 80.0, 300.0])
    pop = np.array([10.0, 30.0, 90.0, 200.0, 700.0])
    with pytest.warns(CalibrationWarning, match="only 5 units.*fewer than 10"):
        cal = calibrate(light, pop)
    assert cal.n == 5
    calibrate(light, pop, min_units=5)  # no warning at the bound
    with pytest.raises(TableError, match="only 2 unit"):
        calibrate([1.0, 5.0, 0.0, 7.0], [10.0, 30.0, 50.0, np.nan])
    with pytest.raises(TableError, match="same light"):
        calibrate([4.0, 4.0, 4.0], [10.0, 30.0, 50.0], min_units=3)


def test_extrapolation_warns_and_is_coded():
    light, pop = _calibration_data()
    cal = calibrate(light, pop)
    lo, hi = cal.light_range
    with pytest.warns(CalibrationWarning, match="2 of 3 predictions extrapolate"):
        est, low, up, qa = cal.predict([lo / 2, np.sqrt(lo * hi), hi * 3])
    assert qa == [["extrapolated"], [], ["extrapolated"]]
    assert np.isfinite(est).all() and (low < up).all()


def test_calibration_input_errors():
    with pytest.raises(TableError, match="negative"):
        calibrate([1.0, 2.0, 3.0], [5.0, -1.0, 7.0])
    with pytest.raises(TableError, match="3 light values but 2 known counts"):
        calibrate([1.0, 2.0, 3.0], [5.0, 7.0])
    with pytest.raises(RecipeError, match=r"\(0, 1\)"):
        calibrate([1.0, 2.0, 3.0], [5.0, 6.0, 7.0], level=95)
