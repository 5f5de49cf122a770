"""Exact occupancy distribution: worked example, agreement with simulation, Little's law and
the M/G/infinity mean."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, stats

from app.stats.occupancy import (
    ArrivalStream,
    BookedAdmissions,
    StayMixture,
    occupancy_days,
    stream_presence,
)
from app.stats.occupancy_paths import draw_paths, simulate_paths, with_exact_marginals
from app.stats.phasetype import Coxian

NO_BOOKINGS = BookedAdmissions((), (), ())


def hourly_stream(name: str, rate_per_day, days: int, stay, size=None, start: float = 0.0):
    """Arrivals at hour midpoints from ``start`` for ``days`` days at a daily rate (or rates)."""
    rates = np.broadcast_to(np.asarray(rate_per_day, dtype=float), (days,))
    at, mean, day = [], [], []
    for d in range(days):
        for hour in range(24):
            t = d + (hour + 0.5) / 24
            if t > start:
                at.append(t)
                mean.append(rates[d] / 24)
                day.append(d)
    return ArrivalStream(name, tuple(at), tuple(mean), tuple(day), size, stay)


def test_worked_example_from_methods() -> None:
    # METHODS.md section 3, computed by hand there.
    days = occupancy_days(np.array([[0.5], [0.3], [0.7], [0.3], [0.9]]), NO_BOOKINGS, [],
                          [1.0], [3])
    np.testing.assert_allclose(days[0].pmf, [0.00735, 0.09695, 0.3167, 0.3747, 0.17595, 0.02835],
                               atol=1e-12)
    assert days[0].p_over_capacity == pytest.approx(0.17595 + 0.02835, abs=1e-12)
    assert days[0].quantiles["0.5"] == 3


def mixed_inputs():
    rng = np.random.default_rng(7)
    census_at = np.arange(7) + 0.75  # as_of at 06:00, census at midnight
    p0 = rng.uniform(0.3, 0.98, size=14)
    decay = rng.uniform(0.55, 0.95, size=14)
    p_current = p0[:, None] * decay[:, None] ** np.arange(7)[None, :]
    booked = BookedAdmissions(p_go=(0.9, 0.85, 0.8), admit_at=(0.4, 1.6, 3.5),
                              stays=(Coxian.erlang(2, 0.5), Coxian.exponential(0.4),
                                     Coxian.erlang(3, 1.0)))
    emergency_stay = StayMixture((0.7, 0.3), (Coxian.exponential(0.35), Coxian.erlang(2, 0.25)))
    emergency = hourly_stream("emergency", [3, 2.6, 2.8, 2.5, 2.9, 2.0, 1.8, 3.0], 8,
                              emergency_stay, size=6.0, start=0.0)
    unbooked = hourly_stream("elective", 0.4, 8, Coxian.erlang(2, 0.6))
    return p_current, booked, [emergency, unbooked], census_at


def test_exact_pmf_matches_100k_simulated_paths() -> None:
    p_current, booked, streams, census_at = mixed_inputs()
    exact = occupancy_days(p_current, booked, streams, census_at, [16] * 7)
    n = 100_000
    paths = simulate_paths(p_current, booked, streams, census_at, n, np.random.default_rng(11))
    worst = 0.0
    for k, day in enumerate(exact):
        observed = np.bincount(paths[:, k], minlength=day.pmf.size) / n
        assert observed.size <= day.pmf.size + 1
        observed = np.pad(observed, (0, max(0, day.pmf.size - observed.size)))[: day.pmf.size]
        # Binomial standard error of each frequency; floored at one path (1/n) so that a
        # probability of 1e-9 seen once in 100,000 paths is not counted as a miss.
        se = np.sqrt(np.maximum(day.pmf * (1 - day.pmf), 1 / n) / n)
        z = np.abs(observed - day.pmf) / se
        worst = max(worst, float(z.max()))
        assert np.all(z < 4), (k, float(z.max()))
        assert abs(paths[:, k].mean() - day.mean) < 4 * paths[:, k].std() / np.sqrt(n)
    assert worst > 0.5  # the comparison is live: sampling noise is visible


def test_pmfs_sum_to_one_and_quantiles_agree() -> None:
    p_current, booked, streams, census_at = mixed_inputs()
    for day in occupancy_days(p_current, booked, streams, census_at, [16] * 7):
        assert abs(day.pmf.sum() - 1) < 1e-9 and day.pmf.min() >= 0
        cdf = np.cumsum(day.pmf)
        for level, k in day.quantiles.items():
            q = float(level)
            assert cdf[k] >= q - 1e-9 and (k == 0 or cdf[k - 1] < q - 1e-12)
        assert day.mean == pytest.approx(np.arange(day.pmf.size) @ day.pmf, abs=1e-12)
        assert sum(day.components.values()) == pytest.approx(day.mean, rel=1e-9)
        assert day.p_over_capacity == pytest.approx(day.pmf[17:].sum(), abs=1e-12)


def test_arrivals_still_present_match_m_g_infinity() -> None:
    # M/G/infinity: Poisson arrivals at rate lam, present at h with mean lam * int_0^h S(u) du.
    lam, stay = 2.5, Coxian.erlang(3, 0.8)
    stream = hourly_stream("emergency", lam, 10, stay)
    census_at = np.array([0.5, 1.0, 2.0, 4.0, 7.0, 10.0])
    presence = stream_presence(stream, census_at).sum(axis=0)
    for h, got in zip(census_at, presence, strict=True):
        want = lam * integrate.quad(lambda u: float(stay.sf(u)), 0, h)[0]
        # Hourly midpoint rule: error O(1/24^2) relative; 0.2% is ample.
        assert got == pytest.approx(want, rel=2e-3)


def test_long_run_mean_obeys_littles_law() -> None:
    # Little's law L = lam W: from an empty unit, the forecast mean far ahead is lam E[S].
    lam = 3.0
    stay = StayMixture((0.6, 0.4), (Coxian.exponential(0.5), Coxian.erlang(3, 0.4)))
    stream = hourly_stream("emergency", lam, 80, stay)
    day = occupancy_days(np.zeros((0, 1)), NO_BOOKINGS, [stream], [80.0], [None])[0]
    assert day.mean == pytest.approx(lam * stay.mean(), rel=0.03)
    assert day.mean == pytest.approx(lam * stay.mean(), rel=0.005)  # and in fact much closer


def test_stationary_simulated_unit_forecasts_average_to_littles_law() -> None:
    """A simulated M/G/infinity unit; forecasts from many mornings average to lam x mean stay."""
    rng = np.random.default_rng(3)
    lam, stay = 2.0, Coxian.erlang(2, 0.5)  # mean stay 4 days
    horizon = 8000.0
    arrive = np.cumsum(rng.exponential(1 / lam, size=int(lam * horizon * 1.2)))
    arrive = arrive[arrive < horizon]
    leave = arrive + stay.sample(arrive.size, rng)
    stream = hourly_stream("emergency", lam, 8, stay, start=0.0)
    census_at = np.arange(1, 8) - 0.25
    presence = stream_presence(stream, census_at).sum(axis=0)
    means = []
    for t in np.arange(100.0, horizon - 10, 5.0):
        present = (arrive <= t) & (leave > t)
        spent = t - arrive[present]
        p = stay.sf(spent[:, None] + census_at[None, :]) / stay.sf(spent)[:, None]
        means.append(p.sum(axis=0) + presence)
    average = np.mean(means, axis=0)
    assert len(means) > 1500
    np.testing.assert_allclose(average, lam * stay.mean(), rtol=0.03)


def test_negative_binomial_stream_is_wider_than_poisson() -> None:
    stay = Coxian.exponential(0.3)
    poisson = hourly_stream("emergency", 3.0, 8, stay)
    nb = hourly_stream("emergency", 3.0, 8, stay, size=4.0)
    a = occupancy_days(np.zeros((0, 1)), NO_BOOKINGS, [poisson], [7.0], [None])[0]
    b = occupancy_days(np.zeros((0, 1)), NO_BOOKINGS, [nb], [7.0], [None])[0]
    assert a.mean == pytest.approx(b.mean, rel=1e-9)
    var = lambda d: float(np.arange(d.pmf.size) ** 2 @ d.pmf - d.mean**2)  # noqa: E731
    assert var(a) == pytest.approx(a.mean, rel=1e-6)  # Poisson: variance equals mean
    assert var(b) > 1.2 * var(a)
    # scipy cross-check of the Poisson part's shape.
    np.testing.assert_allclose(a.pmf[:20], stats.poisson(a.mean).pmf(np.arange(20)), atol=1e-12)


def test_ceiling_in_steady_state_is_the_erlang_loss_model() -> None:
    # Ten beds, Poisson arrivals 10 a day, exponential stays of mean 1 day: offered load 10
    # Erlangs. In steady state the loss system's occupancy is the Poisson truncated at the ten
    # beds (the Erlang loss model; insensitive to the stay's shape), so P(full) is the Erlang B
    # blocking: 0.2146 for 10 servers at 10 Erlangs (published Erlang B tables, as quoted in
    # METHODS.md section 4, 4 decimals). Twelve days after an empty start the unit is in
    # steady state (exp(-12) of the start is left). Arrivals are turned away by 20,000 paths:
    # Monte-Carlo standard error at most 0.5 / sqrt(20000) = 0.0035; allowed 0.012.
    stream = hourly_stream("emergency", 10.0, 13, Coxian.exponential(1.0))
    day = occupancy_days(np.zeros((0, 1)), NO_BOOKINGS, [stream], [12.0], [10], [10],
                         loss_paths=20_000, seed=1)[0]
    assert day.pmf.size == 11
    assert day.pmf[10] == pytest.approx(0.2146, abs=0.012)
    # The whole pmf against scipy's Poisson with the same offered load, truncated.
    load = float(stream_presence(stream, np.array([12.0])).sum())
    want = stats.poisson(load).pmf(np.arange(11)) / stats.poisson(load).cdf(10)
    np.testing.assert_allclose(day.pmf, want, atol=0.012)
    assert day.p_over_capacity == 0.0  # nothing above the ten staffed beds
    assert day.mean == pytest.approx(load * (1 - want[10]), abs=0.05)  # carried load
    assert sum(day.components.values()) == pytest.approx(day.mean, rel=1e-9)


def test_patients_certain_to_stay_leave_arrivals_an_erlang_loss_unit_of_the_rest() -> None:
    # Four patients who will certainly still be in, a ceiling of 14: arrivals see 10 free beds,
    # so in steady state their count is the Erlang loss model with 10 servers (published
    # Erlang B tables, as quoted in METHODS.md section 4: 0.2146 at 10 Erlangs) on top of four.
    stream = hourly_stream("emergency", 10.0, 13, Coxian.exponential(1.0))
    day = occupancy_days(np.ones((4, 1)), NO_BOOKINGS, [stream], [12.0], [12], [14],
                         current_at=lambda t: np.ones((4, np.size(t))), loss_paths=20_000,
                         seed=2)[0]
    load = float(stream_presence(stream, np.array([12.0])).sum())
    want = np.r_[np.zeros(4), stats.poisson(load).pmf(np.arange(11)) / stats.poisson(load).cdf(10)]
    np.testing.assert_allclose(day.pmf, want, atol=0.012)
    assert day.pmf[14] == pytest.approx(0.2146, abs=0.012)
    assert day.components["current"] == 4.0
    assert day.components["emergency"] == pytest.approx(load * (1 - want[14]), abs=0.05)


def test_census_instant_truncation_without_paths_is_the_erlang_loss_model() -> None:
    # Without paths (loss_paths=0) the arrivals are truncated at the census instant: exact in
    # steady state (Erlang B 0.2146 at 10 servers and 10 Erlangs, published tables as quoted
    # in METHODS.md section 4).
    stream = hourly_stream("emergency", 10.0, 40, Coxian.exponential(1.0))
    day = occupancy_days(np.zeros((0, 1)), NO_BOOKINGS, [stream], [40.0], [10], [10],
                         loss_paths=0)[0]
    assert day.pmf[10] == pytest.approx(0.2146, abs=5e-4)  # hourly slots move the load by 1e-4
    load = float(stream_presence(stream, np.array([40.0])).sum())
    want = stats.poisson(load).pmf(np.arange(11)) / stats.poisson(load).cdf(10)
    np.testing.assert_allclose(day.pmf, want, atol=1e-12)


def test_ceiling_keeps_components_adding_up_and_current_patients_in() -> None:
    p_current, booked, streams, census_at = mixed_inputs()
    open_days = occupancy_days(p_current, booked, streams, census_at, [16] * 7)
    capped = occupancy_days(p_current, booked, streams, census_at, [16] * 7, [17] * 7)
    p_booked = booked.p_present(census_at)
    bit = 0
    for k, (a, b) in enumerate(zip(open_days, capped, strict=True)):
        assert abs(b.pmf.sum() - 1) < 1e-9 and b.pmf.min() >= 0
        # Above the ceiling only by bookings admitted to a full unit (never turned away):
        # P(N > 17) <= P(some booking in) <= the bookings' expected count.
        assert b.pmf.size <= 18 + len(booked.p_go)
        assert b.pmf[18:].sum() <= p_booked[:, k].sum() + 1e-12
        assert sum(b.components.values()) == pytest.approx(b.mean, rel=1e-9)
        # Current patients and bookings are never turned away; arrivals only lose.
        assert b.components["current"] == pytest.approx(p_current[:, k].sum(), rel=1e-12)
        assert b.components["emergency"] <= a.components["emergency"] + 1e-12
        assert b.components["elective"] >= p_booked[:, k].sum() - 1e-12
        assert b.mean <= a.mean + 1e-12
        # Turning arrivals away only lowers a path's count (N' <= N on every path), so the
        # capped count is stochastically smaller (allowing the paths' Monte-Carlo error).
        assert np.all(np.cumsum(b.pmf)[:17] >= np.cumsum(a.pmf)[:17] - 0.01)
        bit += a.pmf.size > 18 and a.pmf[18:].sum() > 1e-3
    assert bit  # the ceiling matters on some day of this example


def test_paths_under_a_ceiling_never_exceed_it_and_turn_away_arrivals() -> None:
    p_current, booked, streams, census_at = mixed_inputs()
    n = 20_000
    free = simulate_paths(p_current, booked, streams, census_at, n, np.random.default_rng(5))
    high = simulate_paths(p_current, booked, streams, census_at, n, np.random.default_rng(5),
                          [free.max() + 1] * 7)
    np.testing.assert_array_equal(free, high)  # a ceiling never reached changes nothing
    capped = simulate_paths(p_current, booked, streams, census_at, n, np.random.default_rng(5),
                            [17] * 7)
    assert capped.max() <= 17 and free.max() > 17
    # Only paths that went over change, and a path is never above its unbounded self.
    assert np.all(capped <= free)
    np.testing.assert_array_equal(capped[(free <= 17).all(axis=1)],
                                  free[(free <= 17).all(axis=1)])
    # Turned-away arrivals stay away: on some later day a path sits below both the ceiling
    # and its unbounded self.
    assert np.any((capped < free) & (capped < 17))


def test_weekly_paths_keep_the_exact_chance_of_each_night_under_a_ceiling() -> None:
    # The paths turn arrivals away at census instants (a censored count); reordering each
    # night's exact quantiles by the paths' ranks must give each night the exact forecast's
    # chance of being over the staffed beds (to 1/n) while keeping the nights' dependence.
    p_current, booked, streams, census_at = mixed_inputs()
    n = 20_000
    exact = occupancy_days(p_current, booked, streams, census_at, [16] * 7, [17] * 7)
    draws = draw_paths(p_current.shape[0], booked, streams, census_at, n,
                       np.random.default_rng(7))
    raw = draws.counts(p_current, [17] * 7)
    paths = with_exact_marginals(raw, [d.pmf for d in exact], draws.tie_break)
    over = paths > 16
    for k, day in enumerate(exact):
        assert abs(over[:, k].mean() - day.p_over_capacity) <= 1.0 / n + 1e-12
    # The censored paths alone overstate a full night on some day of this example.
    assert np.any((raw > 16).mean(axis=0) > np.array([d.p_over_capacity for d in exact]) + 0.01)
    # The week's risk lies between the worst night and the sum over nights (Boole), and the
    # order of the paths is kept: a path's rank on a night is unchanged.
    any_night = over.any(axis=1).mean()
    chances = [d.p_over_capacity for d in exact]
    assert max(chances) - 1.0 / n <= any_night <= sum(chances) + 7.0 / n
    for k in range(7):
        assert np.all(np.diff(paths[np.lexsort((draws.tie_break, raw[:, k])), k]) >= 0)
