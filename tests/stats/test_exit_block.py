"""Exit-block rates: checked against statsmodels' Poisson regression and a simulation.

The piecewise-exponential likelihood equals a Poisson regression of the events on the state
with log exposure as offset (McCullagh and Nelder 1989, section 6.2), so statsmodels' GLM fitted
on the waits cut at the receiving unit's changes of state is the outside reference.
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from scipy.stats import chi2

from app.stats.exit_block import (
    StateRate,
    exit_block_rates,
    full_at,
    full_time_before,
)


def _alternating(rng: np.random.Generator, horizon: float, mean_room: float, mean_full: float
                 ) -> tuple[np.ndarray, np.ndarray]:
    """A receiving unit switching between room and full, exponential spells."""
    at, full = [0.0], [False]
    while at[-1] < horizon:
        at.append(at[-1] + rng.exponential(mean_full if full[-1] else mean_room))
        full.append(not full[-1])
    return np.array(at), np.array(full)


def _waits(rng: np.random.Generator, change_at: np.ndarray, full_after: np.ndarray,
           n: int, rate_room: float, rate_full: float, censor_at: float
           ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Waits simulated exactly: within each spell the transfer is exponential at that spell's
    rate (memoryless, so a wait crossing a change restarts at the new rate)."""
    starts = rng.uniform(0, censor_at * 0.8, n)
    ends, moved = np.empty(n), np.zeros(n, dtype=bool)
    for i, t in enumerate(starts):
        k = np.searchsorted(change_at, t, side="right") - 1
        while True:
            spell_end = change_at[k + 1] if k + 1 < change_at.size else np.inf
            rate = rate_full if full_after[k] else rate_room
            draw = t + rng.exponential(1 / rate) if rate > 0 else np.inf
            if min(draw, spell_end) >= censor_at:
                ends[i] = censor_at
                break
            if draw < spell_end:
                ends[i], moved[i] = draw, True
                break
            t, k = spell_end, k + 1
    return starts, ends, moved


def test_rates_equal_statsmodels_poisson_regression_with_offset():
    rng = np.random.default_rng(7)
    change_at, full_after = _alternating(rng, 400.0, 3.0, 1.0)
    start, end, moved = _waits(rng, change_at, full_after, 300, 2.0, 0.3, 380.0)
    found = exit_block_rates(start, end, moved, change_at, full_after)

    # The reference: cut every wait at the changes of state, one row per piece.
    rows = []
    for s, e, m in zip(start, end, moved, strict=True):
        cuts = np.r_[s, change_at[(change_at > s) & (change_at < e)], e]
        for a, b in zip(cuts[:-1], cuts[1:], strict=True):
            state = bool(full_at([b], change_at, full_after)[0])
            rows.append((b - a, state, bool(m and b == e)))
    exposure = np.array([r[0] for r in rows])
    state = np.array([r[1] for r in rows], dtype=float)
    events = np.array([r[2] for r in rows], dtype=float)
    keep = exposure > 0
    fit = sm.GLM(events[keep], sm.add_constant(state[keep]), family=sm.families.Poisson(),
                 offset=np.log(exposure[keep])).fit()
    assert found.with_room.rate == pytest.approx(np.exp(fit.params[0]), rel=1e-6)
    assert found.when_full.rate == pytest.approx(np.exp(fit.params[0] + fit.params[1]),
                                                 rel=1e-6)
    assert found.with_room.events + found.when_full.events == int(moved.sum())
    assert found.with_room.exposure_days + found.when_full.exposure_days == pytest.approx(
        float(np.sum(end - start)))


def test_simulated_rates_are_recovered_within_their_intervals():
    rng = np.random.default_rng(11)
    change_at, full_after = _alternating(rng, 2000.0, 2.0, 1.5)
    start, end, moved = _waits(rng, change_at, full_after, 3000, 1.5, 0.25, 1990.0)
    found = exit_block_rates(start, end, moved, change_at, full_after)
    room_low, room_high = found.with_room.interval
    full_low, full_high = found.when_full.interval
    assert room_low <= 1.5 <= room_high
    assert full_low <= 0.25 <= full_high
    assert found.slowdown == pytest.approx(6.0, rel=0.25)


def test_exposure_split_by_hand():
    # Room on [0, 2), full on [2, 5), room from 5: a wait from 1 to 6 spends 3 days full.
    change_at, full_after = np.array([0.0, 2.0, 5.0]), np.array([False, True, False])
    assert full_time_before([1.0, 6.0, 3.0], change_at, full_after).tolist() == [0.0, 3.0, 1.0]
    found = exit_block_rates([1.0], [6.0], [True], change_at, full_after)
    assert (found.with_room.exposure_days, found.when_full.exposure_days) == (2.0, 3.0)
    assert (found.with_room.events, found.when_full.events) == (1, 0)


def test_interval_is_garwoods_exact_poisson_interval():
    # Garwood 1936; for 0 events the upper 95% limit is -ln(0.025) = 3.689 (the rule of
    # three's exact form), for 10 events 4.795..18.390 (tabulated, from memory; chi2 here).
    assert StateRate(0, 1.0).interval == pytest.approx((0.0, 3.6889), abs=1e-4)
    low, high = StateRate(10, 1.0).interval
    assert (low, high) == pytest.approx((4.7954, 18.3904), abs=1e-3)
    assert high == pytest.approx(chi2.ppf(0.975, 22) / 2)


def test_refuses_a_wait_that_ends_before_it_starts():
    with pytest.raises(ValueError, match="end"):
        exit_block_rates([2.0], [1.0], [True], [0.0], [False])
