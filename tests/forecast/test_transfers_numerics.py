"""Patients passed on from a sending unit S to a receiving unit R (app/stats/transfer_presence):
checked against a Monte Carlo of the two-stage stay and against the infinite-server tandem."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from app.stats.occupancy import ArrivalStream, stream_presence
from app.stats.phasetype import Coxian
from app.stats.transfer_presence import (
    PassedOn,
    TandemStay,
    leaving_grid,
    passed_presence,
)

# Invented stays (days): a two-phase Coxian in S, another in R.
S_STAY = Coxian(lam=(0.6,), mu=(0.6, 0.5))
R_STAY = Coxian(lam=(0.5,), mu=(0.4, 0.3))
CENSUS = np.array([0.7, 1.7, 2.7, 3.7, 4.7, 5.7, 6.7])


def test_current_patient_in_receiver_matches_a_two_stage_monte_carlo() -> None:
    # Outside check: draw the stay left in S (given the time already spent) with numpy, then
    # R's whole stay, and count how often the patient is in R at each census instant.
    rng = np.random.default_rng(3)
    spent = np.array([0.0, 1.5, 4.0])
    share = 0.6
    grid = leaving_grid(CENSUS, 0.125)
    rows = []
    for a in spent:
        s_a = S_STAY.sf(a)
        rows.append(np.r_[1.0, S_STAY.sf(a + grid[1:]) / s_a])
    q = share * passed_presence(np.array(rows), grid, CENSUS, R_STAY.sf)
    n = 200_000
    for i, a in enumerate(spent):
        left = S_STAY.conditional(float(a)).sample(n, rng)
        goes = rng.random(n) < share
        r_stay = R_STAY.sample(n, rng)
        inside = goes[:, None] & (left[:, None] <= CENSUS) & (left[:, None] + r_stay[:, None]
                                                              > CENSUS)
        mc = inside.mean(axis=0)
        se = np.sqrt(mc * (1 - mc) / n)
        # Bins of three hours put the leaving instant at the bin's middle: a bias of at most
        # a few thousandths here, on top of the Monte Carlo error.
        assert np.all(np.abs(q[i] - mc) < 4 * se + 0.006), (a, q[i], mc)


def test_future_arrivals_through_the_tandem_reach_the_jackson_mean() -> None:
    # Outside check: in an open network of infinite-server nodes with Poisson arrivals
    # (Jackson 1957, Operations Research 5:518-521), node R's stationary count is Poisson
    # with mean lambda r E[T_R] (Little 1961, Operations Research 9:383-387, per node); with
    # exponential stays the tandem's joint law is the product of Poissons.
    lam, share, mu_s, mu_r = 3.0, 0.4, 1 / 2.0, 1 / 3.0
    s_exp = stats.expon(scale=1 / mu_s)
    r_exp = stats.expon(scale=1 / mu_r)
    horizon = 60.0
    tandem = TandemStay.of([(share, s_exp.sf)], r_exp.sf, span=horizon, step=1 / 24)
    slots = np.arange(0.5, horizon * 24) / 24  # hourly arrivals over sixty days
    stream = ArrivalStream("emergency", tuple(slots), tuple([lam / 24] * slots.size),
                           tuple((slots // 1).astype(int)), None, tandem)
    at = np.array([horizon])
    presence = stream_presence(stream, at)
    mean = float(presence.sum())
    expected = lam * share / mu_r
    assert abs(mean - expected) / expected < 0.01, (mean, expected)
    # The count is Poisson (thinned Poisson arrivals): its pmf equals the product form's.
    passed = PassedOn(np.zeros((0, 1)), (), (), ((presence, None),), ("S",))
    pmf = passed.pmf(0)
    ref = stats.poisson(expected).pmf(np.arange(pmf.size))
    assert np.max(np.abs(pmf - ref)) < 0.005


def test_tandem_stay_matches_a_monte_carlo_of_both_stays() -> None:
    # Outside check: numpy draws of the S stay then the R stay.
    rng = np.random.default_rng(11)
    tandem = TandemStay.of([(0.7, S_STAY.sf)], R_STAY.sf, span=8.0)
    n = 200_000
    s = S_STAY.sample(n, rng)
    r = R_STAY.sample(n, rng)
    goes = rng.random(n) < 0.7
    x = np.array([0.5, 1.0, 2.0, 4.0, 7.5])
    mc = (goes[:, None] & (s[:, None] <= x) & (s[:, None] + r[:, None] > x)).mean(axis=0)
    se = np.sqrt(mc * (1 - mc) / n)
    assert np.all(np.abs(tandem.sf(x) - mc) < 4 * se + 0.004), (tandem.sf(x), mc)


def test_negative_binomial_days_keep_their_size() -> None:
    # A day's arrivals passed on are a thinned negative binomial with the day's size
    # (the gamma-Poisson mixture thinned by a fixed chance): variance m + m^2 / size.
    presence = np.array([[1.5], [0.8]])
    passed = PassedOn(np.zeros((0, 1)), (), (), ((presence, 4.0),), ("S",))
    pmf = passed.pmf(0)
    k = np.arange(pmf.size)
    mean = float((k * pmf).sum())
    var = float((k**2 * pmf).sum() - mean**2)
    assert abs(mean - 2.3) < 1e-6
    assert abs(var - (2.3 + 1.5**2 / 4 + 0.8**2 / 4)) < 1e-4


def test_transfers_wait_while_the_receiving_unit_is_full() -> None:
    # Outside check: numpy draws of the unit's own count A and the count passed on B; in
    # are A + min(B, (c - A)+) (a transfer waits in its unit while this one is at c).
    from app.stats.occupancy import waiting_when_full

    own = stats.binom(30, 0.6).pmf(np.arange(31))
    passed = stats.poisson(3.5).pmf(np.arange(25))
    passed = passed / passed.sum()
    limit = 20
    pmf, admitted = waiting_when_full(own, passed, limit)
    rng = np.random.default_rng(5)
    n = 400_000
    a = rng.binomial(30, 0.6, n)
    b = rng.poisson(3.5, n)
    took = np.minimum(b, np.maximum(limit - a, 0))
    total = a + took
    mc = np.bincount(total, minlength=pmf.size)[: pmf.size] / n
    assert np.max(np.abs(mc - pmf)) < 0.004
    assert abs(admitted - took.mean()) < 4 * took.std() / np.sqrt(n)
    # Current patients alone over the ceiling stay over it; no transfer joins them.
    assert abs(float(pmf[limit + 1:].sum()) - float(own[limit + 1:].sum())) < 1e-12
    # Without a ceiling the counts add.
    free, mean = waiting_when_full(own, passed, None)
    assert abs(mean - 3.5) < 1e-6
    np.testing.assert_allclose(free[:40], np.convolve(own, passed)[:40], atol=1e-12)


def test_transfers_wait_below_their_own_ceiling_when_one_is_given() -> None:
    # A unit holding 12 stays (each still in with chance 0.9) that takes its own emergencies
    # up to 12 but patients passed on only below 11 (its staffed beds): in are
    # A + min(B, (11 - A)+), checked against numpy draws of A and B as above.
    from types import SimpleNamespace

    from app.stats.occupancy import with_current

    passed = stats.poisson(3.0).pmf(np.arange(25))
    passed = passed / passed.sum()
    others = SimpleNamespace(booked=[np.ones(1)], booked_mean=[0.0], arriving=[{}],
                             arriving_mean=[{}])
    sender = SimpleNamespace(pmf=lambda k: passed)
    p = np.full((12, 1), 0.9)
    (own_limit,) = with_current(p, others, [11], [12], passed=sender)
    (below_staffed,) = with_current(p, others, [11], [12], passed=sender, passed_limits=[11])
    rng = np.random.default_rng(8)
    a = rng.binomial(12, 0.9, 400_000)
    b = rng.poisson(3.0, a.size)
    for limit, day in ((12, own_limit), (11, below_staffed)):
        total = a + np.minimum(b, np.maximum(limit - a, 0))
        mc = np.bincount(total, minlength=day.pmf.size)[: day.pmf.size] / a.size
        assert np.max(np.abs(mc - day.pmf)) < 0.004
    # The chance of more patients than the 11 staffed beds: only current stays pass 11 when
    # transfers wait below it (0.9^12 = 0.2824 of all 12 staying), against 0.2824 plus the
    # nights a transfer fills the twelfth bed.
    assert below_staffed.p_over_capacity == pytest.approx(0.9**12, abs=1e-9)
    assert own_limit.p_over_capacity > 0.5
