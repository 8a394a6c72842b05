"""Windows before each record's date, collapse, trend and anomalies on unit panels.

Windows are checked against a brute-force pandas computation that expands
every period into its days; slopes against scipy.stats (theilslopes, Sen 1968;
linregress); the Mann–Kendall test against the published formula (Mann 1945;
Kendall 1975, written out here from memory) and scipy.stats.kendalltau.
"""

import datetime as dt
import itertools

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from scipy import stats

from covextract.derive.time import (
    COMBINES,
    QA_CODES,
    anomalies,
    collapse,
    trend,
    window_values,
)
from covextract.errors import TableError


def monthly_panel(values, first="2021-01", units=None):
    """Long panel of calendar months; ``values`` is (units × months)."""
    values = np.atleast_2d(np.asarray(values, dtype=float))
    starts = pd.period_range(first, periods=values.shape[1], freq="M")
    units = range(values.shape[0]) if units is None else units
    return pd.DataFrame(
        {
            "unit": np.repeat(list(units), values.shape[1]),
            "start": np.tile(starts.start_time, values.shape[0]),
            "end": np.tile(starts.end_time.normalize(), values.shape[0]),
            "value": values.reshape(-1),
        }
    )


def annual_panel(values, first_year):
    values = np.atleast_2d(np.asarray(values, dtype=float))
    years = np.arange(first_year, first_year + values.shape[1])
    return pd.DataFrame(
        {
            "unit": np.repeat(np.arange(values.shape[0]), values.shape[1]),
            "start": np.tile(pd.to_datetime([f"{y}-01-01" for y in years]), values.shape[0]),
            "end": np.tile(pd.to_datetime([f"{y}-12-31" for y in years]), values.shape[0]),
            "value": values.reshape(-1),
        }
    )


# ----------------------------------------------------------------- windows: by hand


def test_window_three_months_lag_one_by_hand():
    # The example: a visit on 17 May 2021 with N = 3, L = 1 uses Feb, Mar, Apr 2021.
    panel = monthly_panel([[10, 20, 30, 40, 50, 60]])
    res = window_values(panel, ["2021-05-17"], months=3, lag_months=1, combine="sum")
    assert res["window_start"][0] == pd.Timestamp("2021-02-01")
    assert res["window_end"][0] == pd.Timestamp("2021-04-30")
    assert_allclose(res["value"][0], 20 + 30 + 40, rtol=0, atol=1e-12)
    assert res["qa"][0] == ()
    for combine, expected in [("mean", 30.0), ("min", 20.0), ("max", 40.0)]:
        r = window_values(panel, [dt.date(2021, 5, 17)], months=3, lag_months=1, combine=combine)
        assert_allclose(r["value"][0], expected, rtol=0, atol=1e-12)
    r = window_values(
        panel, ["2021-05-17"], months=3, lag_months=1, combine="count_above", threshold=20.0
    )
    assert_allclose(r["value"][0], 2.0, rtol=0, atol=1e-12)  # strictly above: 30 and 40


def test_lag_zero_includes_the_visit_month_and_is_flagged():
    panel = monthly_panel([[10, 20, 30, 40, 50, 60]])
    res = window_values(panel, ["2021-05-17", "2021-05-31"], units=[0, 0], months=2, lag_months=0)
    assert_allclose(res["value"], [90.0, 90.0], rtol=0, atol=1e-12)
    assert res["qa"][0] == ("after_visit",)  # 18-31 May are after the visit
    assert res["qa"][1] == ()  # the visit is on the month's last day


def test_missing_dates_outside_series_and_gaps():
    panel = monthly_panel([[10, np.nan, 30, 40, 50, 60]])
    dates = [None, "not a date", np.nan, 20210517, pd.NaT, "2021-02-10", "2021-04-10", "2021-07-15"]
    res = window_values(panel, dates, units=[0] * len(dates), months=2, lag_months=1, combine="sum")
    for i in range(5):
        assert res["qa"][i] == ("no_date",)
        assert np.isnan(res["value"][i])
        assert pd.isna(res["window_start"][i])
    # Dec 2020 and Jan 2021: reaches before the series.
    assert res["qa"][5] == ("window_outside_series",)
    assert np.isnan(res["value"][5])
    # Feb (NaN) and Mar: a gap makes a sum missing.
    assert res["qa"][6] == ("window_gap",)
    assert np.isnan(res["value"][6])
    # May and Jun: inside, complete.
    assert_allclose(res["value"][7], 110.0, rtol=0, atol=1e-12)
    # A mean over a gap uses the valid rest, flagged.
    r = window_values(panel, ["2021-04-10"], units=[0], months=2, lag_months=1, combine="mean")
    assert r["qa"][0] == ("window_gap",)
    assert_allclose(r["value"][0], 30.0, rtol=0, atol=1e-12)


def test_absent_period_and_absent_unit_are_gaps():
    panel = monthly_panel([[10, 20, 30, 40]])
    panel = panel[panel["start"] != pd.Timestamp("2021-02-01")]  # February has no file
    res = window_values(
        panel,
        ["2021-03-20", "2021-03-20", "2021-05-02"],
        units=[0, 7, 0],
        months=2,
        lag_months=0,
        combine="max",
    )
    assert res["qa"][0] == ("window_gap", "after_visit")
    assert_allclose(res["value"][0], 30.0, rtol=0, atol=1e-12)
    assert res["qa"][1] == ("window_gap", "after_visit")  # unit 7 has no rows at all
    assert np.isnan(res["value"][1])
    assert res["qa"][2] == ("window_outside_series", "after_visit")


def test_composites_count_by_their_overlap_by_hand():
    # Two 16-day composites: 1-16 Jan (value 16) and 17 Jan - 1 Feb (value 32).
    panel = pd.DataFrame(
        {
            "unit": [0, 0],
            "start": pd.to_datetime(["2021-01-01", "2021-01-17"]),
            "end": pd.to_datetime(["2021-01-16", "2021-02-01"]),
            "value": [16.0, 32.0],
        }
    )
    # 10 days ending on the visit day, 20 Jan: 11-16 Jan (6/16 of the first), 17-20 Jan (4/16).
    res = window_values(panel, ["2021-01-20"], days=10, lag_days=0, combine="sum")
    assert res["window_start"][0] == pd.Timestamp("2021-01-11")
    assert_allclose(res["value"][0], 6 / 16 * 16 + 4 / 16 * 32, rtol=0, atol=1e-12)
    assert res["qa"][0] == ("after_visit",)  # the second composite runs to 1 Feb
    res = window_values(panel, ["2021-01-20"], days=10, lag_days=0, combine="mean")
    assert_allclose(res["value"][0], (6 + 8) / (10 / 16), rtol=0, atol=1e-12)
    res = window_values(
        panel, ["2021-01-20"], days=10, lag_days=0, combine="count_above", threshold=20
    )
    assert_allclose(res["value"][0], 4 / 16, rtol=0, atol=1e-12)
    # Lag 5: 1-10 Jan, inside the first composite only; no day after the visit is used.
    res = window_values(panel, ["2021-01-15"], days=10, lag_days=5, combine="sum")
    assert_allclose(res["value"][0], 10.0, rtol=0, atol=1e-12)
    assert res["qa"][0] == ("after_visit",)  # the composite 1-16 Jan ends after 15 Jan
    res = window_values(panel, ["2021-01-16"], days=10, lag_days=6, combine="sum")
    assert res["qa"][0] == ()


# ----------------------------------------------------------------- windows: brute force


def _expand_days(panel):
    """Every (unit, period) row repeated once per day of the period, with 1/period-days."""
    rows = []
    for r in panel.itertuples(index=False):
        days = pd.date_range(r.start, r.end, freq="D")
        rows.append(
            pd.DataFrame(
                {
                    "unit": r.unit,
                    "start": r.start,
                    "day": days,
                    "value": r.value,
                    "share": 1.0 / len(days),
                }
            )
        )
    return pd.concat(rows, ignore_index=True)


def _brute_window(panel, daily, date, unit, months, lag_months, days, lag_days, threshold):
    """One record's value under every combine, and its QA codes, day by day."""
    date = (
        pd.to_datetime(date, errors="coerce", format="ISO8601")
        if isinstance(date, str)
        else (pd.Timestamp(date) if isinstance(date, (dt.date, pd.Timestamp)) else pd.NaT)
    )
    if pd.isna(date):
        return dict.fromkeys(COMBINES, np.nan), {"no_date"}
    if months is not None:
        last = date.to_period("M") - lag_months
        first = last - (months - 1)
        ws, we = first.start_time, last.end_time.normalize()
    else:
        we = date.normalize() - pd.Timedelta(days=lag_days)
        ws = we - pd.Timedelta(days=days - 1)
    codes = set()
    span0, span1 = panel["start"].min(), panel["end"].max()
    periods = panel[["start", "end"]].drop_duplicates()
    touching = periods[(periods["end"] >= ws) & (periods["start"] <= we)]
    if we > date or (len(touching) and touching["end"].max() > date):
        codes.add("after_visit")
    outside = ws < span0 or we > span1
    if outside:
        codes.add("window_outside_series")
    inside = daily[
        (daily["unit"] == unit)
        & (daily["day"] >= ws)
        & (daily["day"] <= we)
        & daily["value"].notna()
    ]
    needed = set(pd.date_range(max(ws, span0), min(we, span1), freq="D"))
    gap = bool(needed - set(inside["day"]))
    if gap:
        codes.add("window_gap")
    per_period = inside.groupby("start").agg(frac=("share", "sum"), value=("value", "first"))
    fracs, vals = per_period["frac"].to_numpy(), per_period["value"].to_numpy()
    if outside or not len(vals):
        return dict.fromkeys(COMBINES, np.nan), codes
    values = {
        "sum": np.nan if gap else np.sum(fracs * vals),
        "mean": np.sum(fracs * vals) / np.sum(fracs),
        "min": vals.min(),
        "max": vals.max(),
        "count_above": np.nan if gap else np.sum(fracs * (vals > threshold)),
    }
    return values, codes


def _random_records(rng, n, first, last, n_units):
    span = (pd.Timestamp(last) - pd.Timestamp(first)).days
    dates = [pd.Timestamp(first) + pd.Timedelta(days=int(d)) for d in rng.integers(0, span, n)]
    dates = [d.strftime("%Y-%m-%d") if i % 3 == 0 else d.date() for i, d in enumerate(dates)]
    dates[1], dates[4], dates[7] = None, "17/05/2021", np.nan  # missing and unparsable
    units = rng.integers(0, n_units + 1, n)  # unit n_units has no rows in the panel
    return dates, units


def _check_against_brute_force(panel, dates, units, threshold, **window):
    daily = _expand_days(panel)
    seen = set()
    results = {
        c: window_values(panel, dates, units=units, combine=c, threshold=threshold, **window)
        for c in COMBINES
    }
    for i in range(len(dates)):
        expected, codes = _brute_window(
            panel,
            daily,
            dates[i],
            units[i],
            window.get("months"),
            window.get("lag_months", 0),
            window.get("days"),
            window.get("lag_days", 0),
            threshold,
        )
        seen |= codes
        for c in COMBINES:
            assert set(results[c]["qa"][i]) == codes, (c, i, dates[i], window)
            assert_allclose(
                results[c]["value"][i],
                expected[c],
                rtol=1e-12,
                atol=1e-12,
                equal_nan=True,
                err_msg=f"{c} {i} {dates[i]} {window}",
            )
    return seen


@pytest.mark.parametrize(("months", "lag"), [(1, 0), (3, 1), (2, 2), (6, 0)])
def test_month_windows_match_brute_force(months, lag):
    rng = np.random.default_rng(11)
    values = rng.gamma(2.0, 40.0, size=(4, 24))
    values[rng.random(values.shape) < 0.08] = np.nan
    panel = monthly_panel(values, first="2020-01")
    panel = panel[panel["start"] != pd.Timestamp("2020-09-01")]  # a month without a file
    dates, units = _random_records(rng, 25, "2019-11-01", "2022-02-28", 4)
    seen = _check_against_brute_force(panel, dates, units, 60.0, months=months, lag_months=lag)
    assert seen >= {"no_date", "window_outside_series", "window_gap"}  # the fixture exercises them
    assert ("after_visit" in seen) == (lag == 0)


@pytest.mark.parametrize(("days", "lag"), [(10, 0), (30, 7), (45, 3)])
def test_day_windows_on_composites_match_brute_force(days, lag):
    rng = np.random.default_rng(5)
    starts = pd.date_range("2021-01-01", periods=12, freq="16D")
    ends = starts + pd.Timedelta(days=15)
    values = rng.uniform(0, 50, size=(3, len(starts)))
    values[0, 4] = np.nan
    panel = pd.DataFrame(
        {
            "unit": np.repeat(np.arange(3), len(starts)),
            "start": np.tile(starts, 3),
            "end": np.tile(ends, 3),
            "value": values.reshape(-1),
        }
    )
    dates, units = _random_records(rng, 20, "2021-01-05", "2021-07-20", 3)
    seen = _check_against_brute_force(panel, dates, units, 25.0, days=days, lag_days=lag)
    assert seen >= {"no_date", "window_gap", "after_visit"}


def test_month_windows_on_a_daily_series_match_brute_force():
    rng = np.random.default_rng(8)
    days = pd.date_range("2021-01-01", "2021-05-31", freq="D")
    values = rng.exponential(3.0, size=(2, len(days)))
    values[1, 40] = np.nan
    panel = pd.DataFrame(
        {
            "unit": np.repeat([0, 1], len(days)),
            "start": np.tile(days, 2),
            "end": np.tile(days, 2),
            "value": values.reshape(-1),
        }
    )
    dates = ["2021-03-03", "2021-04-30", "2021-05-31", "2021-02-14"]
    units = [0, 1, 0, 1]
    _check_against_brute_force(panel, dates, units, 4.0, months=2, lag_months=1)
    # Record 1 uses February and March of unit 1, which has a missing day (10 Feb).
    res = window_values(panel, dates, units=units, months=2, lag_months=1)
    assert res["qa"][1] == ("window_gap",)
    assert np.isnan(res["value"][1])


def test_window_arguments_are_checked():
    panel = monthly_panel([[1, 2, 3]])
    with pytest.raises(ValueError, match="exactly one of months= and days="):
        window_values(panel, ["2021-02-01"], months=1, days=3)
    with pytest.raises(ValueError, match="exactly one of months= and days="):
        window_values(panel, ["2021-02-01"])
    with pytest.raises(ValueError, match="unknown combine 'total'; use one of sum, mean"):
        window_values(panel, ["2021-02-01"], months=1, combine="total")
    with pytest.raises(ValueError, match="needs a finite threshold"):
        window_values(panel, ["2021-02-01"], months=1, combine="count_above")
    with pytest.raises(ValueError, match="lag_months must be an integer ≥ 0"):
        window_values(panel, ["2021-02-01"], months=1, lag_months=-1)
    with pytest.raises(ValueError, match="units has 2 entries but dates has 1"):
        window_values(panel, ["2021-02-01"], units=[0, 1], months=1)


# ----------------------------------------------------------------- bad panels


def test_bad_panels_are_refused_with_the_place():
    good = monthly_panel([[1, 2, 3]])
    with pytest.raises(TableError, match="no column 'value'"):
        window_values(good.drop(columns="value"), ["2021-02-01"], months=1)
    bad = good.astype({"start": object})
    bad.loc[1, "start"] = "someday"
    with pytest.raises(
        TableError,
        match=r"'start' column has missing or unreadable dates in "
        r"rows 1 \(counted from 0\), e.g. 'someday'",
    ):
        collapse(bad)
    overlap = pd.concat(
        [
            good,
            pd.DataFrame(
                {
                    "unit": [0],
                    "start": [pd.Timestamp("2021-01-15")],
                    "end": [pd.Timestamp("2021-02-14")],
                    "value": [1.0],
                }
            ),
        ]
    )
    with pytest.raises(
        TableError, match="2021-01-01..2021-01-31 and 2021-01-15..2021-02-14 overlap"
    ):
        collapse(overlap)
    dup = pd.concat([good, good.iloc[[2]]])
    with pytest.raises(TableError, match="unit 0 has more than one row for the period 2021-03-01"):
        collapse(dup)
    frac = good.assign(unit=[0.5, 0.5, 0.5])
    with pytest.raises(TableError, match="integer unit indices; rows 0, 1, 2"):
        collapse(frac)
    backwards = good.copy()
    backwards.loc[0, "end"] = pd.Timestamp("2020-12-01")
    with pytest.raises(TableError, match="end before they start"):
        collapse(backwards)


# ----------------------------------------------------------------- collapse


def test_collapse_months_into_years_by_hand():
    v = np.arange(1.0, 25.0)  # 2021: 1..12, 2022: 13..24
    v[15] = np.nan  # April 2022
    res = collapse(monthly_panel([v]), into="year", how="sum")
    assert_allclose(res["value"][0], 78.0, rtol=0, atol=1e-12)
    assert np.isnan(res["value"][1])
    assert res["qa"].tolist() == [(), ("low_coverage",)]
    assert_allclose(res["coverage"], [1.0, 1 - 30 / 365], rtol=0, atol=1e-12)
    res = collapse(monthly_panel([v]), into="year", how="mean", min_coverage=0.9)
    assert_allclose(res["value"], [6.5, (np.nansum(v[12:])) / 11], rtol=0, atol=1e-12)
    res = collapse(monthly_panel([v]), into="year", how="max", min_coverage=0.9)
    assert_allclose(res["value"], [12.0, 24.0], rtol=0, atol=1e-12)
    assert res["start"].tolist() == [pd.Timestamp("2021-01-01"), pd.Timestamp("2022-01-01")]
    assert res["end"].tolist() == [pd.Timestamp("2021-12-31"), pd.Timestamp("2022-12-31")]


def test_collapse_composites_across_new_year_by_hand():
    # 24 Dec 2021 - 8 Jan 2022 (value 32): 8 days in each year.
    panel = pd.DataFrame(
        {
            "unit": [0, 0, 0],
            "start": pd.to_datetime(["2021-12-08", "2021-12-24", "2022-01-09"]),
            "end": pd.to_datetime(["2021-12-23", "2022-01-08", "2022-01-24"]),
            "value": [16.0, 32.0, 48.0],
        }
    )
    res = collapse(panel, into="month", how="sum", min_coverage=0.2)
    # December: all of the first (16) and half of the second (16); January: 16 + 48.
    assert_allclose(res["value"], [32.0, 64.0], rtol=0, atol=1e-12)
    assert_allclose(res["coverage"], [24 / 31, 24 / 31], rtol=0, atol=1e-12)
    res = collapse(panel, into="month", how="mean", min_coverage=0.2)
    assert_allclose(res["value"], [(16 + 16) / 1.5, (16 + 48) / 1.5], rtol=0, atol=1e-12)


def test_collapse_daily_into_months_matches_pandas():
    rng = np.random.default_rng(2)
    days = pd.date_range("2020-01-01", "2020-12-31", freq="D")
    v = rng.exponential(2.0, len(days))
    panel = pd.DataFrame({"unit": 3, "start": days, "end": days, "value": v})
    res = collapse(panel, into="month", how="sum")
    expected = pd.Series(v, index=days).groupby(days.month).sum().to_numpy()  # pandas reference
    assert_allclose(res["value"], expected, rtol=1e-12, atol=0)
    assert (res["unit"] == 3).all()


def test_collapse_refuses_coarser_periods():
    with pytest.raises(TableError, match="periods of 365 days, longer than a month"):
        collapse(annual_panel([[1.0, 2.0]], 2021), into="month")
    with pytest.raises(ValueError, match="unknown how='median'"):
        collapse(monthly_panel([[1.0]]), how="median")


# ----------------------------------------------------------------- trend


def _mann_kendall_formula(y, continuity=True):
    """S, Var(S), Z and the two-sided p of the Mann–Kendall test, from the formula.

    Mann (1945); Kendall (1975): S = Σ_{i<j} sgn(y_j − y_i);
    Var(S) = [n(n−1)(2n+5) − Σ_t t(t−1)(2t+5)] / 18; Z = (S − sgn S)/√Var (written
    here from memory).
    """
    n = len(y)
    s = sum(np.sign(y[j] - y[i]) for i, j in itertools.combinations(range(n), 2))
    _, t = np.unique(y, return_counts=True)
    var = (n * (n - 1) * (2 * n + 5) - np.sum(t * (t - 1) * (2 * t + 5))) / 18
    z = (s - np.sign(s)) / np.sqrt(var) if continuity else s / np.sqrt(var)
    return s, var, z, 2 * stats.norm.sf(abs(z))


def test_trend_matches_scipy_and_the_mann_kendall_formula():
    rng = np.random.default_rng(3)
    n_units, n_years = 30, 18
    slope = rng.normal(0, 0.5, n_units)
    y = slope[:, None] * np.arange(n_years) + rng.normal(0, 2.0, (n_units, n_years)) + 100
    y[:10] = np.round(y[:10])  # rounded data: ties
    y[rng.random(y.shape) < 0.1] = np.nan
    res = trend(annual_panel(y, 2001), min_years=5)
    years = np.arange(2001, 2001 + n_years)
    for u in range(n_units):
        ok = np.isfinite(y[u])
        x, yy = years[ok], y[u, ok]
        assert res["n_years"][u] == ok.sum()
        assert res["first_year"][u] == x[0] and res["last_year"][u] == x[-1]
        # scipy.stats.theilslopes (Sen 1968) and scipy.stats.linregress as references.
        assert_allclose(res["sen_slope"][u], stats.theilslopes(yy, x).slope, rtol=1e-12, atol=1e-12)
        assert_allclose(res["ols_slope"][u], stats.linregress(x, yy).slope, rtol=1e-10, atol=1e-12)
        s, _var, z, p = _mann_kendall_formula(yy)
        assert res["mk_s"][u] == s
        assert_allclose([res["mk_z"][u], res["mk_p"][u]], [z, p], rtol=1e-12, atol=1e-15)
    assert (res["qa"].map(len) == 0).all()


def test_mann_kendall_against_scipy_kendalltau():
    # scipy.stats.kendalltau of the values against time is the same test: with no ties,
    # tau = S / (n(n−1)/2); its asymptotic p-value has no continuity correction, and with
    # ties only in the values its variance is the Mann–Kendall tie-corrected Var(S).
    rng = np.random.default_rng(4)
    y_free = rng.normal(0, 1, (5, 15)) + 0.1 * np.arange(15)
    y_tied = np.round(rng.normal(0, 1.5, (5, 15)) + 0.1 * np.arange(15))
    years = np.arange(2000, 2015)
    for y in (y_free, y_tied):
        res = trend(annual_panel(y, 2000), continuity=False)
        for u in range(len(y)):
            ref = stats.kendalltau(years, y[u], method="asymptotic")
            assert_allclose(res["mk_p"][u], ref.pvalue, rtol=1e-10, atol=1e-15)
            if y is y_free:
                assert_allclose(res["mk_s"][u] / (15 * 14 / 2), ref.statistic, rtol=1e-12)
    assert len(np.unique(y_tied[0])) < 15  # the second set does have ties


def test_trend_needs_enough_years_and_handles_constant_series():
    y = np.array(
        [
            [1.0, 2.0, np.nan, np.nan, np.nan, np.nan, 4.0, 5.0],  # 4 valid years
            [7.0, 7.0, 7.0, 7.0, 7.0, 7.0, 7.0, 7.0],
        ]
    )
    res = trend(annual_panel(y, 2010), min_years=5)
    assert res["qa"][0] == ("too_few_years",)
    assert np.isnan(res[["ols_slope", "sen_slope", "mk_s", "mk_p"]].to_numpy()[0]).all()
    assert res["n_years"][0] == 4
    assert res["qa"][1] == ("all_tied",)
    assert_allclose([res["ols_slope"][1], res["sen_slope"][1]], [0.0, 0.0], rtol=0, atol=1e-12)
    assert np.isnan(res["mk_p"][1])
    assert set(QA_CODES) >= {"too_few_years", "all_tied"}


def test_trend_collapses_a_monthly_series_per_year():
    # Annual mean 3·year + seasonal cycle: the annual means rise by exactly 3 a year.
    months = np.arange(12 * 8)
    seasonal = 10 * np.sin(2 * np.pi * (months % 12) / 12)
    v = 3.0 * (months // 12) + seasonal
    panel = monthly_panel([v], first="2001-01")
    res = trend(panel)
    assert_allclose([res["ols_slope"][0], res["sen_slope"][0]], [3.0, 3.0], rtol=1e-12)
    annual = collapse(panel, into="year", how="mean")
    assert_allclose(res["mk_p"][0], trend(annual)["mk_p"][0], rtol=0, atol=0)
    # 8 strictly increasing years: S = 28 (all pairs concordant).
    assert res["mk_s"][0] == 28


# ----------------------------------------------------------------- anomalies


def test_anomaly_of_a_constant_series_is_zero():
    panel = monthly_panel([np.full(96, 0.3), np.full(96, 12.7)], first="2001-01")
    res = anomalies(panel, baseline=(2001, 2006))  # 6 baseline years ≥ the default 5
    assert_allclose(res["anomaly"], 0.0, rtol=0, atol=0)
    assert_allclose(res["percent_of_normal"], 100.0, rtol=1e-15, atol=0)
    assert res["zscore"].isna().all()
    assert res["qa"].map(lambda c: c == ("zero_spread",)).all()


def test_anomalies_by_hand():
    # January values 10, 20, 30 in the baseline 2001-2003: normal 20, sd (ddof=1) 10.
    v = np.full((1, 48), 5.0)
    v[0, [0, 12, 24, 36]] = [10.0, 20.0, 30.0, 35.0]
    v[0, 1::12] = 0.0  # every February dry: normal 0
    v[0, 40] = np.nan  # May 2004
    res = anomalies(monthly_panel(v, first="2001-01"), baseline=(2001, 2003), min_years=3)
    jan_2004 = res.iloc[36]
    assert_allclose(
        jan_2004[["normal", "anomaly", "percent_of_normal", "zscore"]].to_numpy(dtype=float),
        [20.0, 15.0, 175.0, 1.5],
        rtol=1e-15,
        atol=0,
    )
    assert jan_2004["qa"] == ()
    feb = res.iloc[37]
    assert np.isnan(feb["percent_of_normal"]) and feb["qa"] == ("zero_normal", "zero_spread")
    assert res.iloc[40]["qa"] == ("no_value", "zero_spread")  # every baseline May is 5
    short = anomalies(monthly_panel(v, first="2001-01"), baseline=(2001, 2003), min_years=4)
    assert short["anomaly"].isna().all()
    assert (short["qa"].map(lambda c: "short_baseline" in c)).all()


def test_annual_anomalies_use_one_normal():
    res = anomalies(annual_panel([[2.0, 4.0, 6.0, 8.0, 10.0, 20.0]], 2001), baseline=(2001, 2005))
    assert_allclose(res["normal"], 6.0, rtol=0, atol=1e-15)
    assert_allclose(res["zscore"].iloc[-1], 14.0 / np.sqrt(10.0), rtol=1e-14)


def test_anomaly_input_is_checked():
    panel = monthly_panel([np.ones(24)], first="2001-01")
    with pytest.raises(TableError, match="baseline 1991..2000 lies outside the series"):
        anomalies(panel, baseline=(1991, 2000))
    days = pd.date_range("2001-01-01", periods=30, freq="D")
    daily = pd.DataFrame({"unit": 0, "start": days, "end": days, "value": 1.0})
    with pytest.raises(TableError, match=r"collapse\(panel, into='month'"):
        anomalies(daily, baseline=(2001, 2001))
    with pytest.raises(ValueError, match="baseline 2005..2001 ends before it starts"):
        anomalies(panel, baseline=(2005, 2001))
