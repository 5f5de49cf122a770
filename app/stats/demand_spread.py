"""How far daily emergency counts stray from what the forecast said: measured on held-out weeks.

The forecast of a day's demand is ``mu_d`` (the chosen terms' rate times the local level). Two
kinds of error surround it, and they act differently on a week's occupancy:

- **day by day**: each day's rate is ``mu_d`` times its own gamma multiplier with variance
  ``alpha`` (NB2 counts, Var = mu + alpha mu^2), independent between days;
- **for the whole week**: one gamma multiplier ``L`` with mean 1 and variance ``tau2`` (size
  ``1 / tau2``) shared by every day forecast from the same morning. The local level's own
  error and a level that wanders from day to day (busy spells, quiet spells) both look like
  this: days after one morning miss together.

Counted over a week, independent daily errors partly cancel; a shared one does not: the
variance of a week's admissions is ``sum mu + alpha sum mu^2 + tau2 (sum mu)^2`` (plus the
product term where both are present). A model with only ``alpha`` makes the later nights of
the forecast too sure where the errors are shared.

:func:`heldout_spread` estimates both by maximum likelihood on the held-out days of the
rolling-origin validation (app/stats/arrivals.py): each weekly origin's days share one ``L``.
With ``alpha = 0`` a group's counts are negative multinomial (Poisson counts mixed over one
gamma rate), in closed form; with both, the shared multiplier is integrated out numerically.
Each term is kept only where a likelihood-ratio test rejects its absence at 5% (the boundary
mixture of Self & Liang 1987).

References
----------
Self SG, Liang K-Y (1987). Asymptotic properties of maximum likelihood estimators and likelihood
ratio tests under nonstandard conditions. JASA 82:605-610 (cited from memory).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from scipy import optimize, special, stats

__all__ = ["HELDOUT_LR_CRITICAL", "MAX_ALPHA", "MAX_TAU2", "Spread", "heldout_dispersion",
           "heldout_spread"]

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.intp]

# A term is kept where twice its log-likelihood gain exceeds chi2(1)'s 90% quantile: the
# parameter's zero lies on the boundary, so under its absence the statistic is a 50:50
# mixture of chi2(0) and chi2(1) (Self & Liang 1987) and this is its 5% critical value.
HELDOUT_LR_CRITICAL = float(stats.chi2.ppf(0.90, df=1))
# Largest NB2 dispersion searched (a day's rate with a coefficient of variation of 3).
MAX_ALPHA = 9.0
# Largest shared variance searched (a week's level with a coefficient of variation of 1).
MAX_TAU2 = 1.0
_SMALLEST = 1e-4
# Points and half-width (in standard deviations of log L) of the numerical integral over the
# shared multiplier: within 1e-6 of scipy's adaptive quadrature on 13 simulated weeks for
# alpha 0.05-2 and tau2 0.005-0.8 (measured; tests/stats/test_demand_spread.py checks four).
_GRID = 121
_SPAN = 10.0


@dataclass(frozen=True)
class Spread:
    """The held-out spread of daily counts around their forecast means.

    Attributes
    ----------
    alpha : float or None
        Day-by-day NB2 dispersion (None: none kept).
    tau2 : float or None
        Variance of the multiplier shared by the days forecast from one morning (None: none
        kept).
    statistics : dict of str to float
        Twice the log-likelihood gain of each fitted model over the Poisson: ``"alpha"``,
        ``"tau2"``, ``"both"``.
    """

    alpha: float | None
    tau2: float | None
    statistics: dict[str, float]

    @property
    def level_size(self) -> float | None:
        """Gamma size of the shared multiplier (1 / tau2), None where none is kept."""
        return None if self.tau2 is None else 1.0 / self.tau2


def _nb2_loglike(alpha: float, y: FloatArray, mu: FloatArray) -> float:
    if alpha <= 0:
        return float(stats.poisson.logpmf(y, mu).sum())
    size = 1.0 / alpha
    return float(stats.nbinom.logpmf(y, size, size / (size + mu)).sum())


def _checked(observed: npt.ArrayLike, means: npt.ArrayLike) -> tuple[FloatArray, FloatArray]:
    y = np.asarray(observed, dtype=float)
    mu = np.asarray(means, dtype=float)
    if y.shape != mu.shape or y.ndim != 1 or np.any(mu <= 0):
        raise ValueError("observed, means: need the same 1-D shape and means > 0")
    return y, mu


def _best_alpha(y: FloatArray, mu: FloatArray) -> tuple[float, float]:
    """(alpha, log-likelihood) of the NB2 with fixed means, alpha on [1e-4, MAX_ALPHA]."""
    found = optimize.minimize_scalar(lambda t: -_nb2_loglike(math.exp(t), y, mu),
                                     bounds=(math.log(_SMALLEST), math.log(MAX_ALPHA)),
                                     method="bounded", options={"xatol": 1e-6})
    alpha = float(math.exp(found.x))
    return alpha, _nb2_loglike(alpha, y, mu)


def heldout_dispersion(observed: npt.ArrayLike, means: npt.ArrayLike, *,
                       critical: float = HELDOUT_LR_CRITICAL) -> tuple[float | None, float]:
    """The NB2 dispersion of counts around given means (the forecast's, on held-out days).

    The means are fixed (only alpha is estimated): alpha maximises the negative binomial
    log-likelihood sum log NB(y_i; mu_i, size 1/alpha) on [0, ``MAX_ALPHA``]. A Poisson
    (alpha 0) is kept unless twice the log-likelihood gain exceeds ``critical``.

    Returns
    -------
    (alpha or None, likelihood-ratio statistic)
    """
    y, mu = _checked(observed, means)
    if y.size == 0:
        return None, 0.0
    alpha, best = _best_alpha(y, mu)
    statistic = max(0.0, 2.0 * (best - _nb2_loglike(0.0, y, mu)))
    return (alpha if statistic > critical else None), statistic


def _shared_poisson_loglike(tau2: float, y: FloatArray, mu: FloatArray,
                            groups: list[IntArray]) -> float:
    """Poisson counts whose groups each share one gamma(1/tau2, tau2) multiplier: every group
    is negative multinomial, log G(r + Y) - log G(r) + r log(r / (r + M)) + sum y log(mu /
    (r + M)) - sum log y!, with Y, M the group's totals and r = 1/tau2."""
    r = 1.0 / tau2
    total = 0.0
    for rows in groups:
        yy, mm = y[rows], mu[rows]
        big_y, big_m = float(yy.sum()), float(mm.sum())
        total += (special.gammaln(r + big_y) - special.gammaln(r)
                  + r * math.log(r / (r + big_m))
                  + float(np.sum(yy * np.log(mm / (r + big_m)) - special.gammaln(yy + 1))))
    return total


def _shared_nb_loglike(alpha: float, tau2: float, y: FloatArray, mu: FloatArray,
                       groups: list[IntArray]) -> float:
    """NB2 counts (dispersion alpha) whose groups each share one gamma(1/tau2, tau2)
    multiplier of their means, the multiplier integrated out on a log-scale grid centred on
    its Poisson-gamma posterior."""
    r, size = 1.0 / tau2, 1.0 / alpha
    total = 0.0
    for rows in groups:
        yy, mm = y[rows], mu[rows]
        shape, rate = r + float(yy.sum()), r + float(mm.sum())
        # Centred on the Poisson-gamma posterior; wide enough for it and for the prior (the
        # NB2 days' likelihood is flatter than the Poisson's, so the integrand can be as
        # wide as the prior): the standard deviations of log L under each.
        width = max(math.sqrt(float(special.polygamma(1, shape))),
                    math.sqrt(float(special.polygamma(1, r))), 1e-3)
        log_l = math.log(shape / rate) + np.linspace(-_SPAN, _SPAN, _GRID) * width
        level = np.exp(log_l)
        m = mm[:, None] * level[None, :]
        log_days = stats.nbinom.logpmf(yy[:, None], size, size / (size + m)).sum(axis=0)
        # The gamma density in log L: r log r - log G(r) + r log L - r L.
        log_prior = r * math.log(r) - special.gammaln(r) + r * log_l - r * level
        terms = log_days + log_prior
        top = float(terms.max())
        step = float(log_l[1] - log_l[0])
        total += top + math.log(float(np.sum(np.exp(terms - top))) * step)
    return total


def heldout_spread(observed: npt.ArrayLike, means: npt.ArrayLike, group: npt.ArrayLike, *,
                   critical: float = HELDOUT_LR_CRITICAL) -> Spread:
    """The day-by-day and the shared dispersion of held-out counts around their means.

    Parameters
    ----------
    observed, means : array_like, shape (n,)
        Held-out daily counts and the forecast's means for them (> 0).
    group : array_like of int, shape (n,)
        The forecast morning (origin) of each day: days of one group share the multiplier.

    Returns
    -------
    Spread
        The Poisson, alpha only, tau2 only or both: the fullest model that beats each of
        the models with one term fewer by twice the log-likelihood gain ``critical``.
    """
    y, mu = _checked(observed, means)
    g = np.asarray(group)
    if g.shape != y.shape:
        raise ValueError(f"group: expected shape {y.shape}, got {g.shape}")
    if y.size == 0:
        return Spread(None, None, {"alpha": 0.0, "tau2": 0.0, "both": 0.0})
    groups = [np.flatnonzero(g == v) for v in np.unique(g)]
    poisson = _nb2_loglike(0.0, y, mu)
    alpha_only, ll_alpha = _best_alpha(y, mu)
    found = optimize.minimize_scalar(
        lambda t: -_shared_poisson_loglike(math.exp(t), y, mu, groups),
        bounds=(math.log(_SMALLEST), math.log(MAX_TAU2)), method="bounded",
        options={"xatol": 1e-6})
    tau2_only = float(math.exp(found.x))
    ll_tau2 = -float(found.fun)
    # Both: starting from the one-term fits, on the log scale of each.
    start = np.log([max(alpha_only, 1e-3), max(tau2_only, 1e-3)])
    bounds = [(math.log(_SMALLEST), math.log(MAX_ALPHA)),
              (math.log(_SMALLEST), math.log(MAX_TAU2))]
    joint = optimize.minimize(
        lambda t: -_shared_nb_loglike(math.exp(t[0]), math.exp(t[1]), y, mu, groups),
        start, method="L-BFGS-B", bounds=bounds)
    ll_both = max(-float(joint.fun), ll_alpha, ll_tau2)
    both = (float(math.exp(joint.x[0])), float(math.exp(joint.x[1])))
    statistics = {"alpha": max(0.0, 2 * (ll_alpha - poisson)),
                  "tau2": max(0.0, 2 * (ll_tau2 - poisson)),
                  "both": max(0.0, 2 * (ll_both - poisson))}
    if (2 * (ll_both - ll_alpha) > critical and 2 * (ll_both - ll_tau2) > critical
            and -float(joint.fun) >= max(ll_alpha, ll_tau2)):
        return Spread(both[0], both[1], statistics)
    keep_alpha = statistics["alpha"] > critical
    keep_tau2 = statistics["tau2"] > critical
    if keep_alpha and (not keep_tau2 or ll_alpha >= ll_tau2):
        return Spread(alpha_only, None, statistics)
    if keep_tau2:
        return Spread(None, tau2_only, statistics)
    return Spread(None, None, statistics)
