"""Standardized precipitation index (SPI) per unit from monthly rainfall totals.

Method (McKee, Doesken & Kleist 1993; WMO Standardized Precipitation Index
User Guide, WMO-No. 1090, 2012):

1. N-month running totals (N = 1, 3, 6 or 12): the total for a month is the
   sum of that month and the N − 1 before it; it is missing when any of them
   is missing (QA ``window_gap``) or lies before the series
   (``window_outside_series``).
2. Per unit and calendar month (of the total's last month), the baseline
   sample is the totals ending in the baseline years. With ``n`` valid
   totals of which ``m`` are zero, ``q = m / n``.
3. A gamma distribution with location 0 is fitted to the baseline totals
   above zero by maximum likelihood: the shape ``α`` solves
   ``ln α − ψ(α) = ln(x̄) − mean(ln x)`` (Newton's method from Thom's 1958
   approximation ``α₀ = (1 + √(1 + 4A/3)) / (4A)``, from memory, used only as
   a start), and the scale is ``β = x̄ / α``. This is the exact maximum
   likelihood estimate, equal to ``scipy.stats.gamma.fit(x, floc=0)``; it
   differs slightly from Thom's approximation, which some descriptions of
   the method use directly.
4. ``H(x) = q + (1 − q)·G(x; α, β)`` and ``SPI = Φ⁻¹(H(x))`` (for ``H > 0.5``
   computed as ``−Φ⁻¹((1 − q)·(1 − G))`` to keep the digits of the upper tail).

Zero totals get ``H = q`` (the top of the probability mass at zero). The
centre-of-mass correction for many zero totals (Stagge et al. 2015, Int. J.
Climatol. 35:4027–4040) is **not applied**: we could not state its exact
form from the paper. Where more than half of a calendar month's baseline
totals are zero, a month without rain therefore gets an SPI ≥ 0 ("near
normal"), a known limit of the SPI in dry seasons; read such months with
care.

Baseline length: the number of baseline years for which the series has all
twelve months. Below :data:`MIN_BASELINE_YEARS` (default 10) the index is
refused (:class:`~covextract.errors.TableError`); below
:data:`RECOMMENDED_BASELINE_YEARS` (30, common practice following the WMO
guide) a :class:`ShortBaselineWarning` is issued.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
from numpy.lib.stride_tricks import sliding_window_view
from scipy.special import digamma, gammainc, gammaincc, ndtri, polygamma

from covextract.derive.panel import (
    _calendar_kind,
    _check_baseline,
    _check_positive_int,
    _frame,
    _month_index,
    _qa_column,
    _read_panel,
    _year,
)
from covextract.errors import CovextractWarning, TableError

__all__ = [
    "MIN_BASELINE_YEARS",
    "RECOMMENDED_BASELINE_YEARS",
    "SPI_CATEGORIES",
    "SPI_SCALES",
    "ShortBaselineWarning",
    "fit_gamma",
    "spi",
    "spi_category",
]

#: Time scales (months) of the index.
SPI_SCALES = (1, 3, 6, 12)

#: Baselines shorter than this (in complete years) are refused.
MIN_BASELINE_YEARS = 10

#: Baselines shorter than this (in complete years) give a warning (common
#: practice; the WMO guide asks for at least 30 years).
RECOMMENDED_BASELINE_YEARS = 30

#: Category labels, wettest first. Bounds follow the WMO guide's table as
#: recalled (from memory; check against WMO-No. 1090 before relying on the
#: wording), written as half-open intervals without gaps:
#: SPI ≥ 2.0; [1.5, 2.0); [1.0, 1.5); (−1.0, 1.0); (−1.5, −1.0]; (−2.0, −1.5]; ≤ −2.0.
SPI_CATEGORIES = (
    "extremely wet",
    "very wet",
    "moderately wet",
    "near normal",
    "moderately dry",
    "severely dry",
    "extremely dry",
)

# Fewer positive baseline totals than this cannot support a two-parameter fit.
_MIN_POSITIVE = 3


class ShortBaselineWarning(CovextractWarning):
    """The SPI baseline has fewer than 30 complete years; the fit is uncertain."""


def spi_category(values) -> np.ndarray:
    """WMO category label of each SPI value.

    Parameters
    ----------
    values : array_like of float
        SPI values; ±inf are allowed (extremely wet / dry), NaN gives None.

    Returns
    -------
    numpy.ndarray
        Object array of labels from :data:`SPI_CATEGORIES` (None for NaN).
        Intervals: ≥ 2.0 extremely wet; [1.5, 2.0) very wet; [1.0, 1.5)
        moderately wet; (−1.0, 1.0) near normal; (−1.5, −1.0] moderately dry;
        (−2.0, −1.5] severely dry; ≤ −2.0 extremely dry (WMO-No. 1090 table,
        from memory; check against the guide).
    """
    v = np.asarray(values, dtype=np.float64)
    conditions = [
        v >= 2.0,
        (v >= 1.5) & (v < 2.0),
        (v >= 1.0) & (v < 1.5),
        (v > -1.0) & (v < 1.0),
        (v > -1.5) & (v <= -1.0),
        (v > -2.0) & (v <= -1.5),
        v <= -2.0,
    ]
    return np.select(conditions, np.array(SPI_CATEGORIES, dtype=object), default=None)


def _gamma_shape(A: np.ndarray) -> np.ndarray:
    """Maximum-likelihood gamma shape from ``A = ln(mean) − mean(ln x) > 0``.

    Newton's method on ``ln α − ψ(α) − A`` (decreasing and convex in α), from
    Thom's approximation; three or four steps reach double precision.
    """
    a = (1.0 + np.sqrt(1.0 + 4.0 * A / 3.0)) / (4.0 * A)
    active = np.ones(a.shape, dtype=bool)
    for _ in range(50):
        x, target = a[active], A[active]
        f = np.log(x) - digamma(x) - target
        fp = 1.0 / x - polygamma(1, x)
        new = x - f / fp
        new = np.where(new > 0, new, x / 2.0)
        a[active] = new
        still = np.abs(new - x) > 1e-13 * new
        active[np.flatnonzero(active)[~still]] = False
        if not active.any():
            break
    return a


def fit_gamma(totals, axis: int = -1):
    """Zero share and maximum-likelihood gamma fit (location 0) of rainfall totals.

    Parameters
    ----------
    totals : array_like of float
        Totals (≥ 0); NaN values are left out.
    axis : int
        Axis along which the samples lie.

    Returns
    -------
    q, alpha, beta, n : numpy.ndarray
        Share of zero totals among the valid ones, gamma shape and scale
        (same unit as the totals) fitted to the totals above zero, and the
        number of valid totals. ``alpha`` and ``beta`` are NaN where fewer
        than 3 totals are above zero or they are all equal.
    """
    x = np.moveaxis(np.asarray(totals, dtype=np.float64), axis, -1)
    valid = np.isfinite(x)
    n = valid.sum(-1)
    pos = valid & (x > 0)
    npos = pos.sum(-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        q = np.where(n > 0, (n - npos) / n, np.nan)
        xp = np.where(pos, x, 1.0)
        mean = np.where(pos, x, 0.0).sum(-1) / npos
        meanlog = np.where(pos, np.log(xp), 0.0).sum(-1) / npos
        A = np.log(mean) - meanlog
    spread = np.where(pos, x, -np.inf).max(-1) > np.where(pos, x, np.inf).min(-1)
    ok = (npos >= _MIN_POSITIVE) & spread & (A > 0)
    alpha = np.full(q.shape, np.nan)
    if np.any(ok):
        alpha[ok] = _gamma_shape(A[ok])
    beta = np.where(ok, mean / np.where(ok, alpha, 1.0), np.nan)
    return q, alpha, beta, n


def _spi_values(x, q, alpha, beta):
    """SPI of totals ``x`` under the mixed distribution; ±inf where H is 0 or 1."""
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        s = np.where(x > 0, x / beta, 0.0)
        lower = q + (1.0 - q) * np.where(x > 0, gammainc(alpha, s), 0.0)
        upper = (1.0 - q) * np.where(x > 0, gammaincc(alpha, s), 1.0)
        out = np.where(lower <= 0.5, ndtri(lower), -ndtri(upper))
    return np.where(np.isfinite(x), out, np.nan)


def spi(
    panel: pd.DataFrame,
    *,
    months: int,
    baseline,
    min_years: int = MIN_BASELINE_YEARS,
    column: str = "value",
) -> pd.DataFrame:
    """Standardized precipitation index of each unit and month.

    Parameters
    ----------
    panel : pandas.DataFrame
        Long panel of monthly rainfall totals (``unit``, ``start``, ``end``,
        ``value``; every period one calendar month; mm or any unit of depth,
        ≥ 0). Daily totals must first be collapsed:
        ``collapse(panel, into="month", how="sum")``. Months absent from the
        panel count as missing.
    months : {1, 3, 6, 12}
        Time scale: the length of the running totals.
    baseline : (int, int)
        First and last baseline year, both included (``(1991, 2020)``).
    min_years : int
        Refuse baselines with fewer complete years than this (default and
        smallest allowed value: :data:`MIN_BASELINE_YEARS` = 10, a choice of
        ours: a two-parameter fit on fewer totals is mostly noise); a unit and
        calendar month with fewer valid baseline totals gets QA
        ``short_baseline`` and a missing SPI.
    column : str
        The panel column holding the totals.

    Returns
    -------
    pandas.DataFrame
        One row per input period: ``unit``, ``start``, ``end`` (the month the
        index is for: the last month of the total), ``total`` (the
        ``months``-month total), ``value`` (SPI, unitless), ``category``
        (label from :data:`SPI_CATEGORIES`, None when unknown) and ``qa``.
        The frame is itself a panel, so a window before each record's date
        can use it (:func:`covextract.derive.time.window_values`).

    Raises
    ------
    TableError
        The periods are not calendar months, a total is negative, or the
        baseline has fewer than ``min_years`` complete years in the series.

    Warns
    -----
    ShortBaselineWarning
        The baseline has fewer than 30 complete years in the series.
    """
    if isinstance(months, bool) or months not in SPI_SCALES:
        raise ValueError(
            f"SPI time scale months={months!r} is not supported; use one of "
            f"{', '.join(map(str, SPI_SCALES))}"
        )
    first, last = _check_baseline(baseline)
    min_years = _check_positive_int("min_years", min_years, MIN_BASELINE_YEARS)
    w = _read_panel(panel, column)
    if _calendar_kind(w.start, w.end) != "month":
        raise TableError(
            "the SPI needs monthly rainfall totals, one calendar month per period; this series "
            f"has periods of {int(w.length.min())} to {int(w.length.max())} days. Collapse a "
            "daily series first: collapse(panel, into='month', how='sum')"
        )
    neg = np.argwhere(w.values < 0)
    if neg.size:
        u, p = neg[0]
        raise TableError(
            f"rainfall totals must be ≥ 0; unit {w.units[u]} has {w.values[u, p]} for the period "
            f"{w.start[p]}..{w.end[p]} ({len(neg)} negative values in all). Check the layer's "
            "scale factor and nodata value"
        )

    # The calendar of months from the first to the last period; absent months are NaN.
    m0 = w.start[0].astype("datetime64[M]")
    grid_months = np.arange(m0, w.start[-1].astype("datetime64[M]") + 1)
    where = (w.start.astype("datetime64[M]") - m0).astype(np.int64)
    V = np.full((len(w.units), len(grid_months)), np.nan)
    V[:, where] = w.values
    present = np.zeros(len(grid_months), dtype=bool)
    present[where] = True

    grid_start = grid_months.astype("datetime64[D]")
    years = _year(grid_start)
    full_years = [y for y in range(first, last + 1) if present[years == y].sum() == 12]
    if len(full_years) < min_years:
        raise TableError(
            f"the SPI baseline {first}..{last} has {len(full_years)} complete years in the series "
            f"({w.start[0]} to {w.end[-1]}); at least {min_years} are needed. Use a longer "
            "series or move the baseline inside it"
        )
    if len(full_years) < RECOMMENDED_BASELINE_YEARS:
        warnings.warn(
            f"the SPI baseline {first}..{last} has only {len(full_years)} complete years in the "
            f"series; {RECOMMENDED_BASELINE_YEARS} or more are recommended (WMO-No. 1090), so the "
            "fitted distributions and the index are uncertain",
            ShortBaselineWarning,
            stacklevel=2,
        )

    totals = np.full(V.shape, np.nan)
    if V.shape[1] >= months:
        totals[:, months - 1 :] = sliding_window_view(V, months, axis=1).sum(-1)
    before_series = np.arange(len(grid_months)) < months - 1

    key = _month_index(grid_start)
    in_base = (years >= first) & (years <= last)
    out = np.full(V.shape, np.nan)
    short = np.zeros(V.shape, dtype=bool)
    no_fit = np.zeros(V.shape, dtype=bool)
    for k in range(12):
        cols = key == k
        if not cols.any():
            continue
        q, alpha, beta, n = fit_gamma(totals[:, cols & in_base], axis=1)
        sh = n < min_years
        nf = ~sh & ~np.isfinite(alpha)
        s = _spi_values(totals[:, cols], q[:, None], alpha[:, None], beta[:, None])
        out[:, cols] = np.where((sh | nf)[:, None], np.nan, s)
        short[:, cols] = sh[:, None]
        no_fit[:, cols] = nf[:, None]

    category = spi_category(out)
    beyond = np.isinf(out)
    value = np.where(beyond, np.nan, out)

    # Back to the input's periods only.
    T, C, S, B, NF, SH = (a[:, where] for a in (totals, category, value, beyond, no_fit, short))
    missing_total = np.isnan(T)
    early = np.broadcast_to(before_series[where], T.shape)
    qa = _qa_column(
        {
            "window_outside_series": missing_total & early,
            "window_gap": missing_total & ~early,
            "short_baseline": SH,
            "no_fit": NF,
            "beyond_fit": B & ~missing_total,
        }
    )
    return _frame(w.units, w.start, w.end, total=T, value=S, category=C, qa=qa)
