"""Daily admission counts: weekday and season recovered, overdispersion detected only when there.

Simulated counts with known parameters; the fitting itself is statsmodels' GLM and
NegativeBinomial, checked here for the way Morrow uses them.
"""

from __future__ import annotations

from datetime import date, timedelta

import numpy as np
import pytest

from app.stats.arrivals import DailyRateModel, fit_daily_rate, hourly_profile

WEEKDAY = np.array([1.3, 1.2, 1.0, 1.0, 1.1, 0.7, 0.6])  # Monday..Sunday multipliers


def simulated(days: int, base: float, alpha: float | None, seed: int):
    rng = np.random.default_rng(seed)
    start = date(2024, 1, 1)
    dates = [start + timedelta(days=i) for i in range(days)]
    doy = np.array([d.timetuple().tm_yday for d in dates])
    mu = base * WEEKDAY[[d.weekday() for d in dates]] * np.exp(0.15 * np.cos(2 * np.pi * doy / 365.25))
    if alpha is None:
        y = rng.poisson(mu)
    else:
        y = rng.poisson(mu * rng.gamma(1 / alpha, alpha, size=days))
    return dates, y, mu


def test_poisson_counts_stay_poisson_and_weekday_is_recovered() -> None:
    dates, y, mu = simulated(730, 3.0, None, seed=1)
    model = fit_daily_rate(dates, y)
    assert model.alpha is None and model.seasonal
    fitted = model.mean(dates)
    weekday = np.array([d.weekday() for d in dates])
    for w in range(7):
        on = weekday == w
        # A Poisson GLM with a weekday factor reproduces each weekday's observed total
        # (its score equations), and the truth lies within 3 standard errors of it.
        assert fitted[on].sum() == pytest.approx(y[on].sum(), rel=1e-6)
        se = np.sqrt(mu[on].mean() / on.sum())
        assert abs(fitted[on].mean() - mu[on].mean()) < 3 * se


def test_overdispersed_counts_get_a_negative_binomial() -> None:
    dates, y, _ = simulated(730, 3.0, 0.15, seed=2)
    model = fit_daily_rate(dates, y)
    assert model.alpha is not None and model.overdispersion_p < 0.05
    assert model.alpha == pytest.approx(0.15, abs=0.07)


def test_short_history_drops_the_season_and_round_trips() -> None:
    dates, y, _ = simulated(90, 2.0, None, seed=3)
    model = fit_daily_rate(dates, y)
    assert not model.seasonal and len(model.coefficients) == 7
    again = DailyRateModel.from_dict(model.to_dict())
    assert again == model


def test_bad_inputs_are_named() -> None:
    with pytest.raises(ValueError, match="counts: expected shape"):
        fit_daily_rate([date(2024, 1, 1)] * 20, [1] * 19)
    with pytest.raises(ValueError, match="at least 14 days"):
        fit_daily_rate([date(2024, 1, 1)] * 5, [1] * 5)


def test_hourly_profile_sums_to_one() -> None:
    profile = hourly_profile([0, 14, 14, 23])
    assert profile.sum() == pytest.approx(1.0) and profile[14] > profile[13]


def test_open_share_offset_recovers_the_demand_of_partly_closed_days() -> None:
    # Counts thinned by a known open share per day (arrivals while closed are lost): with the
    # share as exposure the Poisson GLM's score equations give, for each weekday, fitted
    # demand x exposure summing to the observed total (statsmodels GLM with an offset), so
    # the fitted rates are the demand, within 3 standard errors of the truth.
    rng = np.random.default_rng(4)
    dates, _, mu = simulated(730, 3.0, None, seed=4)
    open_share = np.clip(rng.beta(6, 2, size=len(dates)), 0.0, 1.0)
    open_share[::17] = 0.01  # a few days closed almost all day: left out of the fit
    y = rng.poisson(mu * open_share)
    model = fit_daily_rate(dates, y, exposure=open_share)
    keep = open_share >= 0.05
    assert model.n_days == int(keep.sum()) and model.seasonal
    fitted = model.mean(dates)
    weekday = np.array([d.weekday() for d in dates])
    for w in range(7):
        on = (weekday == w) & keep
        assert (fitted[on] * open_share[on]).sum() == pytest.approx(y[on].sum(), rel=1e-6)
        se = np.sqrt(mu[on].mean() / (open_share[on].sum()))
        assert abs(fitted[on].mean() - mu[on].mean()) < 3 * se
    naive = fit_daily_rate(dates, y)
    assert naive.mean(dates).mean() < 0.85 * mu.mean()  # without it: the admitted rate
    with pytest.raises(ValueError, match="exposure"):
        fit_daily_rate(dates, y, exposure=np.full(len(dates), 1.5))
