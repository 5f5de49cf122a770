"""The loss paths' compiled loops (app/stats/loss_kernels.py) must not change a number: each
is checked against NumPy's own ``searchsorted``, ``lexsort`` and ``interp`` or against a
direct path-by-path simulation written here, arrival by arrival, from the rule the module
states (a stay in while its uniform is below its chance of being in; arrivals admitted in
time order while the count is below the ceiling). That the rule itself gives the right
blocked occupancy is tests/stats/test_loss_blocking.py's job (an independent loss simulation).
"""

from __future__ import annotations

import numba
import numpy as np
import pytest

from app.stats import loss_kernels as kernels


@numba.njit(cache=False)
def _search_all(values, queries, right):  # type: ignore[no-untyped-def]
    table, low, inverse = kernels._bucket_table(values, 8 * values.size)
    out = np.empty(queries.size, np.int64)
    for k in range(queries.size):
        out[k] = kernels._search(values, table, low, inverse, queries[k], right)
    return out


def _values_and_queries(seed: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    n = int(rng.integers(1, 400))
    # Ties (values rounded to 1-3 decimals), a flat stretch, a single value, queries outside
    # the range, on the values themselves, a hair below them, infinite and NaN-free.
    values = np.sort(np.round(rng.uniform(-1, 1, n), int(rng.integers(1, 4))))
    if seed % 3 == 0:
        values = np.maximum.accumulate(np.r_[values[: n // 2], np.full(n - n // 2,
                                                                        values[n // 2])])
    queries = np.r_[rng.uniform(-1.5, 1.5, 4000), values[rng.integers(0, n, 1000)],
                    np.nextafter(values[rng.integers(0, n, 300)], -2.0),
                    np.nextafter(values[rng.integers(0, n, 300)], 2.0), [np.inf, -np.inf]]
    return values, queries


@pytest.mark.parametrize("seed", range(30))
def test_bucket_search_gives_numpys_indices(seed: int) -> None:
    values, queries = _values_and_queries(seed)
    for right, side in ((False, "left"), (True, "right")):
        np.testing.assert_array_equal(_search_all(values, queries, right),
                                      np.searchsorted(values, queries, side=side))


def _leave_reference(knots: np.ndarray, s: np.ndarray, tau: np.ndarray, start: np.ndarray,
                     u: np.ndarray) -> np.ndarray:
    """Inverse transform on the table with NumPy: the first knot with S <= u, the length
    linear between knots, the first grid instant at least that long after the start."""
    j = np.searchsorted(-s, -u, side="left")
    inside = np.clip(j, 1, max(s.size - 1, 1))
    s_lo, s_hi = s[inside - 1], s[inside]
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = np.where(s_lo > s_hi, (s_lo - u) / (s_lo - s_hi), 1.0)
    length = knots[inside - 1] + np.clip(frac, 0.0, 1.0) * (knots[inside] - knots[inside - 1])
    length = np.where(j == 0, 0.0, np.where(j >= s.size, np.inf, length))
    leave = np.searchsorted(tau, tau[start] + length, side="left")
    return np.minimum(np.maximum(leave, start + 1), tau.size)


@pytest.mark.parametrize("seed", range(12))
def test_leaving_instants_match_numpys_inverse_transform(seed: int) -> None:
    rng = np.random.default_rng(100 + seed)
    m = int(rng.integers(2, 300))
    knots = np.arange(m) / 24.0
    # A survival table with flat stretches (exact ties) and, every other seed, a floor above 0.
    steps = rng.exponential(1.0, m) * (rng.random(m) < 0.7)
    s = np.exp(-np.cumsum(steps) / m * 6)
    s[0] = 1.0
    if seed % 2:
        s = np.maximum(s, 0.3)
    tau = np.maximum.accumulate(np.cumsum(rng.uniform(0.0, 0.1, 170)))
    start = rng.integers(0, tau.size, 5000)
    u = np.r_[rng.random(4000), s[rng.integers(0, m, 1000)]]
    np.testing.assert_array_equal(kernels.leave_index(knots, s, tau, start, u),
                                  _leave_reference(knots, s, tau, start, u))


def test_arrivals_fall_in_their_days_slots_as_numpy_places_them() -> None:
    rng = np.random.default_rng(7)
    days, per_day, paths = 7, 24, 60
    mean = rng.uniform(0.0, 1.0, days * per_day) * (rng.random(days * per_day) < 0.8)
    day_of = np.repeat(np.arange(days), per_day)
    day_mean = np.bincount(day_of, weights=mean)
    cumulative = np.cumsum(mean)
    before = np.r_[0.0, np.cumsum(day_mean)][:-1]
    first = np.arange(days) * per_day
    last = first + per_day - 1
    counts = rng.poisson(day_mean, size=(paths, days)).astype(np.int64)
    uniform = rng.random(int(counts.sum()))
    slot, path = kernels.arrival_slots(counts, uniform, before, day_mean, cumulative,
                                       first, last)
    on_path = np.repeat(np.repeat(np.arange(paths), days), counts.ravel())
    on_day = np.repeat(np.tile(np.arange(days), paths), counts.ravel())
    draw = before[on_day] + uniform * day_mean[on_day]
    expected = np.clip(np.searchsorted(cumulative, draw, side="right"), first[on_day],
                       last[on_day])
    np.testing.assert_array_equal(path, on_path)
    np.testing.assert_array_equal(slot, expected)


def test_path_order_is_numpys_stable_sort_with_ranks_and_starts() -> None:
    rng = np.random.default_rng(3)
    n_paths, size = 40, 50
    path = rng.integers(0, n_paths, 3000)
    at = rng.integers(0, size, 3000)
    order, rank, starts = kernels.path_order(path, at, n_paths, size)
    expected = np.lexsort((at, path))          # stable: ties keep their input order
    np.testing.assert_array_equal(order, expected)
    key = (path * size + at)[expected]
    first_of_key = np.searchsorted(key, key, side="left")
    np.testing.assert_array_equal(rank, np.arange(key.size) - first_of_key)
    np.testing.assert_array_equal(starts, np.searchsorted(path[expected],
                                                          np.arange(n_paths + 1)))


def _paths_directly(p, uniform, bookings, arrivals, ceiling, census_index, n_streams):  # type: ignore[no-untyped-def]
    """Each path simulated arrival by arrival from the rule, in plain Python."""
    n_stays, size = p.shape
    n = uniform.shape[1]
    free = np.zeros((census_index.size, n), np.int64)
    lost = np.zeros((census_index.size, n, n_streams), np.int64)
    for q in range(n):
        def fixed(g: int, q: int = q) -> int:
            stays = sum(1 for i in range(n_stays) if uniform[i, q] < p[i, g])
            booked = sum(1 for bq, b_in, b_out in bookings if bq == q and b_in <= g < b_out)
            return stays + booked
        mine = sorted((a for a in arrivals if a[0] == q), key=lambda a: a[1])   # stable
        for k, c in enumerate(census_index):
            free[k, q] = fixed(c) + sum(1 for _, at, leave, _ in mine if at < c < leave)
        admitted: list[tuple[int, int]] = []
        for _, at, leave, stream in mine:
            count = fixed(at) + sum(1 for a_at, a_leave in admitted if a_at < at < a_leave)
            count += sum(1 for a_at, _ in admitted if a_at == at)
            if count < ceiling[at]:
                admitted.append((at, leave))
            else:
                for k, c in enumerate(census_index):
                    if at < c < leave:
                        lost[k, q, stream] += 1
    return free, lost


@pytest.mark.parametrize("seed", range(6))
def test_paths_followed_as_a_direct_simulation_follows_them(seed: int) -> None:
    rng = np.random.default_rng(50 + seed)
    n_stays, size, n, n_streams = int(rng.integers(0, 6)), 30, 40, 2
    p = np.minimum.accumulate(rng.uniform(0.0, 1.0, (n_stays, size)), axis=1)
    uniform = rng.random((n_stays, n))
    bookings = [(int(rng.integers(0, n)), b_in, int(rng.integers(b_in + 1, size + 1)))
                for b_in in rng.integers(0, size - 1, 25)]
    arrivals = [(int(rng.integers(0, n)), at, int(rng.integers(at + 1, size + 1)),
                 int(rng.integers(0, n_streams))) for at in rng.integers(0, size - 1, 400)]
    ceiling = np.full(size, float(rng.integers(3, 8)))
    ceiling[size // 2:] = np.inf if seed % 3 == 0 else ceiling[0] + 1
    census_index = np.array([4, 11, 20, 29])

    b = sorted(bookings, key=lambda x: x[0])
    booking_starts = np.searchsorted([x[0] for x in b], np.arange(n + 1))
    a_path = np.array([a[0] for a in arrivals])
    a_at = np.array([a[1] for a in arrivals])
    order, rank, starts = kernels.path_order(a_path, a_at, n, size)
    free, lost = kernels.follow_paths(
        p, uniform, booking_starts, np.array([x[1] for x in b]), np.array([x[2] for x in b]),
        starts, a_at[order], np.array([a[2] for a in arrivals])[order],
        np.array([a[3] for a in arrivals])[order], rank, ceiling, census_index, n_streams)
    ref_free, ref_lost = _paths_directly(p, uniform, bookings, arrivals, ceiling, census_index,
                                         n_streams)
    assert lost.sum() > 0                 # the ceiling turned arrivals away
    np.testing.assert_array_equal(free, ref_free)
    np.testing.assert_array_equal(lost, ref_lost)
