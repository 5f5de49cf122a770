"""Daily admission counts: a Poisson GLM with weekday and seasonal effects, or its negative
binomial version where the counts are overdispersed.

The log of the expected count on day d is

    log mu_d = b0 + b_weekday(d) + c1 cos(2 pi doy/365.25) + c2 sin(2 pi doy/365.25),

with Monday as the weekday reference. The seasonal pair needs a window of two complete annual
cycles (the same rule as statsmodels' ``seasonal_decompose``, which refuses fewer than two
complete cycles): from one cycle, or one and a bit, the annual curve is confounded with any
change of level in the meantime (on the demo's critical care unit, the months before its bed
count rose: validated on the 91 days before each of the seven retrainings of its 2026
backtest, the fit without season was the better at six).

Where a day was only partly open to admissions (a full unit turns emergencies away, and those
leave no record), its count is the day's demand thinned to the open part:
``log E[count_d] = log open_d + log mu_d``, the open share entering as an offset (the usual
exposure term of a Poisson regression), so ``mu_d`` is the demand.

Overdispersion is tested first (Cameron & Trivedi 1990: regress ((y - mu)^2 - y) / mu on mu
without intercept; a positive slope significant at 5% means Var = mu + alpha mu^2 with
alpha > 0). Only then is the negative binomial (NB2) fitted by maximum likelihood; a Poisson
that fits stays a Poisson.

References
----------
Cameron AC, Trivedi PK (1990). Regression-based tests for overdispersion in the Poisson model.
Journal of Econometrics 46:347-364.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import date
from typing import Any

import numpy as np
import numpy.typing as npt
from scipy import stats

__all__ = ["DailyRateModel", "fit_daily_rate", "hourly_profile"]

SEASON_MIN_DAYS = 2 * 365
OVERDISPERSION_LEVEL = 0.05
# Days open to admissions for less than this share carry almost no information on the demand
# (their count is a small slice of it); they are left out of the fit. Common practice, no source.
MIN_EXPOSURE = 0.05


def _design(days: Sequence[date], seasonal: bool) -> npt.NDArray[np.float64]:
    weekday = np.array([d.weekday() for d in days])
    columns = [np.ones(len(days))]
    columns += [(weekday == w).astype(float) for w in range(1, 7)]
    if seasonal:
        doy = np.array([d.timetuple().tm_yday for d in days], dtype=float)
        angle = 2 * np.pi * doy / 365.25
        columns += [np.cos(angle), np.sin(angle)]
    return np.column_stack(columns)


@dataclass(frozen=True)
class DailyRateModel:
    """Expected admissions per day, by weekday and season, and their dispersion.

    Attributes
    ----------
    coefficients : tuple of float
        Intercept, six weekday effects (Tuesday..Sunday against Monday) and, when
        ``seasonal``, the cosine and sine of the annual cycle; on the log scale.
    seasonal : bool
    alpha : float or None
        NB2 dispersion (Var = mu + alpha mu^2); None for a Poisson.
    n_days : int
        Days the model was fitted on.
    overdispersion_p : float
        One-sided p-value of the Cameron-Trivedi test on the Poisson fit.
    mean_count : float
        Mean observed count per fitted day.
    exposure_mean : float
        Mean share of the fitted days open to admissions (1 without exposures).
    """

    coefficients: tuple[float, ...]
    seasonal: bool
    alpha: float | None
    n_days: int
    overdispersion_p: float
    mean_count: float = field(default=0.0)
    exposure_mean: float = field(default=1.0)

    def mean(self, days: Sequence[date]) -> npt.NDArray[np.float64]:
        """Expected count on each of ``days``."""
        if not days:
            return np.zeros(0)
        return np.exp(_design(days, self.seasonal) @ np.asarray(self.coefficients))

    @property
    def size(self) -> float | None:
        """Negative binomial size (1/alpha), None for a Poisson."""
        return None if self.alpha is None else 1.0 / self.alpha

    def to_dict(self) -> dict[str, Any]:
        return {"coefficients": list(self.coefficients), "seasonal": self.seasonal,
                "alpha": self.alpha, "n_days": self.n_days,
                "overdispersion_p": self.overdispersion_p, "mean_count": self.mean_count,
                "exposure_mean": self.exposure_mean}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> DailyRateModel:
        return cls(coefficients=tuple(float(c) for c in data["coefficients"]),
                   seasonal=bool(data["seasonal"]),
                   alpha=None if data["alpha"] is None else float(data["alpha"]),
                   n_days=int(data["n_days"]), overdispersion_p=float(data["overdispersion_p"]),
                   mean_count=float(data.get("mean_count", 0.0)),
                   exposure_mean=float(data.get("exposure_mean", 1.0)))


def fit_daily_rate(days: Sequence[date], counts: npt.ArrayLike,
                   exposure: npt.ArrayLike | None = None) -> DailyRateModel:
    """Fit the daily count model.

    Parameters
    ----------
    days : sequence of datetime.date
        Every day of the fitting window, including days with no admission.
    counts : array_like of int, shape (len(days),)
    exposure : array_like of float, shape (len(days),), optional
        Share of each day open to admissions (0..1; default 1). Days open less than
        ``MIN_EXPOSURE`` are left out; the fitted rates are the demand of a wholly open day.

    Returns
    -------
    DailyRateModel
    """
    y = np.asarray(counts, dtype=float)
    if y.shape != (len(days),):
        raise ValueError(f"counts: expected shape ({len(days)},), got {y.shape}")
    if np.any(y < 0) or np.any(y != np.round(y)):
        raise ValueError("counts: must be whole numbers >= 0")
    open_share = np.ones(len(days)) if exposure is None else np.asarray(exposure, dtype=float)
    if open_share.shape != (len(days),) or np.any(~np.isfinite(open_share)) \
            or np.any(open_share < 0) or np.any(open_share > 1):
        raise ValueError(f"exposure: needs one share in 0..1 per day ({len(days)})")
    seasonal = len(days) >= SEASON_MIN_DAYS  # the window's span, closed days included
    keep = open_share >= MIN_EXPOSURE
    days = [d for d, k in zip(days, keep, strict=True) if k]
    y, open_share = y[keep], open_share[keep]
    if len(days) < 14:
        raise ValueError("days: at least 14 days are needed to fit weekday effects, "
                         f"got {len(days)}")
    x = _design(days, seasonal)
    offset = np.log(open_share)
    if y.sum() == 0:
        coefficients = np.r_[-30.0, np.zeros(x.shape[1] - 1)]
        return DailyRateModel(tuple(coefficients), seasonal, None, len(days), 1.0, 0.0,
                              float(open_share.mean()))
    # Imported here: statsmodels takes seconds to import and only fitting needs it, so
    # each web server worker starts without it.
    import statsmodels.api as sm

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # perfect-separation style warnings on sparse weekdays
        poisson = sm.GLM(y, x, family=sm.families.Poisson(), offset=offset).fit()
    mu = poisson.fittedvalues
    aux = ((y - mu) ** 2 - y) / mu
    slope = float(np.sum(aux * mu) / np.sum(mu * mu))
    resid = aux - slope * mu
    se = math.sqrt(float(np.sum(resid**2)) / (len(y) - 1) / float(np.sum(mu * mu)))
    p_value = float(stats.t.sf(slope / se, df=len(y) - 1)) if se > 0 else 1.0
    if slope <= 0 or p_value >= OVERDISPERSION_LEVEL:
        return DailyRateModel(tuple(float(c) for c in poisson.params), seasonal, None, len(days),
                              p_value, float(y.mean()), float(open_share.mean()))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        nb = sm.NegativeBinomial(y, x, loglike_method="nb2", offset=offset).fit(
            start_params=np.r_[poisson.params, slope], disp=0, maxiter=200)
    params = np.asarray(nb.params, dtype=float)
    return DailyRateModel(tuple(float(c) for c in params[:-1]), seasonal, float(params[-1]),
                          len(days), p_value, float(y.mean()), float(open_share.mean()))


def hourly_profile(hours: npt.ArrayLike, *, prior: float = 1.0) -> npt.NDArray[np.float64]:
    """Share of admissions in each local clock hour 0..23 (add-``prior`` smoothing)."""
    h = np.asarray(hours, dtype=int)
    if h.size and (h.min() < 0 or h.max() > 23):
        raise ValueError("hours: must lie in 0..23")
    counts = np.bincount(h, minlength=24).astype(float) + prior
    return counts / counts.sum()
