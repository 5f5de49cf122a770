"""The occupancy distribution at future census instants, exactly, and whole-week paths.

Three independent parts add up at each census instant h_k (METHODS.md section 3):

- current stays: stay i is present with probability p_i(h_k), so their count is
  Poisson-binomial;
- booked electives: booking j goes ahead with probability g_j, is admitted at a_j and stays
  S_j, so it is present with probability g_j S_j(h_k - a_j): more Poisson-binomial terms;
- arrival streams (emergency admissions, electives not yet booked): arrivals in time slots
  with expected counts m_s at instants u_s, each present at h_k with probability
  S(h_k - u_s). A Poisson stream thinned this way is Poisson with mean
  sum_s m_s S(h_k - u_s) (the M/G/infinity result). Where a day's count is negative binomial
  (a Poisson whose daily rate is gamma distributed with shape r), the arrivals of that day
  still present form a negative binomial with the same r and the thinned mean; days are
  independent, so their pmfs are convolved.

The parts are convolved exactly. Questions about several days together ("full on any day this
week") need joint paths, drawn by :func:`simulate_paths` from the same inputs: a current stay
keeps one uniform draw for the week (present at h_k while U < p_i(h_k)), so its days are
consistent; arrivals and bookings draw a whole stay each.

A unit with a ceiling (``limits``: the most patients it holds) turns an arrival away when it
comes to a full unit, which the sum above ignores. Current stays and bookings are never turned
away. The per-night pmf is the exact one without a ceiling, corrected by paths that follow the
count between census instants and turn each arrival away at its arrival instant
(:mod:`app.stats.loss`; a path that never reaches the ceiling changes nothing, so where the
ceiling is out of reach the answer is the exact one). Without those paths (``loss_paths=0``)
the arrivals still present are truncated at the room left at the census instant, c - f, given
the f patients never turned away (the modified offered-load approximation; Jagerman 1975, Bell
System Technical Journal 54:625-661, cited from memory). That is exact in steady state but
blind to the hours before the census: a unit full in the morning turns the day's arrivals away
even if beds free up by midnight, and against a loss simulation it put P(full) at the first
census 0.11 too high on a unit that starts full (ceilings 10 and 16, loads 12 and 18) and
0.05 too low at moderate load (``tests/stats/test_loss_blocking.py``). In joint paths,
arrivals that would take a path over the ceiling at a census instant are turned away there
(the latest first) and stay away on later days; :func:`with_exact_marginals` then gives each
night the per-night pmf.

Times are in days after ``as_of``. Arrivals are placed at the midpoints of their slots in both
the exact and the simulated forms, so the two describe the same model.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np
import numpy.typing as npt

from app.stats.cancel import checkpoint
from app.stats.loss import (
    LOSS_PATHS,
    LossDraws,
    Losses,
    corrected_pmf,
    draw_losses,
    interpolated_current,
    losses,
)
from app.stats.poisson_binomial import (
    convolve_pmfs,
    negative_binomial_pmf,
    pmf_mean,
    pmf_quantile,
    pmf_sf_over,
    poisson_binomial_pmf,
    poisson_pmf,
)

FloatArray = npt.NDArray[np.float64]
QUANTILE_LEVELS = (0.025, 0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95, 0.975)

__all__ = ["ArrivalStream", "BookedAdmissions", "Newcomers", "OccupancyDay", "PathDraws",
           "StayDistribution", "StayMixture", "draw_paths", "newcomers", "occupancy_days",
           "simulate_paths", "stream_presence", "with_current", "with_exact_marginals"]


class StayDistribution(Protocol):
    """What the forecast needs of a length-of-stay distribution (days)."""

    def sf(self, x: npt.ArrayLike) -> FloatArray: ...

    def sample(self, n: int, rng: np.random.Generator | int | None = None) -> FloatArray: ...


@dataclass(frozen=True)
class StayMixture:
    """A mixture of stay distributions: a newcomer's group is not known in advance."""

    weights: tuple[float, ...]
    components: tuple[Any, ...]

    def __post_init__(self) -> None:
        w = np.asarray(self.weights, dtype=float)
        if w.size != len(self.components) or w.size == 0 or np.any(w < 0) or w.sum() <= 0:
            raise ValueError("weights: need one non-negative weight per component, "
                             f"got {self.weights!r}")
        object.__setattr__(self, "weights", tuple(float(v) for v in w / w.sum()))

    def sf(self, x: npt.ArrayLike) -> FloatArray:
        x = np.asarray(x, dtype=float)
        return sum((w * np.asarray(c.sf(x), dtype=float)
                    for w, c in zip(self.weights, self.components, strict=True)),
                   start=np.zeros(x.shape))

    def mean(self) -> float:
        return float(sum(w * c.mean() for w, c in zip(self.weights, self.components, strict=True)))

    def sample(self, n: int, rng: np.random.Generator | int | None = None) -> FloatArray:
        generator = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)
        which = generator.choice(len(self.components), size=n, p=self.weights)
        out = np.empty(n)
        for i, component in enumerate(self.components):
            idx = np.flatnonzero(which == i)
            if idx.size:
                out[idx] = component.sample(idx.size, generator)
        return out


@dataclass(frozen=True)
class ArrivalStream:
    """Expected arrivals by time slot.

    Attributes
    ----------
    name : str
        Which component of the forecast it feeds: ``"emergency"`` or ``"elective"``.
    slot_at : tuple of float
        Arrival instant of each slot (its midpoint), days after as_of; all > 0.
    slot_mean : tuple of float
        Expected arrivals in each slot.
    slot_day : tuple of int
        Arrival day of each slot: slots of one day share the day's rate draw.
    size : float or None
        Negative binomial size r of a day's count (None: Poisson).
    stay : StayDistribution
        Length of stay of these arrivals, in days.
    clock : numpy.ndarray, shape (slots, instants), optional
        Time the stay distribution runs on from each slot to each census instant (the unit's
        discharge clock: ``app.forecast.newcomer_clock``); None: calendar days (the census
        instant minus the slot).
    """

    name: str
    slot_at: tuple[float, ...]
    slot_mean: tuple[float, ...]
    slot_day: tuple[int, ...]
    size: float | None
    stay: Any
    clock: Any = None

    def lags(self, census_at: FloatArray) -> FloatArray:
        """(slots, instants) time each slot's arrivals have been in at each instant, on the
        stream's clock (positive only where the instant comes after the arrival)."""
        at = np.asarray(self.slot_at, dtype=float)
        calendar = census_at[None, :] - at[:, None]
        if self.clock is None:
            return calendar
        return np.where(calendar > 0, np.asarray(self.clock, dtype=float), calendar)


@dataclass(frozen=True)
class BookedAdmissions:
    """Known bookings: each goes ahead with ``p_go``, admitted ``admit_at`` days after as_of;
    ``clock`` (bookings, instants), when given, is the time their stays run on from admission
    to each census instant (as :class:`ArrivalStream`'s)."""

    p_go: tuple[float, ...]
    admit_at: tuple[float, ...]
    stays: tuple[Any, ...]
    clock: Any = None

    def lags(self, census_at: FloatArray) -> FloatArray:
        """(bookings, instants) time in the unit at each instant on the bookings' clock
        (negative before admission)."""
        calendar = census_at[None, :] - np.asarray(self.admit_at, dtype=float)[:, None]
        if self.clock is None:
            return calendar
        return np.where(calendar >= 0, np.asarray(self.clock, dtype=float), calendar)

    def p_present(self, census_at: FloatArray) -> FloatArray:
        """(bookings, instants) probability each booking's patient is in at each instant."""
        out = np.zeros((len(self.p_go), census_at.size))
        # Bookings of one patient group share a distribution: one sf call per group.
        by_stay: dict[int, list[int]] = {}
        for j, stay in enumerate(self.stays):
            by_stay.setdefault(id(stay), []).append(j)
        all_lags = self.lags(census_at)  # negative exactly before admission
        for rows in by_stay.values():
            stay = self.stays[rows[0]]
            lags = all_lags[rows]
            after = lags >= 0
            survival = _sf_once(stay, np.where(after, lags, 0.0))
            out[rows] = np.where(after, survival, 0.0) * np.asarray(self.p_go)[rows][:, None]
        return out


@dataclass(frozen=True)
class OccupancyDay:
    """The occupancy distribution at one census instant."""

    pmf: FloatArray
    mean: float
    quantiles: dict[str, int]
    p_over_capacity: float | None
    components: dict[str, float]


def _sf_once(stay: Any, lags: FloatArray) -> FloatArray:
    """``stay.sf`` at every lag, evaluated once per distinct lag (hourly slots and daily census
    instants repeat the same lags many times)."""
    flat = np.round(lags.ravel(), 9)
    unique, inverse = np.unique(flat, return_inverse=True)
    return np.asarray(stay.sf(unique), dtype=float)[inverse].reshape(lags.shape)


def stream_presence(stream: ArrivalStream, census_at: FloatArray) -> FloatArray:
    """(days, instants) expected arrivals of each arrival day still present at each instant."""
    at = np.asarray(stream.slot_at, dtype=float)
    mean = np.asarray(stream.slot_mean, dtype=float)
    day = np.asarray(stream.slot_day, dtype=int)
    n_days = int(day.max()) + 1 if day.size else 0
    out = np.zeros((n_days, census_at.size))
    if not at.size:
        return out
    before = census_at[None, :] - at[:, None] > 0
    lags = stream.lags(census_at)
    survival = np.where(before, _sf_once(stream.stay, np.where(before, lags, 0.0)), 0.0)
    present = mean[:, None] * survival
    for k in range(census_at.size):
        out[:, k] = np.bincount(day, weights=present[:, k], minlength=n_days)
    return out


def _stream_pmf(presence_k: FloatArray, size: float | None) -> FloatArray:
    if size is None:
        return poisson_pmf(float(presence_k.sum()))
    parts = [negative_binomial_pmf(float(m), size) for m in presence_k if m > 0]
    return convolve_pmfs(*parts) if parts else np.ones(1)


@dataclass(frozen=True)
class Newcomers:
    """Patients not in the unit yet (booked, and still to come), at each census instant.

    A new score for a current patient cannot change this part, so a page keeps it while
    scores come in and only redoes the current patients' part. Per instant: the bookings'
    pmf, the arrival streams' pmfs by name (emergency, elective), and their expected counts.
    """

    booked: tuple[FloatArray, ...]
    arriving: tuple[dict[str, FloatArray], ...]
    booked_mean: tuple[float, ...]
    arriving_mean: tuple[dict[str, float], ...]


def newcomers(booked: BookedAdmissions, streams: Sequence[ArrivalStream],
              census_at: npt.ArrayLike) -> Newcomers:
    """The exact distributions of bookings and arrival streams still present at each instant."""
    h = np.asarray(census_at, dtype=float)
    p_booked = booked.p_present(h)
    presence = [stream_presence(s, h) for s in streams]
    pmfs, arriving, arriving_mean = [], [], []
    for k in range(h.size):
        checkpoint()
        pmfs.append(poisson_binomial_pmf(p_booked[:, k]))
        by_name: dict[str, list[FloatArray]] = {}
        means: dict[str, float] = {}
        for stream, present in zip(streams, presence, strict=True):
            by_name.setdefault(stream.name, []).append(_stream_pmf(present[:, k], stream.size))
            means[stream.name] = means.get(stream.name, 0.0) + float(present[:, k].sum())
        arriving.append({name: convolve_pmfs(*parts) for name, parts in by_name.items()})
        arriving_mean.append(means)
    return Newcomers(tuple(pmfs), tuple(arriving),
                     tuple(float(v) for v in p_booked.sum(axis=0)), tuple(arriving_mean))


def _within_limit(fixed: FloatArray, streams: Mapping[str, FloatArray], limit: int
                  ) -> tuple[FloatArray, dict[str, float]]:
    """The occupancy when arrivals are turned away at ``limit``, and each stream's expected
    count still present.

    Given f patients who are never turned away (current stays and bookings; pmf ``fixed``),
    the arrivals still present, N (the streams' pmfs by name in ``streams``), are truncated at
    the room left, c - f, and renormalised; where f alone reaches the limit no arrival gets
    in. Stream g keeps sum_f P(f) E[N_g | N <= c - f] with
    E[N_g 1{N <= r}] = sum_y y P(N_g = y) P(N - N_g <= r - y).
    """
    arrivals = convolve_pmfs(*streams.values())
    cdf = np.cumsum(arrivals)
    rooms = np.arange(limit + 1)
    partial = {}  # E[N_g 1{N <= r}] for every room r = 0..limit
    for name, part in streams.items():
        others = [q for other, q in streams.items() if other != name]
        other_cdf = np.cumsum(convolve_pmfs(*others)) if others else np.ones(1)
        y = np.arange(min(part.size, limit + 1))
        room_left = rooms[:, None] - y[None, :]
        lookup = other_cdf[np.clip(room_left, 0, other_cdf.size - 1)]
        partial[name] = np.sum(np.where(room_left >= 0, y * part[: y.size] * lookup, 0.0),
                               axis=1)
    pmf = np.zeros(max(limit + 1, fixed.size))
    expected = dict.fromkeys(streams, 0.0)
    for f in np.flatnonzero(fixed > 0):
        room = limit - int(f)
        m = min(room + 1, arrivals.size)
        kept = float(cdf[m - 1]) if room >= 0 else 0.0
        if kept <= 0.0:
            pmf[f] += fixed[f]
            continue
        pmf[f:f + m] += fixed[f] * arrivals[:m] / kept
        for name in streams:
            expected[name] += float(fixed[f] * partial[name][room] / kept)
    return pmf / pmf.sum(), expected


def occupancy_days(
    p_current: npt.ArrayLike,
    booked: BookedAdmissions,
    streams: Sequence[ArrivalStream],
    census_at: npt.ArrayLike,
    beds: Sequence[int | None],
    limits: Sequence[int | None] | None = None,
    *,
    current_at: Callable[[FloatArray], npt.ArrayLike] | None = None,
    loss_paths: int = LOSS_PATHS,
    seed: int = 0,
) -> list[OccupancyDay]:
    """Exact occupancy distribution at each census instant (within the unit's ceiling, if set).

    Parameters
    ----------
    p_current : array_like, shape (n_stays, K)
        Probability each current stay is still in at each of the K instants.
    booked : BookedAdmissions
    streams : sequence of ArrivalStream
    census_at : array_like, shape (K,)
        Census instants, days after as_of, increasing.
    beds : sequence of int or None, length K
        Staffed beds at each instant (None: not set, no p_over_capacity).
    limits : sequence of int or None, length K, optional
        The most patients the unit can hold at each instant (None: no ceiling): arrivals are
        turned away there at the instant they come (:mod:`app.stats.loss`), current stays and
        bookings never are.
    current_at : callable, optional
        Each current stay's probability of being in at given instants (days after as_of),
        shape (n_stays, len(t)); None: interpolated from ``p_current``
        (:func:`app.stats.loss.interpolated_current`). Used only under a ceiling.
    loss_paths : int
        Paths of the ceiling's correction (0: arrivals truncated at the census instant, as
        ``_within_limit``).
    seed : int
        Seed of those paths.

    Returns
    -------
    list of OccupancyDay
    """
    others = newcomers(booked, streams, census_at)
    draws = p_grid = None
    if limits is not None and any(c is not None for c in limits) and loss_paths > 0:
        draws = draw_losses(booked, streams, census_at, loss_paths,
                            np.random.default_rng(seed), seed=seed)
        if current_at is not None:
            p_grid = np.asarray(current_at(draws.grid), dtype=float)
    return with_current(p_current, others, beds, limits, draws=draws, p_grid=p_grid)


def with_current(p_current: npt.ArrayLike, others: Newcomers, beds: Sequence[int | None],
                 limits: Sequence[int | None] | None = None, *, draws: LossDraws | None = None,
                 p_grid: npt.ArrayLike | None = None) -> list[OccupancyDay]:
    """Add the current stays (Poisson-binomial) to the newcomers, instant by instant, and
    turn arrivals away at the ceiling: at the instant they come, by the paths ``draws``
    (:mod:`app.stats.loss`; ``p_grid`` the current stays on their grid, interpolated from
    ``p_current`` if None), or without draws at the census instant (``_within_limit``)."""
    n_instants = len(others.booked)
    p_now = np.asarray(p_current, dtype=float).reshape(-1, n_instants)
    ceiling = [None] * n_instants if limits is None else list(limits)
    if len(ceiling) != n_instants:
        raise ValueError(f"limits: needs one per census instant ({n_instants}), "
                         f"got {len(ceiling)}")
    lost = None
    if draws is not None and any(c is not None for c in ceiling):
        if p_grid is None:
            p_grid = interpolated_current(p_now, draws.grid[draws.census_index], draws.grid)
        lost = losses(draws, p_grid, ceiling)
    out = []
    for k in range(n_instants):
        checkpoint()
        fixed = convolve_pmfs(poisson_binomial_pmf(p_now[:, k]), others.booked[k])
        arriving = others.arriving[k]
        stream_mean = others.arriving_mean[k]
        pmf = convolve_pmfs(fixed, *arriving.values())
        limit = ceiling[k]
        if lost is not None:
            pmf, stream_mean = _blocked(pmf, stream_mean, lost, k, limit)
        elif limit is not None and arriving and pmf.size > limit + 1:
            pmf, stream_mean = _within_limit(fixed, arriving, int(limit))
        components = {"current": float(p_now[:, k].sum()), "emergency": 0.0,
                      "elective": others.booked_mean[k]}
        for name, value in stream_mean.items():
            components[name] += value
        quantiles = dict(zip((f"{q:g}" for q in QUANTILE_LEVELS),
                             (int(v) for v in pmf_quantile(pmf, QUANTILE_LEVELS)), strict=True))
        over = None if beds[k] is None else float(pmf_sf_over(pmf, beds[k]))
        out.append(OccupancyDay(pmf=pmf, mean=pmf_mean(pmf), quantiles=quantiles,
                                p_over_capacity=over, components=components))
    return out


def _blocked(exact: FloatArray, stream_mean: Mapping[str, float], lost: Losses, k: int,
             limit: int | None) -> tuple[FloatArray, dict[str, float]]:
    """Census instant k's pmf and streams' expected counts with arrivals turned away as the
    paths say (:func:`app.stats.loss.corrected_pmf`); the streams' counts then take up any
    difference the clipping left, so the components still add up to the mean."""
    pmf = corrected_pmf(exact, lost.free[k], lost.lost[k].sum(axis=1), limit)
    if pmf is exact:
        return exact, dict(stream_mean)
    means = dict(stream_mean)
    for s, name in enumerate(lost.stream_names):
        means[name] = means.get(name, 0.0) - float(lost.lost[k][:, s].mean())
    total = sum(means.values())
    gap = pmf_mean(pmf) - pmf_mean(exact) + sum(stream_mean.values()) - total
    if means and total > 0:
        means = {name: v + gap * v / total for name, v in means.items()}
    return pmf, means


@dataclass(frozen=True, eq=False)
class PathDraws:
    """The random part of ``n_paths`` joint paths, drawn once: one uniform per path and
    current stay, the bookings' counts, and every arrival (its path, time and presence at
    each instant). :meth:`counts` adds any current probabilities and applies the ceiling."""

    stay_draws: FloatArray
    booked_counts: npt.NDArray[np.int64]
    path: npt.NDArray[np.int64]
    arrive: FloatArray
    present: npt.NDArray[np.bool_]
    tie_break: FloatArray

    def counts(self, p_current: npt.ArrayLike,
               limits: Sequence[int | None] | None = None) -> npt.NDArray[np.int64]:
        """Occupancy along every path, shape (n_paths, K).

        With ``limits``, arrivals that would take a path over the ceiling at a census
        instant are turned away, the latest first, and stay away later (where only earlier
        arrivals are left to take off, they leave early: a full unit moves a patient out to
        make room)."""
        counts = self.booked_counts.copy()
        n_paths, n_instants = counts.shape
        p_now = np.asarray(p_current, dtype=float).reshape(-1, n_instants)
        if p_now.shape[0] != self.stay_draws.shape[1]:
            raise ValueError(f"p_current: drawn for {self.stay_draws.shape[1]} stays, "
                             f"got {p_now.shape[0]}")
        ceiling = [None] * n_instants if limits is None else list(limits)
        admitted = np.ones(self.path.size, dtype=bool)
        for k in range(n_instants):
            checkpoint()
            counts[:, k] += (self.stay_draws < p_now[:, k]).sum(axis=1)
            counts[:, k] += np.bincount(self.path[admitted & self.present[:, k]],
                                        minlength=n_paths)
            limit = ceiling[k]
            if limit is not None:
                _turn_away(counts[:, k], int(limit), self.path, self.arrive,
                           self.present[:, k], admitted)
        return counts


def draw_paths(
    n_stays: int,
    booked: BookedAdmissions,
    streams: Sequence[ArrivalStream],
    census_at: npt.ArrayLike,
    n_paths: int,
    rng: np.random.Generator,
) -> PathDraws:
    """Draw the joint paths once; :meth:`PathDraws.counts` adds any current probabilities."""
    h = np.asarray(census_at, dtype=float)
    stay_draws = rng.random((n_paths, n_stays)) if n_stays else np.zeros((n_paths, 0))
    counts = np.zeros((n_paths, h.size), dtype=np.int64)
    booked_lags = booked.lags(h)
    for j, (g, a, stay) in enumerate(zip(booked.p_go, booked.admit_at, booked.stays,
                                         strict=True)):
        goes = rng.random(n_paths) < g
        length = np.asarray(stay.sample(n_paths, rng), dtype=float)
        counts += (goes[:, None] & (h[None, :] >= a)
                   & (booked_lags[j][None, :] < length[:, None]))
    drawn = [_stream_arrivals(stream, h, n_paths, rng) for stream in streams]
    path = np.concatenate([d[0] for d in drawn]) if drawn else np.zeros(0, dtype=np.int64)
    arrive = np.concatenate([d[1] for d in drawn]) if drawn else np.zeros(0)
    present = (np.concatenate([d[2] for d in drawn]) if drawn
               else np.zeros((0, h.size), dtype=bool))
    return PathDraws(stay_draws, counts, path, arrive, present, rng.random(n_paths))


def with_exact_marginals(counts: npt.NDArray[np.int64], pmfs: Sequence[FloatArray],
                         tie_break: FloatArray) -> npt.NDArray[np.int64]:
    """Paths whose count on each night follows that night's exact pmf, in the paths' order.

    Under a ceiling the paths turn the latest arrivals away at census instants, which piles
    the overflow at the ceiling (a censored count), while the exact forecast truncates the
    arrivals (the loss model's answer): on the demo's critical care unit the paths put twice
    the exact chance on a full night. Replacing each night's counts by the exact quantile at
    their rank keeps the paths' dependence between nights and the exact chance for each night
    (an empirical-copula reordering; ties in a count broken by ``tie_break``, one uniform per
    path)."""
    out = np.empty_like(counts)
    n = counts.shape[0]
    levels = (np.arange(n) + 0.5) / n
    for k, pmf in enumerate(pmfs):
        order = np.lexsort((tie_break, counts[:, k]))
        out[order, k] = pmf_quantile(pmf, levels)
    return out


def simulate_paths(
    p_current: npt.ArrayLike,
    booked: BookedAdmissions,
    streams: Sequence[ArrivalStream],
    census_at: npt.ArrayLike,
    n_paths: int,
    rng: np.random.Generator,
    limits: Sequence[int | None] | None = None,
) -> npt.NDArray[np.int64]:
    """Occupancy at every instant along ``n_paths`` joint paths; shape (n_paths, K), with
    arrivals turned away at ``limits`` (:meth:`PathDraws.counts`)."""
    h = np.asarray(census_at, dtype=float)
    p_now = np.asarray(p_current, dtype=float).reshape(-1, h.size)
    return draw_paths(p_now.shape[0], booked, streams, h, n_paths, rng).counts(p_now, limits)


def _stream_arrivals(stream: ArrivalStream, h: FloatArray, n_paths: int,
                     rng: np.random.Generator
                     ) -> tuple[npt.NDArray[np.int64], FloatArray, npt.NDArray[np.bool_]]:
    """One stream's arrivals on every path: path index, arrival time, present at each instant."""
    at = np.asarray(stream.slot_at, dtype=float)
    mean = np.asarray(stream.slot_mean, dtype=float)
    day = np.asarray(stream.slot_day, dtype=int)
    lags = stream.lags(h) if at.size else np.zeros((0, h.size))
    paths, times, present = [], [], []
    for d in np.unique(day):
        slots = np.flatnonzero(day == d)
        day_mean = mean[slots].sum()
        if day_mean <= 0:
            continue
        rate = np.full(n_paths, day_mean)
        if stream.size is not None:
            rate = rate * rng.gamma(stream.size, 1.0 / stream.size, size=n_paths)
        n = rng.poisson(rate)
        total = int(n.sum())
        if total == 0:
            continue
        slot = slots[rng.choice(slots.size, size=total, p=mean[slots] / day_mean)]
        arrive = at[slot]
        length = np.asarray(stream.stay.sample(total, rng), dtype=float)
        paths.append(np.repeat(np.arange(n_paths), n))
        times.append(arrive)
        present.append((h[None, :] > arrive[:, None]) & (lags[slot] < length[:, None]))
    if not paths:
        return np.zeros(0, dtype=np.int64), np.zeros(0), np.zeros((0, h.size), dtype=bool)
    return np.concatenate(paths), np.concatenate(times), np.concatenate(present)


def _turn_away(count: npt.NDArray[np.int64], limit: int, path: npt.NDArray[np.int64],
               arrive: FloatArray, present: npt.NDArray[np.bool_],
               admitted: npt.NDArray[np.bool_]) -> None:
    """Within each path over ``limit``, mark its latest arrivals still present as turned away
    (``admitted`` False) and take them off ``count``, in place. Current patients and bookings
    are never taken off, so a path they alone fill stays over."""
    over = np.maximum(count - limit, 0)
    if not over.any():
        return
    idx = np.flatnonzero(admitted & present & (over[path] > 0))
    if not idx.size:
        return
    idx = idx[np.lexsort((-arrive[idx], path[idx]))]
    p = path[idx]
    first = np.r_[0, np.flatnonzero(p[1:] != p[:-1]) + 1]
    rank = np.arange(idx.size) - np.repeat(first, np.diff(np.r_[first, idx.size]))
    away = idx[rank < over[p]]
    admitted[away] = False
    count -= np.bincount(path[away], minlength=count.size)


def day_to_json(day: OccupancyDay) -> Mapping[str, Any]:
    """The per-day numbers in the forecast JSON's shape (full precision, no rounding)."""
    return {"pmf": [float(v) for v in day.pmf], "mean": day.mean, "quantiles": day.quantiles,
            "p_over_capacity": day.p_over_capacity, "components": day.components}
