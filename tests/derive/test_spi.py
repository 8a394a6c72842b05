"""Standardized precipitation index against an independent scipy computation.

Method: McKee, Doesken & Kleist (1993); WMO-No. 1090 (2012). The reference
below fits scipy.stats.gamma (floc=0) per calendar month to pandas rolling
totals, mixes the zero share back in and takes scipy.stats.norm.ppf.
"""

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from scipy import stats

from covextract.derive.spi import (
    SPI_CATEGORIES,
    ShortBaselineWarning,
    fit_gamma,
    spi,
    spi_category,
)
from covextract.errors import CovextractWarning, TableError


def monthly_panel(values, first="1981-01"):
    values = np.atleast_2d(np.asarray(values, dtype=float))
    starts = pd.period_range(first, periods=values.shape[1], freq="M")
    return pd.DataFrame(
        {
            "unit": np.repeat(np.arange(values.shape[0]), values.shape[1]),
            "start": np.tile(starts.start_time, values.shape[0]),
            "end": np.tile(starts.end_time.normalize(), values.shape[0]),
            "value": values.reshape(-1),
        }
    )


def reference_spi(series, months, first_year, last_year):
    """SPI of one unit's monthly series with scipy.stats.gamma.fit(floc=0) and norm.ppf."""
    totals = series.rolling(months, min_periods=months).sum()
    out = pd.Series(np.nan, index=series.index)
    for m in range(1, 13):
        this = totals[totals.index.month == m]
        base = this[(this.index.year >= first_year) & (this.index.year <= last_year)].dropna()
        q = (base == 0).mean()
        a, _loc, scale = stats.gamma.fit(base[base > 0].to_numpy(), floc=0)
        h = q + (1 - q) * stats.gamma.cdf(this.to_numpy(), a, loc=0, scale=scale)
        h = np.where(this.to_numpy() == 0, q, h)
        out[this.index] = stats.norm.ppf(h)
    return out


def rain(rng, n_units, years, zero_share=0.0):
    """Invented monthly rain (mm): a seasonal gamma, some months dry."""
    months = np.arange(12 * years)
    scale = 40.0 + 30.0 * np.sin(2 * np.pi * (months % 12) / 12)
    v = rng.gamma(2.5, 1.0, (n_units, len(months))) * scale
    v[rng.random(v.shape) < zero_share] = 0.0
    return v


@pytest.mark.parametrize("months", [1, 3, 6, 12])
def test_spi_matches_an_independent_scipy_computation(months):
    rng = np.random.default_rng(20 + months)
    v = rain(rng, 3, 32, zero_share=0.08)
    v[1, 100] = np.nan  # a missing month: the totals that include it are missing
    panel = monthly_panel(v, first="1981-01")
    res = spi(panel, months=months, baseline=(1981, 2010))
    index = pd.period_range("1981-01", periods=v.shape[1], freq="M").to_timestamp()
    for u in range(3):
        got = res[res["unit"] == u]
        expected = reference_spi(pd.Series(v[u], index=index), months, 1981, 2010)
        assert_allclose(
            got["value"].to_numpy(), expected.to_numpy(), rtol=1e-8, atol=1e-8, equal_nan=True
        )
        totals = pd.Series(v[u], index=index).rolling(months, min_periods=months).sum()
        assert_allclose(got["total"].to_numpy(), totals.to_numpy(), rtol=1e-12, equal_nan=True)
    assert (res["value"].notna() | res["qa"].map(len).gt(0)).all()  # every gap has a reason


def test_baseline_spi_has_mean_zero_and_sd_one_without_dry_months():
    # For calendar months without a zero total, the SPI of the baseline totals themselves is
    # close to N(0, 1). Tolerance 0.1 on both the mean and the standard deviation (ddof=1):
    # over 5000 simulated baselines of 30 gamma totals (shapes 0.8 to 8) the largest
    # deviations we measured were 0.08 for the mean and 0.06 for the sd.
    rng = np.random.default_rng(7)
    v = rain(rng, 4, 30)
    res = spi(monthly_panel(v, first="1991-01"), months=3, baseline=(1991, 2020))
    res["month"] = res["start"].dt.month
    checked = 0
    for (_u, _m), g in res.groupby(["unit", "month"]):
        x = g["value"].dropna()
        if (g["total"] == 0).any():
            continue
        assert_allclose(x.mean(), 0.0, rtol=0, atol=0.1)
        assert_allclose(x.std(ddof=1), 1.0, rtol=0, atol=0.1)
        checked += 1
    assert checked == 48


def test_fit_gamma_equals_scipy_maximum_likelihood():
    rng = np.random.default_rng(1)
    for shape in (0.4, 1.0, 3.0, 40.0):
        x = rng.gamma(shape, 12.0, 40)
        x[:3] = 0.0
        q, a, b, n = fit_gamma(x)
        a_ref, _, b_ref = stats.gamma.fit(x[x > 0], floc=0)  # scipy.stats.gamma, exact MLE
        assert_allclose([a, b], [a_ref, b_ref], rtol=1e-9)
        assert_allclose(q, 3 / 40, rtol=0, atol=0)
        assert n == 40


def test_category_boundaries_are_half_open():
    # WMO-No. 1090 categories (from memory; see covextract.derive.spi.SPI_CATEGORIES).
    cases = {
        2.0: "extremely wet",
        np.nextafter(2.0, 0): "very wet",
        1.5: "very wet",
        np.nextafter(1.5, 0): "moderately wet",
        1.0: "moderately wet",
        np.nextafter(1.0, 0): "near normal",
        0.0: "near normal",
        np.nextafter(-1.0, 0): "near normal",
        -1.0: "moderately dry",
        np.nextafter(-1.5, 0): "moderately dry",
        -1.5: "severely dry",
        np.nextafter(-2.0, 0): "severely dry",
        -2.0: "extremely dry",
        np.inf: "extremely wet",
        -np.inf: "extremely dry",
    }
    got = spi_category(list(cases))
    assert got.tolist() == list(cases.values())
    assert spi_category([np.nan]).tolist() == [None]
    assert set(spi_category(np.linspace(-4, 4, 8001))) == set(SPI_CATEGORIES)  # no gaps


def test_short_baselines_warn_and_very_short_ones_are_refused():
    rng = np.random.default_rng(3)
    panel = monthly_panel(rain(rng, 1, 20), first="2001-01")
    with pytest.warns(ShortBaselineWarning, match="only 20 complete years"):
        res = spi(panel, months=1, baseline=(2001, 2020))
    assert res["value"].notna().all()
    assert issubclass(ShortBaselineWarning, CovextractWarning)
    with pytest.raises(TableError, match="has 9 complete years in the series.*at least 10"):
        spi(panel, months=1, baseline=(2012, 2030))
    with pytest.warns(ShortBaselineWarning, match="only 10 complete years"):
        spi(panel, months=1, baseline=(2011, 2020))
    with pytest.raises(ValueError, match="min_years must be an integer ≥ 10"):
        spi(panel, months=1, baseline=(2001, 2020), min_years=5)


def test_spi_qa_codes():
    rng = np.random.default_rng(9)
    v = rain(rng, 3, 31)
    v[0, 50] = np.nan
    v[1, 0::12] = 0.0  # unit 1: every January dry
    v[2, 5] = 0.0  # unit 2: one dry June 1991
    panel = monthly_panel(v, first="1991-01")
    res = spi(panel, months=3, baseline=(1992, 2021))
    u0 = res[res["unit"] == 0].reset_index(drop=True)
    assert u0["qa"][0] == u0["qa"][1] == ("window_outside_series",)
    assert u0["qa"][2] == ()
    assert [u0["qa"][i] for i in (50, 51, 52)] == [("window_gap",)] * 3
    assert u0["qa"][53] == ()
    # Unit 1, SPI-1 of a January that never rains: no fit.
    r1 = spi(panel, months=1, baseline=(1992, 2021))
    jan = r1[(r1["unit"] == 1) & (r1["start"].dt.month == 1)]
    assert jan["value"].isna().all() and jan["qa"].map(lambda c: c == ("no_fit",)).all()
    # Unit 2: a zero in June 1991, before the baseline, where the baseline has none.
    dry = r1[(r1["unit"] == 2) & (r1["start"] == pd.Timestamp("1991-06-01"))].iloc[0]
    assert np.isnan(dry["value"]) and dry["qa"] == ("beyond_fit",)
    assert dry["category"] == "extremely dry"


def test_short_baseline_per_unit_and_month():
    rng = np.random.default_rng(4)
    v = rain(rng, 2, 30)
    v[1, 0 : 12 * 21 : 12] = np.nan  # unit 1: 21 of 30 Januaries missing
    # The series holds all 30 baseline years (no warning); unit 1 lacks the values.
    res = spi(monthly_panel(v, first="1991-01"), months=1, baseline=(1991, 2020), min_years=10)
    jan1 = res[(res["unit"] == 1) & (res["start"].dt.month == 1)]
    assert jan1["value"].isna().all()
    assert jan1["qa"].map(lambda c: "short_baseline" in c).all()
    assert res[(res["unit"] == 0)]["value"].notna().all()


def test_bad_spi_input():
    rng = np.random.default_rng(5)
    v = rain(rng, 1, 30)
    v[0, 7] = -1.0
    with pytest.raises(TableError, match="must be ≥ 0; unit 0 has -1.0 for the period 1991-08-01"):
        spi(monthly_panel(v, first="1991-01"), months=3, baseline=(1991, 2020))
    with pytest.raises(ValueError, match="months=2 is not supported; use one of 1, 3, 6, 12"):
        spi(monthly_panel(np.abs(v), first="1991-01"), months=2, baseline=(1991, 2020))
    days = pd.date_range("1991-01-01", periods=40, freq="D")
    daily = pd.DataFrame({"unit": 0, "start": days, "end": days, "value": 1.0})
    with pytest.raises(TableError, match=r"collapse\(panel, into='month', how='sum'\)"):
        spi(daily, months=1, baseline=(1991, 2020))
