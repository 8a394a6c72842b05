"""Trends over annual values and anomalies against a baseline, on a long panel.

See :mod:`covextract.derive.time` for the long panel's columns and rules.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.special import ndtr

from covextract.derive.panel import (
    _calendar_kind,
    _check_baseline,
    _check_positive_int,
    _frame,
    _month_index,
    _qa_column,
    _read_panel,
    _Wide,
    _year,
)
from covextract.derive.windows import _collapse_wide
from covextract.errors import TableError

# Bounded memory for the pairwise (Theil–Sen, Mann–Kendall) arrays.
_UNIT_CHUNK = 4096


# --------------------------------------------------------------------------- trend


def trend(
    panel: pd.DataFrame,
    *,
    how: str = "mean",
    min_years: int = 5,
    min_coverage: float = 1.0,
    continuity: bool = True,
    column: str = "value",
) -> pd.DataFrame:
    """Linear trend per unit on annual values: OLS, Theil–Sen and Mann–Kendall.

    Parameters
    ----------
    panel : pandas.DataFrame
        Long panel (``unit``, ``start``, ``end``, ``value``). A series of
        calendar years is used as it is; a finer one is first collapsed per
        calendar year with :func:`collapse` (``how``, ``min_coverage``).
        Seasonality and the autocorrelation of consecutive months make the
        monthly values far from independent, so a test on them gives p-values
        far too small; one value per year removes the seasonal cycle and most
        of the dependence.
    how : {"mean", "sum", "max"}
        How a finer series is collapsed per year.
    min_years : int
        Minimum number of valid years (default 5); fewer give missing
        results and QA ``too_few_years``. The Mann–Kendall p-value uses the
        normal approximation, which is rough for fewer than about 10 years
        (from memory: exact tables exist for small n, Kendall 1975).
    min_coverage : float
        Passed to :func:`collapse` for a finer series.
    continuity : bool
        Apply the continuity correction to the Mann–Kendall statistic,
        ``Z = (S − sign S) / √Var(S)`` (default; common practice). Without it
        ``Z = S / √Var(S)``, as scipy's asymptotic Kendall tau test does.
    column : str
        The panel column holding the values.

    Returns
    -------
    pandas.DataFrame
        One row per unit: ``unit``, ``n_years`` (valid years), ``first_year``,
        ``last_year`` (of the valid years), ``ols_slope`` and ``sen_slope``
        (value units per year), ``mk_s``, ``mk_z``, ``mk_p`` (two-sided) and
        ``qa`` (``too_few_years``; ``all_tied`` when every value is equal and
        the test is undefined: slopes 0, ``mk_z`` and ``mk_p`` missing).

    Notes
    -----
    Years are the calendar years, x = year. OLS: ``Σ(x−x̄)(y−ȳ) / Σ(x−x̄)²``.
    Theil–Sen (Sen 1968): the median of the pairwise slopes
    ``(y_j − y_i)/(x_j − x_i)``, i < j. Mann–Kendall (Mann 1945; Kendall
    1975): ``S = Σ_{i<j} sign(y_j − y_i)`` in time order,
    ``Var(S) = [n(n−1)(2n+5) − Σ_t t(t−1)(2t+5)] / 18`` with ``t`` the sizes
    of the groups of exactly equal values (tie correction), p = 2·(1 − Φ(|Z|)).
    """
    min_years = _check_positive_int("min_years", min_years, 2)
    w = _read_panel(panel, column)
    if _calendar_kind(w.start, w.end) == "year":
        Y, years = w.values, _year(w.start)
    else:
        Y, _cov, ts, _te, _low = _collapse_wide(w, "year", how, min_coverage)
        years = _year(ts)
    x = years.astype(np.float64)
    nu = Y.shape[0]
    valid = np.isfinite(Y)
    n = valid.sum(axis=1)
    enough = n >= min_years

    ols = np.full(nu, np.nan)
    sen = np.full(nu, np.nan)
    mk_s = np.full(nu, np.nan)
    mk_z = np.full(nu, np.nan)
    mk_p = np.full(nu, np.nan)
    tied = np.zeros(nu, dtype=bool)
    first = np.where(n > 0, np.where(valid, years[None, :], np.iinfo(np.int64).max).min(1), -1)
    last = np.where(n > 0, np.where(valid, years[None, :], np.iinfo(np.int64).min).max(1), -1)

    iu, ju = np.triu_indices(len(x), 1)
    dx = x[ju] - x[iu]
    for lo in range(0, nu, _UNIT_CHUNK):
        sel = np.arange(lo, min(lo + _UNIT_CHUNK, nu))
        sel = sel[enough[sel]]
        if not sel.size:
            continue
        y, v, k = Y[sel], valid[sel], n[sel].astype(np.float64)
        yz = np.where(v, y, 0.0)
        xbar = (v * x).sum(1) / k
        ybar = yz.sum(1) / k
        xc = np.where(v, x - xbar[:, None], 0.0)
        ols[sel] = (xc * (yz - ybar[:, None])).sum(1) / (xc * xc).sum(1)

        pv = v[:, iu] & v[:, ju]
        dy = yz[:, ju] - yz[:, iu]
        sen[sel] = np.nanmedian(np.where(pv, dy / dx, np.nan), axis=1)
        s = np.where(pv, np.sign(dy), 0.0).sum(1)
        # Σ over tie groups of t(t−1)(2t+5) = Σ over values of (c−1)(2c+5),
        # c = how many valid values equal this one (itself included).
        eq = (y[:, :, None] == y[:, None, :]) & v[:, :, None] & v[:, None, :]
        c = eq.sum(2).astype(np.float64)
        ties = np.where(v, (c - 1.0) * (2.0 * c + 5.0), 0.0).sum(1)
        var = (k * (k - 1.0) * (2.0 * k + 5.0) - ties) / 18.0
        degenerate = var <= 0
        num = s - np.sign(s) if continuity else s
        with np.errstate(invalid="ignore", divide="ignore"):
            z = np.where(degenerate, np.nan, num / np.sqrt(np.where(degenerate, 1.0, var)))
        mk_s[sel] = s
        mk_z[sel] = z
        mk_p[sel] = 2.0 * ndtr(-np.abs(z))
        tied[sel] = degenerate

    qa = _qa_column({"too_few_years": ~enough, "all_tied": tied})
    return pd.DataFrame(
        {
            "unit": w.units,
            "n_years": n.astype(np.int64),
            "first_year": pd.array(
                [int(f) if k else None for f, k in zip(first, n > 0, strict=True)], dtype="Int64"
            ),
            "last_year": pd.array(
                [int(f) if k else None for f, k in zip(last, n > 0, strict=True)], dtype="Int64"
            ),
            "ols_slope": ols,
            "sen_slope": sen,
            "mk_s": mk_s,
            "mk_z": mk_z,
            "mk_p": mk_p,
            "qa": qa,
        }
    )


# --------------------------------------------------------------------------- anomalies


def _baseline_columns(w: _Wide, first: int, last: int, what: str) -> np.ndarray:
    years = _year(w.start)
    inside = (years >= first) & (years <= last)
    if not inside.any():
        raise TableError(
            f"the {what} baseline {first}..{last} lies outside the series, which runs from "
            f"{w.start[0]} to {w.end[-1]}; choose baseline years the series covers"
        )
    return inside


def anomalies(
    panel: pd.DataFrame,
    *,
    baseline,
    min_years: int = 5,
    column: str = "value",
) -> pd.DataFrame:
    """Anomalies per unit and calendar month against a baseline period.

    Parameters
    ----------
    panel : pandas.DataFrame
        Long panel of calendar months (or of calendar years: then one normal
        per unit). A daily or composite series must be collapsed first
        (:func:`collapse` with ``into="month"``).
    baseline : (int, int)
        First and last baseline year, both included (``(1991, 2020)``).
    min_years : int
        Minimum number of valid baseline values per unit and calendar month
        (default 5, a choice of ours: a normal from fewer years is mostly
        noise); fewer give missing results and QA ``short_baseline``.
    column : str
        The panel column holding the values.

    Returns
    -------
    pandas.DataFrame
        Long panel with every period of the input: ``unit``, ``start``,
        ``end``, ``value`` (the input value), ``normal`` (baseline mean of
        the unit's same calendar month), ``anomaly`` = value − normal,
        ``percent_of_normal`` = 100·value / normal, ``zscore`` =
        (value − normal) / sd, and ``qa``.

    Notes
    -----
    ``sd`` is the sample standard deviation of the baseline values (ddof = 1).
    Codes: ``short_baseline`` (all missing), ``no_value`` (the period's value
    is missing), ``zero_normal`` (normal = 0: percent of normal missing),
    ``zero_spread`` (sd = 0, e.g. a constant series: z-score missing).
    Percent of normal is meant for quantities with a natural zero (rainfall,
    radiance); for temperatures in °C it is not meaningful. The baseline
    statistics are computed about the smallest baseline value, so a constant
    series gives an exactly zero anomaly and spread.
    """
    first, last = _check_baseline(baseline)
    min_years = _check_positive_int("min_years", min_years, 2)
    w = _read_panel(panel, column)
    kind = _calendar_kind(w.start, w.end)
    if kind is None:
        raise TableError(
            "anomalies need a series of calendar months (or years); this one has periods of "
            f"{int(w.length.min())} to {int(w.length.max())} days. Collapse it first: "
            "collapse(panel, into='month', how='mean' or 'sum')"
        )
    inside = _baseline_columns(w, first, last, "anomaly")
    key = _month_index(w.start) if kind == "month" else np.zeros(len(w.start), dtype=np.int64)
    V = w.values
    normal = np.full(V.shape, np.nan)
    sd = np.full(V.shape, np.nan)
    count = np.zeros(V.shape, dtype=np.int64)
    for k in np.unique(key):
        cols = key == k
        B = V[:, cols & inside]
        valid = np.isfinite(B)
        cnt = valid.sum(1)
        has = cnt > 0
        shift = np.where(has, np.where(valid, B, np.inf).min(1), 0.0)
        dev = np.where(valid, B - shift[:, None], 0.0)
        with np.errstate(invalid="ignore", divide="ignore"):
            mdev = dev.sum(1) / cnt
            ss = np.where(valid, (dev - mdev[:, None]) ** 2, 0.0).sum(1)
            s = np.sqrt(ss / (cnt - 1))
        normal[:, cols] = np.where(has, shift + mdev, np.nan)[:, None]
        sd[:, cols] = np.where(cnt >= 2, s, np.nan)[:, None]
        count[:, cols] = cnt[:, None]
    short = count < min_years
    normal = np.where(short, np.nan, normal)
    sd = np.where(short, np.nan, sd)
    anomaly = V - normal
    zero_normal = ~short & (normal == 0)
    zero_spread = ~short & (sd == 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        pct = np.where(zero_normal, np.nan, 100.0 * V / np.where(zero_normal, 1.0, normal))
        z = np.where(zero_spread, np.nan, anomaly / np.where(zero_spread, 1.0, sd))
    qa = _qa_column(
        {
            "short_baseline": short,
            "no_value": np.isnan(V),
            "zero_normal": zero_normal,
            "zero_spread": zero_spread,
        }
    )
    return _frame(
        w.units,
        w.start,
        w.end,
        value=V,
        normal=normal,
        anomaly=anomaly,
        percent_of_normal=pct,
        zscore=z,
        qa=qa,
    )
