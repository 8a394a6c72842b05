"""Categorical layers: class shares and transitions against per-pixel computations."""

import numpy as np
import pytest
import rasterio
from affine import Affine
from numpy.testing import assert_allclose
from shapely.geometry import box

from covextract.engine.categorical import ClassTable
from covextract.engine.zonal import zonal
from covextract.errors import RasterError
from covextract.io.rasters import open_layer

CLASSES = {1: "cropland", 2: "forest", 3: "grassland", 4: "built", 5: "water"}
GROUPS = {"green": [2, 3]}
T = Affine(10.0, 0, 300_000.0, 0, -10.0, 6_000_000.0)


def _write(path, data, transform=T, nodata=None):
    h, w = data.shape
    with rasterio.open(
        path,
        "w",
        driver="GTiff",
        width=w,
        height=h,
        count=1,
        dtype=data.dtype,
        crs="EPSG:32633",
        transform=transform,
        nodata=nodata,
        tiled=True,
        blockxsize=16,
        blockysize=16,
    ) as ds:
        ds.write(data, 1)
    return path


def _shapely_shares(data, poly, nodata=None):
    """Independent reference: per-pixel shapely intersection areas (shapely 2)."""
    h, w = data.shape
    areas = {}
    total = 0.0
    for r in range(h):
        for c in range(w):
            x0, y1 = T * (c, r)
            x1, y0 = T * (c + 1, r + 1)
            a = box(x0, y0, x1, y1).intersection(poly).area
            if a <= 0 or data[r, c] == nodata:
                continue
            areas[data[r, c]] = areas.get(data[r, c], 0.0) + a
            total += a
    return {k: v / total for k, v in areas.items()}


@pytest.fixture
def cover(tmp_path):
    rng = np.random.default_rng(11)
    data = rng.choice([1, 2, 3, 4, 5, 9], size=(40, 40), p=[0.3, 0.25, 0.15, 0.1, 0.1, 0.1]).astype(
        np.uint8
    )
    data[:3, :] = 255
    return _write(tmp_path / "cover.tif", data, nodata=255), data


def test_shares_equal_per_pixel_reference(cover):
    path, data = cover
    src = open_layer(path)
    table = ClassTable.from_mapping(CLASSES)
    polys = [
        box(300_013, 5_999_650, 300_287, 5_999_981),
        box(300_100.5, 5_999_700.5, 300_399, 5_999_999),
    ]
    res = zonal(
        src,
        np.array(polys, dtype=object),
        ["share", "dominant", "classes_present", "shannon", "valid_share"],
        categorical={"table": table, "groups": GROUPS},
        area_weighting="off",
    )
    for i, poly in enumerate(polys):
        ref = _shapely_shares(data, poly, nodata=255)
        for code, label in CLASSES.items():
            assert_allclose(res.values[f"share_{label}"][i], ref.get(code, 0.0), atol=1e-9)
        assert_allclose(res.values["share_other"][i], ref.get(9, 0.0), atol=1e-9)
        assert_allclose(res.values["share_green"][i], ref.get(2, 0) + ref.get(3, 0), atol=1e-9)
        total = (
            sum(res.values[f"share_{lbl}"][i] for lbl in CLASSES.values())
            + res.values["share_other"][i]
        )
        assert_allclose(total, 1.0, atol=1e-12)
        # Shannon (1948): H = -sum p ln p
        p = np.array([v for v in ref.values() if v > 0])
        assert_allclose(res.values["shannon"][i], -(p * np.log(p)).sum(), atol=1e-9)
        assert res.values["classes_present"][i] == len(p)
        best = max(ref.items(), key=lambda kv: (kv[1], -int(kv[0])))[0]
        assert res.values["dominant"][i] == CLASSES.get(best, "other")
    assert res.unknown_codes == [9.0]
    # the second box reaches the nodata rows: they leave the denominator, not the shares
    assert res.values["valid_share"][1] < 1.0


def test_float_codes_and_ties(tmp_path):
    data = np.array([[1.0, 1.0], [2.0, 2.0]], dtype=np.float32)
    path = _write(tmp_path / "f.tif", data, transform=Affine(1, 0, 0, 0, -1, 2))
    res = zonal(
        open_layer(path),
        np.array([box(0, 0, 2, 2)], dtype=object),
        ["share", "dominant"],
        categorical={"table": ClassTable.from_mapping({1: "a", 2: "b"}), "groups": {}},
    )
    assert_allclose([res.values["share_a"][0], res.values["share_b"][0]], [0.5, 0.5])
    assert res.values["dominant"][0] == "a"  # tie: the lowest code wins


def test_transition_with_zero_net_change(tmp_path):
    # 20 % of the area changes forest -> cropland and another 20 % cropland -> forest:
    # net change is zero while 40 % of the area changed class (worked out by hand).
    earlier = np.ones((10, 10), dtype=np.uint8)
    earlier[:, 5:] = 2
    later = earlier.copy()
    later[:2, 5:] = 1  # 10 pixels forest -> cropland
    later[2:4, :5] = 2  # 10 pixels cropland -> forest
    p_late = _write(tmp_path / "late.tif", later)
    p_early = _write(tmp_path / "early.tif", earlier)
    unit = np.array([box(300_000, 5_999_900, 300_100, 6_000_000)], dtype=object)
    table = ClassTable.from_mapping({1: "cropland", 2: "forest", 4: "built"})
    res = zonal(
        open_layer(p_late),
        unit,
        ["transition", "net_change", "share"],
        categorical={
            "table": table,
            "groups": {},
            "earlier": open_layer(p_early),
            "pairs": [("forest", "cropland"), ("cropland", "forest"), ("any", "built")],
        },
    )
    v = res.values
    assert_allclose(v["transition_forest_to_cropland"], [0.1])
    assert_allclose(v["transition_cropland_to_forest"], [0.1])
    assert_allclose(v["transition_any_to_built"], [0.0])
    assert_allclose(v["net_change_forest"], [0.0], atol=1e-15)
    assert_allclose(v["net_change_cropland"], [0.0], atol=1e-15)
    assert_allclose(v["share_forest"], [0.5])


def test_transition_layers_on_different_grids_are_refused(tmp_path):
    a = _write(tmp_path / "a.tif", np.ones((10, 10), np.uint8))
    b = _write(
        tmp_path / "b.tif",
        np.ones((10, 10), np.uint8),
        transform=Affine(20.0, 0, 300_000, 0, -20.0, 6_000_000),
    )
    unit = np.array([box(300_000, 5_999_950, 300_050, 6_000_000)], dtype=object)
    with pytest.raises(RasterError, match="not on the same grid.*10x10.*Warp"):
        zonal(
            open_layer(a),
            unit,
            ["transition"],
            categorical={
                "table": ClassTable.from_mapping({1: "x"}),
                "earlier": open_layer(b),
                "pairs": [("x", "x")],
            },
        )
