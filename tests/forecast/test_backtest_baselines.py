"""The backtest's baselines (app/forecast/backtest.py), each against a reference computed
outside the project's code: the contract's "in the unit" rule counted with pandas, lifelines'
Kaplan-Meier, the Poisson thinning of arrivals, scipy's normal distribution. Invented unit."""

from __future__ import annotations

from datetime import UTC, datetime
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
import pytest
from lifelines import KaplanMeierFitter
from scipy import stats

from app.forecast.backtest import (
    _normal_pmf,
    census_series,
    one_distribution_baseline,
    same_weekday_baseline,
    yesterday_baseline,
)
from app.state.frames import UnitState
from tests.forecast.unit_state import unit_state

AS_OF = pd.Timestamp("2026-06-01 08:00", tz="UTC")


def _unit(seed: int = 5, n: int = 400) -> UnitState:
    """Stays arriving over 200 days, lognormal lengths; those not ended by as_of still in."""
    rng = np.random.default_rng(seed)
    admitted = AS_OF - pd.to_timedelta(np.sort(rng.uniform(0.2, 200.0, n)), unit="D")
    length = pd.to_timedelta(rng.lognormal(1.0, 0.8, n), unit="D")
    ended = admitted + length
    discharged = ended.where(ended <= AS_OF, pd.NaT)
    stays = pd.DataFrame({
        "stay_id": [f"S-{i:04d}" for i in range(n)], "admitted_at": admitted,
        "discharged_at": discharged, "admission_type": "emergency", "outcome": None,
        "age": 60.0, "sex": "f", "specialty": "medicine", "source": "emergency-dept",
        "booking_id": None})
    return unit_state("KV-TEST", stays, AS_OF, beds=30)


def test_census_series_counts_stays_in_the_unit_by_the_contracts_rule() -> None:
    # DATA_CONTRACT "as of": in the unit at t when admitted_at <= t and (no discharged_at or
    # discharged_at > t); recounted here with plain pandas comparisons.
    state = _unit()
    series = census_series(state, AS_OF.to_pydatetime(), 30)
    assert len(series) == 30
    stays = state.stays
    for t, value in series.items():
        inside = (stays["admitted_at"] <= t) & (stays["discharged_at"].isna()
                                                | (stays["discharged_at"] > t))
        assert value == int(inside.sum())
        assert t.hour == 0 and t.minute == 0  # the unit's census instant (local midnight)


def test_yesterday_and_same_weekday_baselines_by_hand() -> None:
    # Persistence with the empirical k-step changes (METHODS.md section 5): a hand count.
    index = pd.date_range("2026-05-01", periods=5, freq="D", tz="UTC")
    history = pd.Series([3, 4, 5, 4, 6], index=index)
    one_step, two_step = yesterday_baseline(history, 2)
    # 1-step changes 1, 1, -1, 2 added to the last census 6; 2-step changes 2, 0, 1.
    assert one_step.tolist() == [0, 0, 0, 0, 0, 0.25, 0, 0.5, 0.25]
    assert two_step.tolist() == pytest.approx([0, 0, 0, 0, 0, 0, 1 / 3, 1 / 3, 1 / 3])
    days = pd.date_range("2026-03-02", periods=70, freq="D", tz="UTC")  # ten weeks
    weekly = pd.Series([d.weekday() * 10 + week for week in range(10) for d in days[:7]],
                       index=days)
    wednesday = datetime(2026, 5, 13, 0, 0, tzinfo=UTC)
    (pmf,) = same_weekday_baseline(weekly, [wednesday], ZoneInfo("UTC"))
    expected = np.zeros(30)
    expected[[22, 23, 24, 25, 26, 27, 28, 29]] = 1 / 8  # the last eight Wednesdays
    assert pmf.tolist() == pytest.approx(expected.tolist())


def test_one_distribution_matches_lifelines_and_poisson_thinning() -> None:
    # Current patients: lifelines' KaplanMeierFitter on every stay (censored at as_of),
    # S(d + t) / S(d) given d days in. Arrivals: Poisson at the past year's mean rate, each
    # still in at t with S(t - arrival), so their count is Poisson with the summed mean
    # (the thinning of a Poisson process). Their sum is convolved here with numpy.
    state = _unit()
    census_at = np.array([16 / 24, 1 + 16 / 24, 2 + 16 / 24])
    got = one_distribution_baseline(state, census_at)
    history = state.history()
    km = KaplanMeierFitter().fit(history["los_days"], history["event"])
    sf = lambda x: km.survival_function_at_times(np.asarray(x, dtype=float)).to_numpy()  # noqa: E731
    current = state.current_stays()
    days_in = current["days_in"].to_numpy()
    # The window opens at the first admission (the history is under a year old): the
    # admissions after it, over the time from it to as_of.
    first = history["admitted_at"].min()
    rate = (len(history) - 1) / ((AS_OF - first).total_seconds() / 86400)
    slots = np.arange(1, int(np.ceil(census_at[-1] * 24)) + 1) / 24 - 1 / 48
    for k, t in enumerate(census_at):
        p = sf(days_in + t) / sf(days_in)
        pmf = np.ones(1)
        for q in p:
            pmf = np.convolve(pmf, [1 - q, q])
        lags = t - slots[slots < t]
        mean = float(np.sum(rate / 24 * sf(lags)))
        arrivals = stats.poisson.pmf(np.arange(80), mean)
        reference = np.convolve(pmf, arrivals)[:got[k].size]
        assert got[k] == pytest.approx(reference, abs=1e-9)


def test_normal_pmf_rounds_a_normal_to_whole_beds() -> None:
    # scipy.stats.norm: P(round(X) = k) = Phi(k + 0.5) - Phi(k - 0.5), the tails folded into
    # 0 and kmax so the pmf sums to one.
    pmf = _normal_pmf(12.3, 2.1, 20)
    k = np.arange(21)
    inner = stats.norm.cdf(k + 0.5, 12.3, 2.1) - stats.norm.cdf(k - 0.5, 12.3, 2.1)
    inner[0] = stats.norm.cdf(0.5, 12.3, 2.1)
    inner[-1] = stats.norm.sf(19.5, 12.3, 2.1)
    assert pmf == pytest.approx(inner, abs=1e-15)
    assert pmf.sum() == pytest.approx(1.0, abs=1e-15)

