"""Daily admission counts: a Poisson GLM with weekday and seasonal effects, or its negative
binomial version where the counts are overdispersed.

The log of the expected count on day d is

    log mu_d = b0 + b_weekday(d) + c1 cos(2 pi doy/365.25) + c2 sin(2 pi doy/365.25),

with Monday as the weekday reference. Whether the seasonal pair and a local level help is a
question for held-out days, not for a rule on the history's span: :func:`choose_demand_terms`
replays the last weeks of the history (rolling origin: fit on the days before each origin,
score the week after it) and keeps the terms with the best predictive log score. From one
annual cycle, or one and a bit, the annual curve is confounded with any change of level in
the meantime, which is exactly what that comparison catches.

A local level follows recent demand: the ratio of the admissions seen to those the model
expected, over the past days weighted by a half-life and shrunk towards 1 by a week's worth of
expected admissions (:func:`level_multiplier`); the half-life (or none) is chosen by the same
rolling-origin comparison. Besides the unit's own annual pair, the hospital's (one pair
fitted to all units' counts at once, app/stats/hospital_season.py) is a candidate: a fixed
offset with no parameter of the unit's own, so a unit with one year of history, too little
for its own, can still follow a winter rise its siblings show.

Where a day was only partly open to admissions (a full unit turns emergencies away, and those
leave no record), its count is the day's demand thinned to the open part:
``log E[count_d] = log open_d + log mu_d``, the open share entering as an offset (the usual
exposure term of a Poisson regression), so ``mu_d`` is the demand.

Overdispersion is tested first (Cameron & Trivedi 1990: regress ((y - mu)^2 - y) / mu on mu
without intercept; a positive slope significant at 5% means Var = mu + alpha mu^2 with
alpha > 0). Only then is the negative binomial (NB2) fitted by maximum likelihood; a Poisson
that fits stays a Poisson.

That in-sample dispersion measures the counts around the fitted curve, not around what the
forecast will say: a change of level or a season the chosen terms leave out inflates it (the
forecast's local level then removes what it measured), and the error of the level itself and
of the fitted rates is missing from it. The forecast's dispersion is therefore taken from the
same held-out days that choose the terms, around the chosen candidate's held-out means, day by
day and shared by the days forecast from one morning (app/stats/demand_spread.py).

References
----------
Cameron AC, Trivedi PK (1990). Regression-based tests for overdispersion in the Poisson model.
Journal of Econometrics 46:347-364.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from datetime import date
from typing import Any

import numpy as np
import numpy.typing as npt
from scipy import stats

from app.stats.demand_spread import heldout_spread
from app.stats.hospital_season import annual_angle, season_offset

__all__ = ["DailyRateModel", "DemandChoice", "Replayed", "choose_demand_terms", "fit_daily_rate",
           "fit_terms",
           "chosen_by_one_se", "hourly_profile", "level_multiplier", "replay_candidates"]

# The annual pair is tried (as a candidate on held-out weeks) from one full cycle of history
# on; below it cannot be estimated. Without such a comparison it is fitted only from two full
# cycles (the rule of statsmodels' seasonal_decompose, which refuses fewer than two).
SEASON_MIN_DAYS = 365
SEASON_UNCHECKED_DAYS = 2 * 365
# Local-level half-lives tried (days; None: no local level) and the prior's weight in days of
# expected admissions. Common practice for exponential smoothing of a rate, no source.
LEVEL_HALF_LIVES: tuple[float | None, ...] = (None, 14.0, 28.0, 56.0)
LEVEL_PRIOR_DAYS = 7.0
# Rolling origins: one a week over the last VALIDATION_ORIGINS weeks, each scoring the week
# after it (the days a forecast faces).
VALIDATION_ORIGINS = 13
VALIDATION_HORIZON = 7
OVERDISPERSION_LEVEL = 0.05
# Fewer held-out days than this keep the in-sample dispersion (four weekly origins). Common
# practice, no source.
MIN_HELDOUT_DAYS = 28
# Days open to admissions for less than this share carry almost no information on the demand
# (their count is a small slice of it); they are left out of the fit. Common practice, no source.
MIN_EXPOSURE = 0.05


# The annual pattern of a candidate: none (False), the unit's own pair (True), or the
# hospital's pair as a fixed offset (HOSPITAL, app/stats/hospital_season.py).
HOSPITAL = "hospital"
Season = bool | str


def _design(days: Sequence[date], seasonal: bool) -> npt.NDArray[np.float64]:
    weekday = np.array([d.weekday() for d in days])
    columns = [np.ones(len(days))]
    columns += [(weekday == w).astype(float) for w in range(1, 7)]
    if seasonal:
        angle = annual_angle(days)
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
    level_half_life : float or None
        Half-life in days of the local level applied at forecast time (None: no local level).
    tau2 : float or None
        Variance of a multiplier shared by all the days of one forecast (mean 1; the level's
        own error, app/stats/demand_spread.py); None: the days' errors are independent.
    hospital_season : (float, float) or None
        The hospital's annual pair (app/stats/hospital_season.py), a fixed offset on the log
        scale in place of a seasonal pair of the unit's own; None: not used.
    """

    coefficients: tuple[float, ...]
    seasonal: bool
    alpha: float | None
    n_days: int
    overdispersion_p: float
    mean_count: float = field(default=0.0)
    exposure_mean: float = field(default=1.0)
    level_half_life: float | None = field(default=None)
    tau2: float | None = field(default=None)
    hospital_season: tuple[float, float] | None = field(default=None)

    def mean(self, days: Sequence[date]) -> npt.NDArray[np.float64]:
        """Expected count on each of ``days``."""
        if not days:
            return np.zeros(0)
        log_mu = _design(days, self.seasonal) @ np.asarray(self.coefficients)
        if self.hospital_season is not None:
            log_mu = log_mu + season_offset(days, self.hospital_season)
        return np.exp(log_mu)

    @property
    def size(self) -> float | None:
        """Negative binomial size (1/alpha), None for a Poisson."""
        return None if self.alpha is None else 1.0 / self.alpha

    @property
    def level_size(self) -> float | None:
        """Gamma size of the multiplier shared by a forecast's days (1/tau2), None if none."""
        return None if self.tau2 is None else 1.0 / self.tau2

    def to_dict(self) -> dict[str, Any]:
        return {"coefficients": list(self.coefficients), "seasonal": self.seasonal,
                "alpha": self.alpha, "n_days": self.n_days,
                "overdispersion_p": self.overdispersion_p, "mean_count": self.mean_count,
                "exposure_mean": self.exposure_mean, "level_half_life": self.level_half_life,
                "tau2": self.tau2,
                "hospital_season": (None if self.hospital_season is None
                                    else list(self.hospital_season))}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> DailyRateModel:
        return cls(coefficients=tuple(float(c) for c in data["coefficients"]),
                   seasonal=bool(data["seasonal"]),
                   alpha=None if data["alpha"] is None else float(data["alpha"]),
                   n_days=int(data["n_days"]), overdispersion_p=float(data["overdispersion_p"]),
                   mean_count=float(data.get("mean_count", 0.0)),
                   exposure_mean=float(data.get("exposure_mean", 1.0)),
                   level_half_life=(None if data.get("level_half_life") is None
                                    else float(data["level_half_life"])),
                   tau2=None if data.get("tau2") is None else float(data["tau2"]),
                   hospital_season=(None if data.get("hospital_season") is None
                                    else (float(data["hospital_season"][0]),
                                          float(data["hospital_season"][1]))))


def _checked(days: Sequence[date], counts: npt.ArrayLike, exposure: npt.ArrayLike | None
             ) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.float64]]:
    y = np.asarray(counts, dtype=float)
    if y.shape != (len(days),):
        raise ValueError(f"counts: expected shape ({len(days)},), got {y.shape}")
    if np.any(y < 0) or np.any(y != np.round(y)):
        raise ValueError("counts: must be whole numbers >= 0")
    open_share = np.ones(len(days)) if exposure is None else np.asarray(exposure, dtype=float)
    if open_share.shape != (len(days),) or np.any(~np.isfinite(open_share)) \
            or np.any(open_share < 0) or np.any(open_share > 1):
        raise ValueError(f"exposure: needs one share in 0..1 per day ({len(days)})")
    return y, open_share


def fit_daily_rate(days: Sequence[date], counts: npt.ArrayLike,
                   exposure: npt.ArrayLike | None = None, *, seasonal: bool | None = None,
                   level_half_life: float | None = None,
                   hospital_season: tuple[float, float] | None = None) -> DailyRateModel:
    """Fit the daily count model.

    Parameters
    ----------
    days : sequence of datetime.date
        Every day of the fitting window, including days with no admission.
    counts : array_like of int, shape (len(days),)
    exposure : array_like of float, shape (len(days),), optional
        Share of each day open to admissions (0..1; default 1). Days open less than
        ``MIN_EXPOSURE`` are left out; the fitted rates are the demand of a wholly open day.
    seasonal : bool, optional
        Fit the annual pair; default: when the window spans ``SEASON_UNCHECKED_DAYS`` or more
        (pass the choice of :func:`choose_demand_terms` instead where there is one).
    level_half_life : float, optional
        Stored with the model for the forecast's local level (:func:`level_multiplier`).
    hospital_season : (float, float), optional
        The hospital's annual pair as a fixed offset (use with ``seasonal=False``).

    Returns
    -------
    DailyRateModel
    """
    y, open_share = _checked(days, counts, exposure)
    if seasonal and hospital_season is not None:
        raise ValueError("seasonal and hospital_season: one annual pattern at most")
    if seasonal is None:
        # the window's span, closed days included
        seasonal = hospital_season is None and len(days) >= SEASON_UNCHECKED_DAYS
    keep = open_share >= MIN_EXPOSURE
    days = [d for d, k in zip(days, keep, strict=True) if k]
    y, open_share = y[keep], open_share[keep]
    if len(days) < 14:
        raise ValueError("days: at least 14 days are needed to fit weekday effects, "
                         f"got {len(days)}")
    x = _design(days, seasonal)
    offset = np.log(open_share)
    if hospital_season is not None:
        offset = offset + season_offset(days, hospital_season)
    if y.sum() == 0:
        coefficients = np.r_[-30.0, np.zeros(x.shape[1] - 1)]
        return DailyRateModel(tuple(coefficients), seasonal, None, len(days), 1.0, 0.0,
                              float(open_share.mean()), level_half_life,
                              hospital_season=hospital_season)
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
                              p_value, float(y.mean()), float(open_share.mean()),
                              level_half_life, hospital_season=hospital_season)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        nb = sm.NegativeBinomial(y, x, loglike_method="nb2", offset=offset).fit(
            start_params=np.r_[poisson.params, slope], disp=0, maxiter=200)
    params = np.asarray(nb.params, dtype=float)
    return DailyRateModel(tuple(float(c) for c in params[:-1]), seasonal, float(params[-1]),
                          len(days), p_value, float(y.mean()), float(open_share.mean()),
                          level_half_life, hospital_season=hospital_season)


def fit_terms(days: Sequence[date], counts: npt.ArrayLike, exposure: npt.ArrayLike | None,
              seasonal: Season, level_half_life: float | None, *, plain: DailyRateModel,
              hospital_season: tuple[float, float] | None = None) -> DailyRateModel:
    """The rate model with the chosen terms (:func:`choose_demand_terms`): no season (``plain``,
    the non-seasonal fit of the same days, reused), the hospital's pair as an offset, or the
    unit's own pair; with ``level_half_life``."""
    if seasonal == HOSPITAL:
        return fit_daily_rate(days, counts, exposure, seasonal=False,
                              level_half_life=level_half_life, hospital_season=hospital_season)
    if seasonal:
        return fit_daily_rate(days, counts, exposure, seasonal=True,
                              level_half_life=level_half_life)
    return replace(plain, level_half_life=level_half_life)


def level_multiplier(observed: npt.ArrayLike, expected: npt.ArrayLike,
                     half_life: float | None, prior_days: float = LEVEL_PRIOR_DAYS) -> float:
    """Recent demand relative to the model: the local level that multiplies its rates.

    Parameters
    ----------
    observed, expected : array_like, shape (n,)
        Admissions seen and expected (the model's mean times the open share) on consecutive
        past days, the last entry being the latest day.
    half_life : float or None
        Weight 0.5 ** (age / half_life) for a day ``age`` days before the latest; None: 1.
    prior_days : float
        The ratio is shrunk towards 1 by this many days of expected admissions (a gamma
        prior with mean 1), so a quiet week on a small unit moves the level only a little.

    Returns
    -------
    float
        (sum w y + P) / (sum w e + P) with P = prior_days x mean(e); 1 without data.
    """
    y = np.asarray(observed, dtype=float)
    e = np.asarray(expected, dtype=float)
    if y.shape != e.shape or y.ndim != 1:
        raise ValueError(f"observed, expected: need the same 1-D shape, got {y.shape}, {e.shape}")
    if half_life is None or y.size == 0 or not np.any(e > 0):
        return 1.0
    if not half_life > 0:
        raise ValueError(f"half_life: must be > 0 or None, got {half_life!r}")
    age = np.arange(y.size - 1, -1, -1, dtype=float)
    w = 0.5 ** (age / half_life)
    prior = prior_days * float(e.mean())
    return float((w @ y + prior) / (w @ e + prior))


@dataclass(frozen=True)
class DemandChoice:
    """The demand terms chosen on held-out weeks, and the evidence.

    Attributes
    ----------
    seasonal : bool or ``HOSPITAL``
        No annual pattern, the unit's own, or the hospital's.
    level_half_life : float or None
    scores : tuple of (bool or str, float or None, float)
        Each candidate (annual pattern, half-life) with its mean log score per held-out day
        (higher is better).
    n_origins : int
        Weekly origins scored (0: too little history to compare; the defaults stand).
    """

    seasonal: Season
    level_half_life: float | None
    scores: tuple[tuple[Season, float | None, float], ...]
    n_origins: int
    # The spread of the held-out days around the chosen candidate's held-out means
    # (app/stats/demand_spread.py): NB2 dispersion day by day (None: none) and the variance of
    # a multiplier shared by the days forecast from one morning (None: none); and the days
    # they were measured on (0: not measured, the in-sample dispersion stands).
    alpha: float | None = None
    heldout_days: int = 0
    tau2: float | None = None

    def to_dict(self) -> dict[str, Any]:
        return {"seasonal": self.seasonal, "level_half_life": self.level_half_life,
                "n_origins": self.n_origins, "alpha": self.alpha, "tau2": self.tau2,
                "heldout_days": self.heldout_days,
                "scores": [{"seasonal": s, "level_half_life": h, "log_score": v}
                           for s, h, v in self.scores]}


def _poisson_means(days: Sequence[date], y: npt.NDArray[np.float64],
                   open_share: npt.NDArray[np.float64], seasonal: Season,
                   ahead: Sequence[date], hospital_season: tuple[float, float] | None = None
                   ) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.float64]] | None:
    """The Poisson GLM's demand on the fitted days and on ``ahead`` (None if it cannot fit);
    ``seasonal`` ``HOSPITAL``: the weekday GLM with ``hospital_season`` as an offset."""
    import statsmodels.api as sm

    keep = open_share >= MIN_EXPOSURE
    if keep.sum() < 14 or y[keep].sum() == 0:
        return None
    fit_days = [d for d, k in zip(days, keep, strict=True) if k]
    own = seasonal is True
    pair = hospital_season if seasonal == HOSPITAL else None
    if seasonal == HOSPITAL and pair is None:
        raise ValueError("the hospital's season needs hospital_season")

    def offset(on: Sequence[date]) -> npt.NDArray[np.float64]:
        return np.zeros(len(on)) if pair is None else season_offset(on, pair)

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        model = sm.GLM(y[keep], _design(fit_days, own), family=sm.families.Poisson(),
                       offset=np.log(open_share[keep]) + offset(fit_days)).fit()
    params = np.asarray(model.params, dtype=float)
    return (np.exp(_design(list(days), own) @ params + offset(list(days))),
            np.exp(_design(list(ahead), own) @ params + offset(list(ahead))))


Candidate = tuple[Season, float | None]  # (annual pattern, level half-life)


@dataclass(frozen=True)
class Replayed:
    """Every candidate's held-out days (:func:`replay_candidates`).

    ``log_scores[c]``: the log-probability of each held-out day under candidate ``c``;
    ``means[c]``, ``observed``, ``origin``: its forecast mean, the count and the weekly origin
    of each of those days (the same days, in the same order, for every candidate)."""

    candidates: tuple[Candidate, ...]
    log_scores: dict[Candidate, npt.NDArray[np.float64]]
    means: dict[Candidate, npt.NDArray[np.float64]]
    observed: npt.NDArray[np.float64]
    origin: npt.NDArray[np.int64]
    n_origins: int


def replay_candidates(days: Sequence[date], counts: npt.ArrayLike,
                      exposure: npt.ArrayLike | None = None, *, alpha: float | None = None,
                      origins: int = VALIDATION_ORIGINS, horizon: int = VALIDATION_HORIZON,
                      half_lives: Sequence[float | None] = LEVEL_HALF_LIVES,
                      step: int | None = None,
                      hospital_season: tuple[float, float] | None = None) -> Replayed | None:
    """Score every candidate on the days after rolling origins (None: too little history).

    For each of the last ``origins`` origins, ``step`` days apart (default ``horizon``: the
    last weeks, back to back), the weekday (and, as a candidate, seasonal) Poisson GLM is
    fitted on the days before it; each half-life's level is computed from those days'
    admissions against the fit; the ``horizon`` days after the origin are scored by their
    predictive log-probability (Poisson, or NB2 with dispersion ``alpha``, mean x open share
    x level). The seasonal candidate needs ``SEASON_MIN_DAYS`` of history before every
    origin; the hospital's pattern (``hospital_season``, fitted apart from the unit's own
    counts' season) is a candidate whenever it is given. Other parameters as
    :func:`choose_demand_terms`.

    Origins spread over the last year (``step`` 28) were measured against the last weeks by
    ``python -m tests.stress.season_origins``, alone and for the season only: neither was
    better overall on simulated histories, so training keeps the last weeks.
    """
    y, open_share = _checked(days, counts, exposure)
    n = len(days)
    step = horizon if step is None else step
    if step < horizon:
        raise ValueError(f"step: at least the horizon ({horizon}), got {step}")
    usable = max(0, (n - 28 - horizon) // step + 1)  # four weeks before the first origin
    n_origins = min(origins, usable)
    seasonal_ok = n - ((n_origins - 1) * step + horizon) >= SEASON_MIN_DAYS
    if n_origins < 2:
        return None
    # Simplest first (for the one-standard-error rule): no annual pattern, the hospital's
    # (no parameter of the unit's own), the unit's own pair.
    patterns: list[Season] = [False]
    if hospital_season is not None:
        patterns.append(HOSPITAL)
    if seasonal_ok:
        patterns.append(True)
    candidates = [(s, h) for s in patterns for h in half_lives]
    per_day: dict[Candidate, list[float]] = {c: [] for c in candidates}
    means_of: dict[Candidate, list[float]] = {c: [] for c in candidates}
    observed_all: list[float] = []
    origin_all: list[int] = []
    for k in range(n_origins, 0, -1):
        cut = n - horizon - (k - 1) * step
        ahead = slice(cut, cut + horizon)
        test = open_share[ahead] >= MIN_EXPOSURE
        if not test.any():
            continue
        observed = y[ahead][test]
        observed_all.extend(float(v) for v in observed)
        origin_all.extend([k] * observed.size)
        for seasonal in {s for s, _ in candidates}:
            means = _poisson_means(days[:cut], y[:cut], open_share[:cut], seasonal,
                                   days[ahead], hospital_season)
            for h in {h for s, h in candidates if s == seasonal}:
                if means is None:
                    per_day[(seasonal, h)].extend([-1e6] * observed.size)
                    means_of[(seasonal, h)].extend([1e-9] * observed.size)
                    continue
                fitted, forward = means
                level = level_multiplier(y[:cut], fitted * open_share[:cut], h)
                mu = np.maximum(forward * open_share[ahead] * level, 1e-9)[test]
                means_of[(seasonal, h)].extend(float(v) for v in mu)
                if alpha is None:
                    log_p = stats.poisson.logpmf(observed, mu)
                else:
                    size = 1.0 / alpha
                    log_p = stats.nbinom.logpmf(observed, size, size / (size + mu))
                per_day[(seasonal, h)].extend(float(v) for v in log_p)
    if not observed_all:
        return None
    return Replayed(tuple(candidates), {c: np.asarray(v) for c, v in per_day.items()},
                    {c: np.asarray(v) for c, v in means_of.items()},
                    np.asarray(observed_all), np.asarray(origin_all, dtype=np.int64), n_origins)


def chosen_by_one_se(candidates: Sequence[Candidate],
                     log_scores: Mapping[Candidate, npt.NDArray[np.float64]],
                     best: Candidate) -> Candidate:
    """The first of ``candidates`` (simplest first) whose mean log score is within one
    standard error of ``best``'s, the error of their paired daily differences."""
    for candidate in candidates:
        gap = log_scores[best] - log_scores[candidate]
        if gap.mean() <= gap.std(ddof=1) / math.sqrt(gap.size):
            return candidate
    return best


def choose_demand_terms(days: Sequence[date], counts: npt.ArrayLike,
                        exposure: npt.ArrayLike | None = None, *, alpha: float | None = None,
                        origins: int = VALIDATION_ORIGINS, horizon: int = VALIDATION_HORIZON,
                        half_lives: Sequence[float | None] = LEVEL_HALF_LIVES,
                        hospital_season: tuple[float, float] | None = None) -> DemandChoice:
    """Choose the annual term and the local level's half-life by rolling-origin validation.

    Every candidate is scored on the replayed weeks (:func:`replay_candidates`); the first
    candidate (no season, then the hospital's, then the unit's own; no level, then the
    half-lives in the order given)
    whose mean score is within one standard error of the best's is kept (the
    one-standard-error rule, below). The chosen candidate's held-out days then
    give the forecast's spread (:func:`app.stats.demand_spread.heldout_spread`), when there
    are ``MIN_HELDOUT_DAYS``.

    Parameters
    ----------
    days, counts, exposure
        As in :func:`fit_daily_rate`: every day of the window, in order.
    alpha : float, optional
        NB2 dispersion of the full-window fit, for the scores.
    origins, horizon : int
    half_lives : sequence of float or None
    hospital_season : (float, float), optional
        The hospital's annual pair (app/stats/hospital_season.py): a candidate pattern.

    Returns
    -------
    DemandChoice
    """
    replayed = replay_candidates(days, counts, exposure, alpha=alpha, origins=origins,
                                 horizon=horizon, half_lives=half_lives,
                                 hospital_season=hospital_season)
    if replayed is None:
        return DemandChoice(False, None, (), 0)
    table = replayed.log_scores
    scores = tuple((s, h, float(table[(s, h)].mean())) for s, h in replayed.candidates)
    best = max(replayed.candidates, key=lambda c: table[c].mean())
    # The one-standard-error rule (Breiman, Friedman, Olshen & Stone 1984, Classification and
    # Regression Trees, section 3.4.3; cited from memory): the simplest candidate whose mean
    # score is within one standard error of the best's, the error of their paired daily
    # differences. A few weeks of held-out days cannot tell small gains from noise, and a
    # term chosen on noise costs accuracy later. Taking the best score instead was measured
    # (python -m tests.stress.demand_rule: 1,800 simulated histories, the next 8 weeks): it
    # gained 0.017 log score a day on histories with a season and 0.007 after a change of
    # level, and lost 0.002 a day on stationary ones (t = -4.8); on the units we backtest it
    # moved the 180-morning CRPS of the demo's surgical ward from 1.738 to 1.762 and the six
    # stress units' by -1.1% to +0.7%. Which wins depends on how often real units change,
    # which only real extracts can tell, so the simpler rule stays.
    chosen = chosen_by_one_se(replayed.candidates, table, best)
    if replayed.observed.size < MIN_HELDOUT_DAYS:
        return DemandChoice(chosen[0], chosen[1], scores, replayed.n_origins)
    spread = heldout_spread(replayed.observed, replayed.means[chosen], replayed.origin)
    return DemandChoice(chosen[0], chosen[1], scores, replayed.n_origins, spread.alpha,
                        int(replayed.observed.size), spread.tau2)


def hourly_profile(hours: npt.ArrayLike, *, prior: float = 1.0) -> npt.NDArray[np.float64]:
    """Share of admissions in each local clock hour 0..23 (add-``prior`` smoothing)."""
    h = np.asarray(hours, dtype=int)
    if h.size and (h.min() < 0 or h.max() > 23):
        raise ValueError("hours: must lie in 0..23")
    counts = np.bincount(h, minlength=24).astype(float) + prior
    return counts / counts.sum()
