"""Band-math expressions: published index formulas and a refusal of anything else."""

import numpy as np
import pytest
from numpy.testing import assert_allclose

from covextract.errors import RecipeError
from covextract.sources.expression import parse_expression


def test_ndvi_of_reflectance_pairs_equals_the_formula():
    # Rouse et al. (1974): NDVI = (NIR - Red) / (NIR + Red), in [-1, 1]. Reflectance pairs
    # typical of dense vegetation, bare soil and water (values common practice, from memory).
    nir = np.array([0.50, 0.30, 0.02])
    red = np.array([0.08, 0.25, 0.05])
    ndvi = parse_expression("ndvi", ["nir", "red"])({"nir": nir, "red": red})
    assert_allclose(ndvi, (nir - red) / (nir + red))
    assert_allclose(ndvi, [0.42 / 0.58, 0.05 / 0.55, -0.03 / 0.07])
    assert np.all((ndvi >= -1) & (ndvi <= 1))


def test_evi_equals_the_published_formula():
    # Huete et al. (2002): EVI = 2.5 (NIR - Red) / (NIR + 6 Red - 7.5 Blue + 1)
    nir, red, blue = np.array([0.45]), np.array([0.06]), np.array([0.04])
    evi = parse_expression("evi", ["nir", "red", "blue"])({"nir": nir, "red": red, "blue": blue})
    assert_allclose(evi, 2.5 * 0.39 / (0.45 + 0.36 - 0.30 + 1))


def test_user_expression_and_functions():
    expr = parse_expression("where(nir > 0.1, sqrt(nir) - red, 0)", ["nir", "red"])
    out = expr({"nir": np.array([0.04, 0.25]), "red": np.array([0.1, 0.1])})
    assert_allclose(out, [0.0, 0.4])
    assert expr.bands == ("nir", "red")


def test_division_by_zero_gives_nodata_not_inf():
    expr = parse_expression("(nir - red) / (nir + red)", ["nir", "red"])
    out = expr({"nir": np.array([0.0, 0.2]), "red": np.array([0.0, -0.2])})
    assert np.isnan(out).all()


@pytest.mark.parametrize(
    "text,why",
    [
        ("nir.__class__", "double underscores"),
        ("nir.real", "Attribute is not allowed"),
        ("__import__('os')", "double underscores"),
        ("open('x')", "only these functions may be called"),
        ("(lambda: 1)()", "only these functions"),
        ("[nir for nir in red]", "not allowed"),
        ("nir[0]", "Subscript is not allowed"),
        ("swir - red", "'swir' is not a band of this layer"),
        ("nirr - red", "did you mean 'nir'"),
        ("nir +", "syntax error"),
        ("'text'", "only numbers"),
        ("sqrt", "must be called"),
        ("where(nir, red, x=1)", "keyword arguments"),
        ("nir @ red", "MatMult is not allowed"),
    ],
)
def test_anything_beyond_arithmetic_is_refused(text, why):
    with pytest.raises(RecipeError, match=why):
        parse_expression(text, ["nir", "red"], key="layers.veg.expression")
