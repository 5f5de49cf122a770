"""Arrivals turned away at the instant they come: the per-night forecast against an independent
loss simulation written here (Poisson arrivals in continuous time, stays from scipy
distributions, a hard ceiling, each arrival turned away if the unit is full when it comes,
current patients with known leaving distributions).

The reference shares no code with ``app.stats.loss``: it draws arrival instants in continuous
time (the forecast uses hourly slots) and follows each run arrival by arrival. Its Monte-Carlo
standard error on a probability is at most 0.5 / sqrt(RUNS) = 0.0035, the forecast's (at
FORECAST_PATHS paths) the same at most; the checks allow 0.02, about four combined standard
errors (common practice, no source). The truncation at the census instant that the forecast
used before (``loss_paths=0``) misses P(full) at the first census by 0.11 in the two full-unit
settings and by 0.05 at moderate load.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from app.stats.loss import draw_losses, losses
from app.stats.occupancy import (
    ArrivalStream,
    BookedAdmissions,
    newcomers,
    occupancy_days,
    with_current,
)
from app.stats.occupancy_paths import any_night_over

RUNS = 20_000
FORECAST_PATHS = 20_000
TOLERANCE = 0.02
FIRST_CENSUS = 16 / 24          # forecast at 08:00, census at midnight
CENSUS = FIRST_CENSUS + np.arange(7)


class ScipyStay:
    """A scipy distribution as the forecast's stay distribution (days)."""

    def __init__(self, law: stats.rv_continuous) -> None:
        self.law = law

    def sf(self, x: np.ndarray) -> np.ndarray:
        return np.asarray(self.law.sf(x), dtype=float)

    def sample(self, n: int, rng: np.random.Generator) -> np.ndarray:
        return np.asarray(self.law.rvs(size=n, random_state=rng), dtype=float)


def hourly_stream(rate_per_day: float, stay: ScipyStay) -> ArrivalStream:
    at = [(h + 0.5) / 24 for h in range(24 * 8)]
    return ArrivalStream("emergency", tuple(at), tuple(rate_per_day / 24 for _ in at),
                         tuple(int(t) for t in at), None, stay)


def reference(ceiling: int, rate: float, stay: stats.rv_continuous,
              current: list[stats.rv_continuous], seed: int) -> np.ndarray:
    """Occupancy at each census instant on RUNS independent runs of the loss system,
    shape (RUNS, 7)."""
    rng = np.random.default_rng(seed)
    end = CENSUS[-1]
    # Current patients leave at times drawn from their own distributions.
    leave_now = np.column_stack([law.rvs(size=RUNS, random_state=rng) for law in current])
    counts = rng.poisson(rate * end, size=RUNS)
    width = int(counts.max())
    arrive = rng.uniform(0, end, size=(RUNS, width))
    arrive[np.arange(width)[None, :] >= counts[:, None]] = np.inf   # no such arrival
    arrive = np.sort(arrive, axis=1)
    length = stay.rvs(size=(RUNS, width), random_state=rng)
    leave = np.full((RUNS, width), -np.inf)            # -inf: turned away (or none)
    for j in range(width):                             # each run's j-th arrival, in time order
        t = arrive[:, j]
        inside = (leave_now > t[:, None]).sum(axis=1) + (leave[:, :j] > t[:, None]).sum(axis=1)
        admit = np.isfinite(t) & (inside < ceiling)
        leave[admit, j] = t[admit] + length[admit, j]
    out = np.empty((RUNS, CENSUS.size), dtype=int)
    for k, h in enumerate(CENSUS):
        out[:, k] = ((leave_now > h).sum(axis=1)
                     + ((arrive < h) & (leave > h)).sum(axis=1))
    assert out.max() <= ceiling
    return out


def forecast(ceiling: int, rate: float, stay: stats.rv_continuous,
             current: list[stats.rv_continuous]) -> list[np.ndarray]:
    p_current = np.array([[law.sf(h) for h in CENSUS] for law in current])
    days = occupancy_days(
        p_current, BookedAdmissions((), (), ()), [hourly_stream(rate, ScipyStay(stay))], CENSUS,
        [ceiling] * 7, [ceiling] * 7, loss_paths=FORECAST_PATHS, seed=3,
        current_at=lambda t: np.array([law.sf(t) for law in current]))
    return [d.pmf for d in days]


def current_patients(n: int) -> list[stats.rv_continuous]:
    """Patients in the unit now, remaining stays of mean 1 to 4 days (gamma, shape 1.5)."""
    return [stats.gamma(1.5, scale=m / 1.5) for m in np.linspace(1.0, 4.0, n)]


SETTINGS = {
    # ceiling, arrivals a day, stay of the arrivals (mean 2 days), patients in now
    "full, ceiling 10, load 12": (10, 6.0, stats.gamma(2.0, scale=1.0), 10),
    "full, ceiling 16, load 18": (16, 9.0, stats.lognorm(0.6, scale=2.0 / np.exp(0.18)), 16),
    "moderate, ceiling 16, load 13": (16, 6.5, stats.gamma(2.0, scale=1.0), 13),
}


@pytest.mark.parametrize("name", list(SETTINGS))
def test_each_night_matches_a_loss_simulation(name: str) -> None:
    ceiling, rate, stay, n_now = SETTINGS[name]
    current = current_patients(n_now)
    sims = reference(ceiling, rate, stay, current, seed=11)
    pmfs = forecast(ceiling, rate, stay, current)
    for k, pmf in enumerate(pmfs):
        assert pmf.size <= ceiling + 1 and pmf.sum() == pytest.approx(1.0, abs=1e-9)
        want = np.bincount(sims[:, k], minlength=ceiling + 1) / RUNS
        got = np.zeros(ceiling + 1)
        got[: pmf.size] = pmf
        # The chance of a full unit, and the whole distribution (largest cdf gap).
        assert got[ceiling] == pytest.approx(want[ceiling], abs=TOLERANCE), (k, got, want)
        assert np.abs(np.cumsum(got) - np.cumsum(want)).max() <= TOLERANCE, (k, got, want)


def test_no_ceiling_in_reach_keeps_the_exact_answer() -> None:
    # A ceiling no path reaches changes nothing: the pmf is the exact one without a ceiling.
    ceiling, rate, stay, n_now = SETTINGS["moderate, ceiling 16, load 13"]
    current = current_patients(4)
    p_current = np.array([[law.sf(h) for h in CENSUS] for law in current])
    stream = hourly_stream(2.0, ScipyStay(stay))
    free = occupancy_days(p_current, BookedAdmissions((), (), ()), [stream], CENSUS, [16] * 7)
    capped = occupancy_days(p_current, BookedAdmissions((), (), ()), [stream], CENSUS, [16] * 7,
                            [40] * 7, loss_paths=2000)
    for a, b in zip(free, capped, strict=True):
        np.testing.assert_array_equal(a.pmf, b.pmf)
        assert a.components == b.components


WEEKS = {
    # ceiling, arrivals a day, stay of the arrivals (mean 2 days), patients in now, beds
    "moderate, ceiling 16, load 13, 15 beds": (16, 6.5, stats.gamma(2.0, scale=1.0), 13, 15),
    "heavy, ceiling 12, load 11.4, 11 beds": (12, 5.7, stats.gamma(2.0, scale=1.0), 11, 11),
    "light, ceiling 16, load 10, 13 beds": (16, 5.0, stats.gamma(2.0, scale=1.0), 10, 13),
}


@pytest.mark.parametrize("name", list(WEEKS))
def test_any_night_risk_matches_a_loss_simulation(name: str) -> None:
    """The week's risk (more patients than beds on at least one night) from the ceiling's
    own paths, each night given its exact pmf, against the reference's share of runs over
    on some night (beds at or below the ceiling, as a unit that opens escalation beds).

    The reference gives 0.674, 0.875 and 0.663 in the three settings. The week's paths the
    forecast used before (turned away only at census instants, latest first;
    ``draw_paths`` with the same exact marginals, 20,000 paths) gave 0.462, 0.565 and 0.628:
    0.21, 0.31 and 0.04 too low (measured when the forecast moved to the ceiling's paths)."""
    ceiling, rate, stay, n_now, bed_count = WEEKS[name]
    beds = [bed_count] * CENSUS.size
    current = current_patients(n_now)
    want = float((reference(ceiling, rate, stay, current, seed=17) > bed_count).any(axis=1)
                 .mean())
    booked = BookedAdmissions((), (), ())
    streams = [hourly_stream(rate, ScipyStay(stay))]
    p_current = np.array([[law.sf(h) for h in CENSUS] for law in current])
    draws = draw_losses(booked, streams, CENSUS, FORECAST_PATHS, np.random.default_rng(5),
                        seed=5)
    p_grid = np.array([law.sf(draws.grid) for law in current])
    lost = losses(draws, p_grid, [ceiling] * CENSUS.size)
    days = with_current(p_current, newcomers(booked, streams, CENSUS), beds,
                        [ceiling] * CENSUS.size, draws=draws, p_grid=p_grid, lost=lost)
    got = any_night_over(lost.kept(), [d.pmf for d in days], draws.tie_break, beds)
    assert 0.05 < want < 0.95
    assert got == pytest.approx(want, abs=TOLERANCE)
