"""Population proxies from night-time lights: log-log calibration on known counts.

:func:`calibrate` fits ``log(pop) = a + b·log(light)`` on units with a known
count and predicts the others with a prediction interval and Duan's (1983,
JASA 78:605-610) smearing back-transformation. A proxy: lights miss poor
unlit settlements and saturate in city centres. Check it against a census
before using it as a denominator.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field

import numpy as np

from covextract.errors import CovextractWarning, RecipeError, TableError

__all__ = ["CALIBRATION_QA_CODES", "CalibrationWarning", "Calibration", "calibrate"]

#: QA reason codes of :meth:`Calibration.predict`, with their meaning.
CALIBRATION_QA_CODES = {
    "unlit": (
        "the unit's light is 0 or negative: log(light) does not exist, so the unit is left "
        "out of the fit and gets no prediction (missing, not 0)"
    ),
    "no_light_value": "the unit has no light value; it gets no prediction",
    "extrapolated": (
        "the unit's light lies outside the range of the units that calibrated the fit; "
        "the prediction is an extrapolation"
    ),
}


class CalibrationWarning(CovextractWarning):
    """The light-population fit rests on few units, or a prediction extrapolates."""


@dataclass(eq=False)
class Calibration:
    """A fitted log-log relation between light and population.

    ``log(pop) = a + b·log(light)`` (natural logarithms), fitted by ordinary
    least squares on the units with a known count > 0 and light > 0.

    Attributes
    ----------
    a, b : float
        Intercept and slope on the log scale.
    r2 : float
        Coefficient of determination on the log scale.
    rmse : float
        Root mean square of the log residuals, sqrt(Σe²/n).
    residual_se : float
        Residual standard error sqrt(Σe²/(n−2)), used for the intervals.
    n : int
        Units that calibrated the fit.
    smearing : float
        Duan's (1983) smearing factor, mean(exp(e)).
    light_range : tuple of float
        Smallest and largest light among the calibrating units.
    level : float
        Coverage of the prediction intervals (0.95: 95 %).
    mean_log_light, sxx : float
        Mean of log(light) and Σ(log light − mean)² of the calibrating units.
    used : ndarray of bool
        Per input unit, whether it calibrated the fit.
    residuals : ndarray of float64
        Log residuals of the calibrating units, in input order.
    n_unlit : int
        Units with a known count > 0 left out because their light is 0,
        negative or missing.
    n_zero_known : int
        Units with a known count of 0, left out (no log of 0).
    """

    a: float
    b: float
    r2: float
    rmse: float
    residual_se: float
    n: int
    smearing: float
    light_range: tuple
    level: float
    mean_log_light: float
    sxx: float
    used: np.ndarray = field(repr=False)
    residuals: np.ndarray = field(repr=False)
    n_unlit: int = 0
    n_zero_known: int = 0

    @property
    def df(self) -> int:
        """Residual degrees of freedom, n − 2."""
        return self.n - 2

    def summary(self) -> dict:
        """Return the fit as plain numbers, for the codebook and the run summary."""
        return {
            "a": self.a,
            "b": self.b,
            "r2": self.r2,
            "rmse": self.rmse,
            "n": self.n,
            "smearing": self.smearing,
            "light_min": self.light_range[0],
            "light_max": self.light_range[1],
            "level": self.level,
        }

    def predict(self, light):
        """Predict population from light, with a prediction interval.

        Parameters
        ----------
        light : array-like of float
            Light per unit, in the same measure the fit used (e.g. the
            unit's area-integrated radiance).

        Returns
        -------
        estimate, lower, upper : ndarray of float64
            ``estimate = exp(a + b·log light) · smearing`` (Duan 1983, an
            estimate of the mean count); ``lower``/``upper`` are the OLS
            prediction interval on the log scale, ``ŷ ± t·s·sqrt(1 + 1/n +
            (x − x̄)²/Sxx)`` with Student's t on n − 2 degrees of freedom,
            back-transformed by exp (an interval for the count itself; it is
            not centred on the smeared estimate). NaN for units with light
            <= 0 or missing.
        qa : list of list of str
            Per unit, codes of :data:`CALIBRATION_QA_CODES`.

        Warns
        -----
        CalibrationWarning
            Some lights lie outside :attr:`light_range` (code ``extrapolated``).
        """
        from scipy import stats

        x = np.atleast_1d(np.asarray(light, dtype=np.float64))
        estimate = np.full(x.shape, np.nan)
        lower = np.full(x.shape, np.nan)
        upper = np.full(x.shape, np.nan)
        finite = np.isfinite(x)
        with np.errstate(invalid="ignore"):
            ok = finite & (x > 0)
        lx = np.log(x[ok])
        yhat = self.a + self.b * lx
        lever = (lx - self.mean_log_light) ** 2 / self.sxx
        se = self.residual_se * np.sqrt(1.0 + 1.0 / self.n + lever)
        t = stats.t.ppf(0.5 + self.level / 2.0, self.df)
        estimate[ok] = np.exp(yhat) * self.smearing
        lower[ok] = np.exp(yhat - t * se)
        upper[ok] = np.exp(yhat + t * se)
        lo, hi = self.light_range
        with np.errstate(invalid="ignore"):
            extrapolated = ok & ((x < lo) | (x > hi))
        qa = []
        for i in range(x.size):
            if not finite.flat[i]:
                qa.append(["no_light_value"])
            elif not ok.flat[i]:
                qa.append(["unlit"])
            elif extrapolated.flat[i]:
                qa.append(["extrapolated"])
            else:
                qa.append([])
        k = int(extrapolated.sum())
        if k:
            warnings.warn(
                f"{k} of {x.size} predictions extrapolate beyond the calibration light range "
                f"[{lo:.6g}, {hi:.6g}]; they carry the QA code 'extrapolated'. Calibrate with "
                "units that span the lights to predict, or treat these values with care",
                CalibrationWarning,
                stacklevel=2,
            )
        return estimate, lower, upper, qa


def calibrate(light, known, *, min_units: int = 10, level: float = 0.95) -> Calibration:
    """Fit ``log(pop) = a + b·log(light)`` on the units with a known count.

    Parameters
    ----------
    light : array-like of float
        Light per unit (e.g. area-integrated radiance, nW·cm⁻²·sr⁻¹·km²).
    known : array-like of float
        Known count per unit; NaN where unknown.
    min_units : int
        Fewer calibrating units than this give a :class:`CalibrationWarning`.
    level : float
        Coverage of the prediction intervals, in (0, 1).

    Returns
    -------
    Calibration

    Raises
    ------
    TableError
        ``light`` and ``known`` differ in length, a known count is negative,
        fewer than 3 units can calibrate the fit, or their lights are all equal.
    RecipeError
        ``level`` is not in (0, 1).

    Warns
    -----
    CalibrationWarning
        Fewer than ``min_units`` units calibrate the fit.

    Notes
    -----
    Unlit units (light <= 0 or missing) have no log(light): they are left out
    of the fit and :meth:`Calibration.predict` gives them no prediction
    (missing, QA ``unlit``), since the fitted relation says nothing about
    dark places. Known counts of 0 are left out for the same reason (no log
    of 0). The fit is ordinary least squares on the log points; the smearing
    factor mean(exp(e)) of Duan (1983) corrects the back-transformed
    estimate for the log-scale residual spread without assuming normality.
    """
    if not (0.0 < float(level) < 1.0):
        raise RecipeError(f"the prediction interval level must be in (0, 1), got {level!r}")
    try:
        x = np.asarray(light, dtype=np.float64).ravel()
        y = np.asarray(known, dtype=np.float64).ravel()
    except (TypeError, ValueError) as exc:
        raise TableError(
            f"light and known counts must be numbers; {exc}. Convert the columns to numbers first"
        ) from exc
    if x.size != y.size:
        raise TableError(
            f"{x.size} light values but {y.size} known counts; give one of each per unit"
        )
    with np.errstate(invalid="ignore"):
        negative = np.flatnonzero(y < 0)
        has_known = np.isfinite(y) & (y > 0)
        lit = np.isfinite(x) & (x > 0)
    if negative.size:
        raise TableError(
            f"{negative.size} known count(s) are negative (first at position {int(negative[0])}: "
            f"{y[negative[0]]:g}); counts must be >= 0"
        )
    used = has_known & lit
    n = int(used.sum())
    if n < 3:
        raise TableError(
            f"only {n} unit(s) have both a known count > 0 and light > 0; the log-log fit "
            "needs at least 3 (a line through 2 points has no residual spread for an "
            "interval). Add units with known counts"
        )
    lx = np.log(x[used])
    ly = np.log(y[used])
    xbar = float(lx.mean())
    sxx = float(np.sum((lx - xbar) ** 2))
    if not sxx > 0:
        raise TableError(
            f"the {n} calibrating units all have the same light ({x[used][0]:g}); the slope "
            "of log(pop) on log(light) cannot be fitted. Calibrate with units of varied light"
        )
    ybar = float(ly.mean())
    b = float(np.sum((lx - xbar) * (ly - ybar)) / sxx)
    a = ybar - b * xbar
    resid = ly - (a + b * lx)
    ssr = float(np.sum(resid**2))
    sst = float(np.sum((ly - ybar) ** 2))
    r2 = 1.0 - ssr / sst if sst > 0 else float("nan")
    if n < min_units:
        warnings.warn(
            f"only {n} units calibrate the light-population fit (fewer than {min_units}); "
            "its coefficients and intervals are unstable. Add units with known counts",
            CalibrationWarning,
            stacklevel=2,
        )
    return Calibration(
        a=float(a),
        b=b,
        r2=float(r2),
        rmse=math.sqrt(ssr / n),
        residual_se=math.sqrt(ssr / (n - 2)),
        n=n,
        smearing=float(np.mean(np.exp(resid))),
        light_range=(float(x[used].min()), float(x[used].max())),
        level=float(level),
        mean_log_light=xbar,
        sxx=sxx,
        used=used,
        residuals=resid,
        n_unlit=int((has_known & ~lit).sum()),
        n_zero_known=int((np.isfinite(y) & (y == 0)).sum()),
    )
