"""Emergency demand that follows the data: after a change of level the trained model carries a
local level and the forecast's expected admissions follow it, also when the forecast reads
the store (which loads only the recent stays the level needs); under overdispersion today's
expectation is updated by the admissions already seen (the gamma-Poisson posterior, checked by
numerical integration with scipy), and so is the multiplier the forecast's days share where the
model has one. Invented unit, simulated admissions."""

from __future__ import annotations

from datetime import timedelta

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, stats

from app.forecast.arrivals import (
    emergency_demand,
    emergency_means,
    emergency_rate,
    train_arrivals,
)
from app.forecast.service import forecast_state
from app.ingest import import_file
from app.state import load_state
from app.state.frames import UnitState
from app.store import db
from tests.conftest import UTC_ZONE
from tests.forecast.two_units import STAY_HEADER
from tests.forecast.unit_state import unit_state
from tests.reliability.small_unit import csv_bytes, stamp

START = pd.Timestamp("2025-01-01", tz="UTC")


def _state(daily: np.ndarray, as_of: pd.Timestamp, seed: int, zone: str = "UTC") -> UnitState:
    """Emergency admissions ``daily[d]`` on day d at uniform clock times, each staying 12 h."""
    rng = np.random.default_rng(seed)
    admitted = [START + pd.Timedelta(days=d, hours=float(h))
                for d, n in enumerate(daily) for h in np.sort(rng.uniform(0, 24, n))]
    admitted = [a for a in admitted if a <= as_of]
    n = len(admitted)
    discharged = [a + pd.Timedelta(hours=12) for a in admitted]
    stays = pd.DataFrame({
        "stay_id": [f"D-{i:06d}" for i in range(n)], "admitted_at": admitted,
        "discharged_at": [d if d <= as_of else pd.NaT for d in discharged],
        "admission_type": "emergency", "outcome": None, "age": 60.0, "sex": "f",
        "specialty": "medicine", "source": "ed", "booking_id": None})
    return unit_state("KV-TEST", stays, as_of, beds=200, zone=zone)


def test_forecast_follows_a_change_of_level_after_training() -> None:
    rng = np.random.default_rng(1)
    days = 420
    mu = np.full(days, 8.0)
    mu[330:] = 12.0  # demand rose by half three months before the end
    daily = rng.poisson(mu)
    trained_at = START + pd.Timedelta(days=360, hours=8)
    arrivals = train_arrivals(_state(daily, trained_at, 2))
    rate = emergency_rate(arrivals)
    assert rate.level_half_life is not None
    later = START + pd.Timedelta(days=days - 1, hours=0)
    state = _state(daily, later, 2)
    span = [later.date() + timedelta(days=d) for d in range(1, 8)]
    plain = rate.mean(span)
    followed = np.asarray(emergency_means(state, arrivals, [later.date(), *span])[1:])
    # The trained rate mostly knows the old level; the forecast's means move most of the way
    # to the new one (the level is shrunk towards the model by a week of expected admissions,
    # so not all of the way).
    assert plain.mean() < 9.5
    assert followed.mean() - plain.mean() > 0.6 * (12.0 - plain.mean()), (plain, followed)
    assert followed.mean() < 12.5


def test_a_forecast_from_the_store_reads_the_days_the_level_looks_back_on(db_url: str) -> None:
    """The page and the command line load only recent stays (``forecast_state``); the local
    level must see every admission of its lookback, as the backtest's full history does. With
    the stays in the unit alone (the loading before), the level read a fraction of the
    admissions and the demand came out far too low."""
    rng = np.random.default_rng(1)
    days = 420
    mu = np.full(days, 8.0)
    mu[330:] = 12.0
    daily = rng.poisson(mu)
    later = START + pd.Timedelta(days=days - 1, hours=8)
    whole = _state(daily, later, 2)
    rows = [[r.stay_id, "KV-TEST", stamp(r.admitted_at), "" if pd.isna(r.discharged_at)
             else stamp(r.discharged_at), "emergency", "" if pd.isna(r.discharged_at) else "home",
             60, "f", "ed", "", "", ""] for r in whole.stays.itertuples()]
    with db.session_scope(db_url) as session:
        import_file(session, "units", csv_bytes(["unit", "beds", "census_time"],
                                                [["KV-TEST", 200, "00:00"]]),
                    "units.csv", tz=UTC_ZONE, actor="test")
        import_file(session, "stays", csv_bytes(STAY_HEADER, rows), "stays.csv", tz=UTC_ZONE,
                    actor="test")
    arrivals = train_arrivals(_state(daily, START + pd.Timedelta(days=360, hours=8), 2))
    assert emergency_rate(arrivals).level_half_life is not None
    span = [later.date() + timedelta(days=d) for d in range(8)]
    with db.session_scope(db_url) as session:
        full = load_state(session, "KV-TEST", later.to_pydatetime(), UTC_ZONE)
        quick = forecast_state(session, "KV-TEST", later.to_pydatetime(), UTC_ZONE,
                               {"arrivals": arrivals})
        in_unit = load_state(session, "KV-TEST", later.to_pydatetime(), UTC_ZONE,
                             with_history=False)
    assert len(quick.stays) < len(full.stays) / 2
    expected = emergency_means(full, arrivals, span)
    assert emergency_means(quick, arrivals, span) == pytest.approx(expected, rel=1e-12)
    assert np.mean(emergency_means(in_unit, arrivals, span)[1:]) < 0.8 * np.mean(expected[1:])


# Europe/London is on UTC by the last day here (late October, after the clocks went back),
# so the expected share of the day is the same; the site's zone must still be read right.
@pytest.mark.parametrize("zone", ["UTC", "Europe/London"])
def test_todays_admissions_update_the_day_under_overdispersion(zone: str) -> None:
    rng = np.random.default_rng(3)
    days = 300
    daily = rng.poisson(6.0 * rng.gamma(4.0, 1 / 4.0, days))  # NB2 with alpha 0.25
    as_of = START + pd.Timedelta(days=days - 1, hours=12)
    busy = daily.copy()
    busy[-1] = 14  # a busy morning: 14 admissions spread over the whole last day
    state = _state(busy, as_of, 4, zone)
    arrivals = train_arrivals(_state(daily, START + pd.Timedelta(days=days - 8), 4, zone))
    rate = emergency_rate(arrivals)
    assert rate.size is not None
    today = as_of.date()
    seen = int((state.stays["admitted_at"].dt.date == today).sum())
    means = emergency_means(state, arrivals, [today])
    profile = np.asarray(arrivals["emergency"]["hour_profile"])
    passed = profile[:12].sum()
    prior_mean = float(rate.mean([today])[0])
    if rate.level_half_life is not None:
        pytest.skip("a local level was chosen; this check isolates today's update")
    r = rate.size
    # Posterior mean of the day's gamma multiplier G ~ Gamma(r, 1/r) after seeing `seen`
    # admissions with Poisson mean passed * prior_mean * G: numerical integration (scipy).
    def joint(g: float, k: int) -> float:
        return stats.gamma.pdf(g, r, scale=1 / r) * stats.poisson.pmf(seen, passed * prior_mean * g) * g ** k

    top = 20.0
    numerator = integrate.quad(joint, 0, top, args=(1,), limit=200)[0]
    denominator = integrate.quad(joint, 0, top, args=(0,), limit=200)[0]
    assert means[0] == pytest.approx(prior_mean * numerator / denominator, rel=1e-6)
    assert means[0] > prior_mean  # more seen than expected by noon: more expected after


def test_todays_admissions_update_the_multiplier_the_forecasts_days_share() -> None:
    # A model whose days share one gamma multiplier (variance tau2, size r = 1/tau2) and are
    # Poisson given it: the admissions seen by noon update that multiplier for every day of the
    # forecast, and what is left of its spread (size r + seen).
    rng = np.random.default_rng(5)
    days = 300
    daily = rng.poisson(6.0, days)
    as_of = START + pd.Timedelta(days=days - 1, hours=12)
    busy = daily.copy()
    busy[-1] = 14
    state = _state(busy, as_of, 4)
    arrivals = train_arrivals(_state(daily, START + pd.Timedelta(days=days - 8), 4))
    arrivals["emergency"]["rate"].update(alpha=None, tau2=0.1, level_half_life=None)
    rate = emergency_rate(arrivals)
    assert rate.size is None and rate.level_size == pytest.approx(10.0)
    today = as_of.date()
    span = [today, today + timedelta(days=1), today + timedelta(days=2)]
    seen = int((state.stays["admitted_at"].dt.date == today).sum())
    means, size = emergency_demand(state, arrivals, span)
    prior = rate.mean(span)
    passed = float(np.asarray(arrivals["emergency"]["hour_profile"])[:12].sum())
    r = rate.level_size

    # Posterior of the shared multiplier L ~ Gamma(r, 1/r) after `seen` admissions with Poisson
    # mean passed * prior[0] * L: its mean and variance by numerical integration (scipy).
    def joint(g: float, k: int) -> float:
        return (stats.gamma.pdf(g, r, scale=1 / r)
                * stats.poisson.pmf(seen, passed * prior[0] * g) * g ** k)

    moments = [integrate.quad(joint, 0, 20.0, args=(k,), limit=200)[0] for k in range(3)]
    mean = moments[1] / moments[0]
    variance = moments[2] / moments[0] - mean**2
    assert np.asarray(means) == pytest.approx(prior * mean, rel=1e-6)
    assert mean > 1.0  # 14 by noon against about 3 expected
    # The size left: the multiplier is mean x Gamma(size, 1/size), so variance = mean^2 / size.
    assert size == pytest.approx(mean**2 / variance, rel=1e-6)
    assert emergency_means(state, arrivals, span) == means
