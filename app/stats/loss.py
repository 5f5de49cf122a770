"""Arrivals turned away at the instant they come, when the unit is full.

A unit with a ceiling c (the most patients it holds) turns an arrival away when, at the
instant it comes, c patients are in. The exact per-night occupancy of
:mod:`app.stats.occupancy` (current stays, bookings and arrival streams, each independent)
knows the count only at census instants, so it cannot see this: a unit full this morning
turns away the arrivals of the day even if, by midnight, enough patients have gone home to
make room for them.

The count between census instants is followed by simulation on a grid of instants: every
arrival slot, every booking's admission and every census instant (hourly slots, so about 24
points a day). On each of ``n`` paths

- a current stay keeps one uniform U for the week and is in at grid instant t while
  U < p_i(t) (its probability of still being in, on the same grid);
- a booking goes ahead with its probability and stays a drawn length (never turned away);
  lengths are drawn by inverse transform on the grid (a uniform u against the stay's
  survival between grid instants, on the unit's clock);
- arrivals are drawn slot by slot as in :func:`app.stats.occupancy_paths.draw_paths` (a day's
  gamma-distributed rate where the stream is negative binomial), each with a drawn length of
  stay on the unit's clock;

and a path's arrivals are admitted in time order while the count at their instant is below
the ceiling (arrivals of one slot come at its midpoint, one after another).

The per-night pmf is the exact one *without* a ceiling, corrected by the simulation: with N
the count with nobody turned away and N' the count with arrivals turned away on the same path,

    P(N' = n) = P(N = n) + E[1{N' = n} - 1{N = n}]     for n <= c,

the first term exact and the second estimated over the paths (a control variate: a path where
no arrival was turned away before the census instant contributes exactly zero, so where the
ceiling is never reached the answer is the exact one, and the Monte-Carlo error comes only
from the paths that reached it). Above the ceiling only current stays and bookings can take
the count (nobody else gets in), and there P(N' = n) is the paths' share; the pmf is
renormalised after clipping the estimate at zero. Each stream's expected count still present
loses the mean count of its turned-away arrivals that would still be in.

Why this and not a chain on the count: a birth-death chain stepped hourly would need the
current patients' departures as a Markov process of the count alone (they are independent and
each has its own hazard, so the count is not Markov) and the newcomers' phase-type stays as a
single hazard; both are approximations whose error does not vanish with more work, while the
simulation here is exact up to its Monte-Carlo error and the hourly slots the exact forecast
already uses. The paths that never reach the ceiling cost one pass; only those that do are
followed arrival by arrival. The random draws are NumPy's; the loops over paths and arrivals
are compiled (app/stats/loss_kernels.py).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

from app.bounded_cache import BoundedCache
from app.stats import loss_kernels as kernels
from app.stats.cancel import checkpoint

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]

# Paths of the correction. At 1,000 paths the Monte-Carlo standard error of P(full) on a night
# where every path reaches the ceiling is at most 0.5 / sqrt(1000) = 0.016; nights the ceiling
# is rarely reached have much less (only those paths carry noise). A unit of the hospital
# benchmark spends about 3 ms drawing them and under 1 ms following them (compiled;
# tests/benchmarks/test_bench_hospital.py). The same
# paths give the week's any-night risk (``Losses.kept``; standard error at most 0.016 too:
# on the demo's units, 8 seeds at 8 mornings, 0.008-0.013, and the mean within 0.011 of a
# 20,000-path run).
LOSS_PATHS = 1000

__all__ = ["LOSS_PATHS", "LossDraws", "Losses", "corrected_pmf", "draw_losses",
           "interpolated_current", "loss_grid", "losses"]


def loss_grid(booked: Any, streams: Sequence[Any], census_at: npt.ArrayLike) -> FloatArray:
    """The instants (days after as_of) at which the count matters: every arrival slot and
    booking admission up to the last census instant, and the census instants."""
    h = np.asarray(census_at, dtype=float)
    last = float(h.max()) if h.size else 0.0
    parts = [h, np.asarray(booked.admit_at, dtype=float)]
    parts += [np.asarray(s.slot_at, dtype=float) for s in streams]
    every = np.concatenate(parts)
    return np.unique(every[every <= last])


@dataclass(frozen=True, eq=False)
class LossDraws:
    """Everything random in the paths except the current stays' uniforms.

    Arrivals (all streams and paths together) are grouped by path, path by path (path q's are
    ``starts[q]:starts[q + 1]``), in time order within a path; ``rank`` is an arrival's place
    among its path's arrivals in the same slot; ``leave`` is the first grid index at which it
    would be gone (``grid.size`` if still in at the end). Bookings that go ahead likewise
    (``booking_starts``), each in from grid index ``booking_in`` to ``booking_out``."""

    grid: FloatArray
    census_index: IntArray
    n_paths: int
    seed: int
    starts: IntArray
    at: IntArray
    leave: IntArray
    stream: IntArray
    rank: IntArray
    booking_starts: IntArray
    booking_in: IntArray
    booking_out: IntArray
    stream_names: tuple[str, ...]
    # One uniform per path, to break ties when the paths are reordered to exact marginals
    # (app.stats.occupancy_paths.with_exact_marginals).
    tie_break: FloatArray


def _stay_table(stay: Any, tau: FloatArray) -> tuple[FloatArray, FloatArray]:
    """The stay's survival S on the hourly lattice of lags 0, 1/24, ... past the grid's span,
    made non-increasing: interpolated linearly in between (a length-of-stay survival of days
    moves by far less than the paths' Monte-Carlo error within an hour)."""
    top = float(tau[-1] - tau[0]) if tau.size else 0.0
    count = max(int(np.ceil(top * 24)), 1)
    return np.arange(count + 1) / 24.0, np.minimum.accumulate(hourly_sf(stay, count))


# Survival on the hourly lattice per distribution object, kept while among the last few used
# (a model's group distributions serve every forecast made with it; the object is kept with
# its values, so its id is not reused while the entry lives).
HOURLY_KEPT = 256
_HOURLY: BoundedCache[tuple[Any, FloatArray]] = BoundedCache(HOURLY_KEPT)


def hourly_sf(stay: Any, count: int) -> FloatArray:
    """``stay.sf`` at 0, 1/24, ..., count/24 days; a mixture (``weights``, ``components``) as
    the weighted sum of its components', each evaluated once per object."""
    if hasattr(stay, "components") and hasattr(stay, "weights"):
        return np.asarray(sum((w * hourly_sf(c, count)
                               for w, c in zip(stay.weights, stay.components, strict=True)),
                              start=np.zeros(count + 1)), dtype=float)
    found = _HOURLY.get(id(stay))
    if found is not None and found[0] is stay and found[1].size > count:
        return found[1][: count + 1]
    size = max(count + 1, 24 * 10 + 1)      # ten days: every forecast's week fits
    values = np.asarray(stay.sf(np.arange(size) / 24.0), dtype=float)
    values.setflags(write=False)
    _HOURLY.put(id(stay), (stay, values))
    return values[: count + 1]


def _leave_index(table: tuple[FloatArray, FloatArray], tau: FloatArray, start: IntArray,
                 u: FloatArray) -> IntArray:
    """First grid index at which a stay begun at grid instant ``start`` with survival draw
    ``u`` is over (``tau.size``: still in at the end).

    A stay of length L = S^-1(u) (u uniform, so L has survival S) is in at a later instant
    while S(time since start) > u, that is while the time since start is below L: the first
    grid instant at least L after the start is the one at which it is gone
    (inverse-transform sampling on the grid; L read off the table, linear between its hourly
    knots; compiled: app/stats/loss_kernels.py)."""
    knots, s = table
    return np.asarray(kernels.leave_index(knots, s, tau, np.asarray(start, dtype=np.int64),
                                          np.asarray(u, dtype=float)))


def draw_losses(booked: Any, streams: Sequence[Any], census_at: npt.ArrayLike, n_paths: int,
                rng: np.random.Generator, *,
                clock: Callable[[FloatArray], FloatArray] | None = None,
                seed: int = 0) -> LossDraws:
    """Draw the bookings' and arrivals' part of ``n_paths`` paths on the grid.

    ``clock`` maps grid instants (days after as_of) to the time the newcomers' stays run on
    (the unit's discharge clock; None: calendar days), as the streams' and bookings'
    ``clock`` matrices do between slots and census instants."""
    h = np.asarray(census_at, dtype=float)
    grid = loss_grid(booked, streams, h)
    tau = (_grid_clock(booked, streams, h, grid) if clock is None
           else np.asarray(clock(grid), dtype=float))
    size = grid.size
    census_index = np.searchsorted(grid, h).astype(np.int64)
    # Bookings that go ahead: in from admission to the first instant the stay is over.
    # Bookings of one patient group share a distribution (its survival table, once).
    admit_at = np.asarray(booked.admit_at, dtype=float)
    inside = np.flatnonzero(admit_at <= (grid[-1] if size else -np.inf))
    goes = rng.random((len(booked.p_go), n_paths)) < np.asarray(booked.p_go)[:, None]
    by_stay: dict[int, list[int]] = {}
    for j in inside:
        by_stay.setdefault(id(booked.stays[j]), []).append(int(j))
    b_path: list[IntArray] = []
    b_in: list[IntArray] = []
    b_out: list[IntArray] = []
    for rows in by_stay.values():
        table = _stay_table(booked.stays[rows[0]], tau)
        admitted_at = np.searchsorted(grid, admit_at[rows]).astype(np.int64)
        booking, on_path = np.nonzero(goes[rows])           # (bookings of the group, paths)
        b_path.append(on_path)
        b_in.append(admitted_at[booking])
        b_out.append(_leave_index(table, tau, admitted_at[booking], rng.random(booking.size)))
    booking_path = _joined(b_path)
    by_path = np.argsort(booking_path, kind="stable")
    booking_starts = np.searchsorted(booking_path[by_path], np.arange(n_paths + 1))
    at: list[IntArray] = []
    path: list[IntArray] = []
    leave: list[IntArray] = []
    which: list[IntArray] = []
    for s, stream in enumerate(streams):
        drawn = _arrivals(stream, float(grid[-1]) if size else 0.0, n_paths, rng)
        if drawn is None:
            continue
        slot_at, slot, on_path = drawn
        start = np.searchsorted(grid, slot_at)[slot].astype(np.int64)
        at.append(start)
        path.append(on_path)
        leave.append(_leave_index(_stay_table(stream.stay, tau), tau, start,
                                  rng.random(start.size)))
        which.append(np.full(start.size, s, dtype=np.int64))
    a_at, a_path = _joined(at), _joined(path)
    # Path by path and in time order, stably (a counting sort), with each arrival's rank among
    # its path's arrivals at the same instant.
    order, rank, starts = kernels.path_order(a_path, a_at, n_paths, size)
    return LossDraws(grid, census_index, n_paths, seed, starts, a_at[order],
                     _joined(leave)[order], _joined(which)[order], rank,
                     booking_starts.astype(np.int64), _joined(b_in)[by_path],
                     _joined(b_out)[by_path], tuple(s.name for s in streams),
                     rng.random(n_paths))


def _joined(parts: list[IntArray]) -> IntArray:
    return (np.concatenate(parts).astype(np.int64, copy=False) if parts
            else np.zeros(0, dtype=np.int64))


def _grid_clock(booked: Any, streams: Sequence[Any], census_at: FloatArray, grid: FloatArray
                ) -> FloatArray:
    """The newcomers' clock time at each grid instant, read off the streams' and bookings'
    ``clock`` matrices (time from each slot or admission to each census instant): anchored at
    the last census instant, a slot's time is that instant's minus the slot's clock to it,
    and a census instant's is an early slot's plus its clock to that instant. Calendar days
    where no clock is given."""
    sources = [(np.asarray(s.slot_at, dtype=float), np.asarray(s.clock, dtype=float))
               for s in streams if s.clock is not None and len(s.slot_at)]
    if booked.clock is not None and len(booked.admit_at):
        sources.append((np.asarray(booked.admit_at, dtype=float),
                        np.asarray(booked.clock, dtype=float)))
    if not sources or grid.size == 0:
        return grid
    h = census_at
    tau = grid.copy()
    tau_census = h.copy()
    for at, clock in sources:
        before = np.flatnonzero(at < h[0])
        if before.size:
            row = clock[before[0]]
            tau_census = h[-1] + (row - row[-1])
            break
    for at, clock in sources:
        inside = np.flatnonzero(at <= h[-1])
        tau[np.searchsorted(grid, at[inside])] = tau_census[-1] - clock[inside, -1]
    tau[np.searchsorted(grid, h)] = tau_census
    return np.maximum.accumulate(tau)


def interpolated_current(p_current: npt.ArrayLike, census_at: FloatArray, grid: FloatArray
                         ) -> FloatArray:
    """Current stays' probability of being in at the grid instants, log-linear in time
    between as_of (certainly in) and the census instants (used where the stays' own curves on
    the grid are not given)."""
    p = np.asarray(p_current, dtype=float).reshape(-1, census_at.size)
    if not p.shape[0]:
        return np.zeros((0, grid.size))
    x = np.r_[0.0, census_at]
    logs = np.log(np.maximum(np.c_[np.ones(p.shape[0]), p], 1e-300))
    return np.exp(np.stack([np.interp(grid, x, row) for row in logs]))


def _arrivals(stream: Any, last: float, n_paths: int, rng: np.random.Generator
              ) -> tuple[FloatArray, IntArray, IntArray] | None:
    """One stream's arrivals before ``last`` on every path: the slots' instants, and each
    arrival's slot and path.
    A day's count is Poisson (given the day's gamma-distributed rate for a negative binomial
    stream, times the path's one gamma multiplier for a stream with a shared level) and its
    arrivals fall in the day's slots in proportion to their means."""
    slot_at = np.asarray(stream.slot_at, dtype=float)
    keep = slot_at < last
    slot_at = slot_at[keep]
    mean = np.asarray(stream.slot_mean, dtype=float)[keep]
    day = np.asarray(stream.slot_day, dtype=np.int64)[keep]
    if not slot_at.size or mean.sum() <= 0:
        return None
    order = np.argsort(day, kind="stable")
    slot_at, mean, day = slot_at[order], mean[order], day[order]
    days, day_of = np.unique(day, return_inverse=True)
    day_mean = np.bincount(day_of, weights=mean)
    rate: FloatArray = np.broadcast_to(day_mean, (n_paths, days.size)).astype(float)
    if stream.size is not None:
        rate = rate * rng.gamma(stream.size, 1.0 / stream.size, size=(n_paths, days.size))
    if stream.level_size is not None:  # one multiplier per path for all the stream's days
        rate = rate * rng.gamma(stream.level_size, 1.0 / stream.level_size, size=(n_paths, 1))
    n = rng.poisson(rate)
    total = int(n.sum())
    if total == 0:
        return None
    cumulative = np.cumsum(mean)
    before = np.r_[0.0, np.cumsum(day_mean)][:-1]
    first = np.searchsorted(day_of, np.arange(days.size))
    last_slot = np.r_[first[1:], day_of.size] - 1
    # Path by path and day by day, each arrival in the first of its day's slots whose
    # cumulative mean exceeds its draw (compiled: app/stats/loss_kernels.py).
    slot, on_path = kernels.arrival_slots(n.astype(np.int64), rng.random(total), before,
                                          day_mean, cumulative, first.astype(np.int64),
                                          last_slot.astype(np.int64))
    return slot_at, slot, on_path


@dataclass(frozen=True)
class Losses:
    """Per census instant and path: the count with nobody turned away (``free``, shape
    (K, paths)) and the arrivals turned away that would still be in, by stream (``lost``,
    shape (K, paths, streams))."""

    free: npt.NDArray[np.int64]
    lost: npt.NDArray[np.int64]
    stream_names: tuple[str, ...]

    def kept(self) -> npt.NDArray[np.int64]:
        """(paths, K) the count along every path with arrivals turned away: joint paths of
        the week, blocked at the instants arrivals come."""
        return (self.free - self.lost.sum(axis=2)).T


def _grid_limits(draws: LossDraws, limits: Sequence[int | None]) -> FloatArray:
    """The ceiling at each grid instant: that of the next census instant (inf: none)."""
    per_census = np.array([np.inf if c is None else float(c) for c in limits])
    nxt = np.searchsorted(draws.census_index, np.arange(draws.grid.size), side="left")
    return per_census[np.minimum(nxt, per_census.size - 1)]


def losses(draws: LossDraws, p_grid: npt.ArrayLike, limits: Sequence[int | None]) -> Losses:
    """Follow every path with arrivals turned away at ``limits`` (one per census instant);
    ``p_grid`` (stays, grid) is each current stay's probability of being in at each grid
    instant.

    A current stay keeps one uniform U for the week and is in at grid instant t while
    U < p(t); arrivals are admitted in time order while the count at their instant is below
    the ceiling; only the paths on which some arrival would find the unit full even with
    everyone admitted are followed arrival by arrival (compiled:
    app/stats/loss_kernels.py)."""
    size, n = draws.grid.size, draws.n_paths
    p = np.asarray(p_grid, dtype=float).reshape(-1, size)
    p = np.minimum.accumulate(p, axis=1)          # in at t only if in before
    uniform = np.random.default_rng([draws.seed, p.shape[0]]).random((p.shape[0], n))
    checkpoint()
    free, lost = kernels.follow_paths(
        np.ascontiguousarray(p), uniform, draws.booking_starts, draws.booking_in,
        draws.booking_out, draws.starts, draws.at, draws.leave, draws.stream, draws.rank,
        _grid_limits(draws, limits), draws.census_index, len(draws.stream_names))
    return Losses(free, lost, draws.stream_names)


def corrected_pmf(exact: npt.NDArray[np.float64], free: npt.NDArray[np.int64],
                  lost_total: npt.NDArray[np.int64], limit: int | None
                  ) -> npt.NDArray[np.float64]:
    """The exact pmf with nobody turned away, corrected to arrivals turned away by the paths
    (module docstring): at or below ``limit`` the exact pmf plus the paths' mean change of the
    indicator, above it the paths' share; clipped at zero and renormalised."""
    n = free.size
    if not lost_total.any() and (limit is None or exact.size <= limit + 1):
        return exact                     # no path turned anyone away: the exact answer
    kept = free - lost_total
    width = max(exact.size, int(free.max(initial=0)) + 1)
    pmf = np.zeros(width)
    pmf[: exact.size] = exact
    moved = lost_total > 0
    if moved.any():
        pmf -= np.bincount(free[moved], minlength=width)[:width] / n
        pmf += np.bincount(kept[moved], minlength=width)[:width] / n
    if limit is not None and width > limit + 1:
        pmf[limit + 1:] = np.bincount(kept, minlength=width)[limit + 1:width] / n
    pmf = np.clip(pmf, 0.0, None)
    nonzero = np.flatnonzero(pmf > 0)
    pmf = pmf[: int(nonzero[-1]) + 1] if nonzero.size else np.ones(1)
    return pmf / pmf.sum()
