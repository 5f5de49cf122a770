"""Choosing the demand terms on held-out weeks: the annual season where the counts have one
(also a day short of two years of history), a local level after a change of level, neither
where the counts are stationary. Simulated counts with known parameters; the local level is
checked against pandas' exponentially weighted mean."""

from __future__ import annotations

from datetime import date, timedelta

import numpy as np
import pandas as pd
import pytest

from app.stats.arrivals import choose_demand_terms, level_multiplier

WEEKDAY = np.array([1.2, 1.1, 1.0, 1.0, 1.1, 0.8, 0.8])


def _days(n: int, start: date = date(2024, 3, 1)) -> list[date]:
    return [start + timedelta(days=i) for i in range(n)]


def _counts(days: list[date], base: float, seed: int, *, winter: float = 0.0,
            step_at: int | None = None, step: float = 1.0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    doy = np.array([d.timetuple().tm_yday for d in days])
    mu = base * WEEKDAY[[d.weekday() for d in days]] * np.exp(
        winter * np.cos(2 * np.pi * doy / 365.25))
    if step_at is not None:
        mu[step_at:] *= step
    return rng.poisson(mu)


def test_level_is_the_ratio_of_pandas_ewm_means() -> None:
    rng = np.random.default_rng(1)
    y = rng.poisson(5.0, 200).astype(float)
    e = rng.uniform(3.0, 6.0, 200)
    for half_life in (7.0, 28.0):
        # pandas: weights 0.5 ** (age / halflife) with adjust=True, the latest day last.
        ratio = (pd.Series(y).ewm(halflife=half_life).mean().iloc[-1]
                 / pd.Series(e).ewm(halflife=half_life).mean().iloc[-1])
        assert level_multiplier(y, e, half_life, prior_days=0.0) == pytest.approx(ratio, 1e-12)
    assert level_multiplier(y, e, None) == 1.0
    # The prior pulls towards 1: a week of expected admissions against the weighted data.
    shrunk = level_multiplier(y, e, 7.0)
    assert min(1.0, ratio) <= shrunk <= max(1.0, ratio)


def test_winter_rise_a_day_short_of_two_years_keeps_the_season() -> None:
    # The history ends in November, while demand climbs towards its winter peak (twice the
    # summer trough). The rule that needed two full years never tried the season here; the
    # held-out weeks choose it in most histories (the one-standard-error rule keeps a simpler
    # model when thirteen weeks cannot tell them apart).
    days = _days(2 * 365 - 1, start=date(2023, 11, 20))
    choices = [choose_demand_terms(days, _counts(days, 6.0, seed, winter=0.35))
               for seed in range(2, 22)]
    assert all(c.n_origins == 13 for c in choices)
    assert sum(c.seasonal for c in choices) >= 12  # 13 of 20 when measured


def test_stationary_counts_rarely_get_a_season() -> None:
    days = _days(2 * 365 - 1, start=date(2023, 11, 20))
    choices = [choose_demand_terms(days, _counts(days, 6.0, seed)) for seed in range(2, 22)]
    assert sum(c.seasonal for c in choices) <= 2  # 0 of 20 when measured


def test_change_of_level_gets_a_local_level() -> None:
    days = _days(400)
    counts = _counts(days, 6.0, 3, step_at=300, step=1.5)
    choice = choose_demand_terms(days, counts)
    assert choice.level_half_life is not None
    scores = {(s, h): v for s, h, v in choice.scores}
    assert scores[(choice.seasonal, choice.level_half_life)] > scores[(False, None)]


def test_stationary_counts_get_neither() -> None:
    days = _days(800)
    choice = choose_demand_terms(days, _counts(days, 6.0, 4))
    scores = {(s, h): v for s, h, v in choice.scores}
    # Whatever wins, it wins by little: the terms describe noise here (seeds 2-11 gave at
    # most 0.009 per day, against 0.34 for the level after a change of level).
    assert max(scores.values()) - scores[(False, None)] < 0.02


def test_short_history_compares_nothing() -> None:
    days = _days(40)
    choice = choose_demand_terms(days, _counts(days, 3.0, 5))
    assert choice.n_origins == 1 or choice.n_origins == 0
    assert not choice.seasonal and choice.level_half_life is None


def test_origins_spread_apart_score_the_weeks_after_each() -> None:
    # Two years of counts, origins 28 days apart: 13 held-out weeks whose first days lie
    # 28 days apart and the last ends with the history; back to back by default.
    from app.stats.arrivals import replay_candidates

    days = _days(730)
    counts = _counts(days, 5.0, 3)
    spread = replay_candidates(days, counts, step=28)
    weekly = replay_candidates(days, counts)
    assert spread is not None and weekly is not None
    assert spread.n_origins == weekly.n_origins == 13
    for replayed, step in ((spread, 28), (weekly, 7)):
        assert replayed.observed.size == 13 * 7
        firsts = [730 - 7 - k * step for k in range(12, -1, -1)]
        assert replayed.observed.tolist() == [float(counts[f + i]) for f in firsts
                                              for i in range(7)]
    with pytest.raises(ValueError, match="step"):
        replay_candidates(days, counts, step=3)
