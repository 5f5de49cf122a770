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
week") need joint paths, drawn by :mod:`app.stats.occupancy_paths` from the same inputs: a
current stay keeps one uniform draw for the week (present at h_k while U < p_i(h_k)), so its
days are consistent; so does each arrival and booking (present while U < S(h_k - a)).

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
from app.stats.transfer_presence import PassedOn

FloatArray = npt.NDArray[np.float64]
QUANTILE_LEVELS = (0.025, 0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95, 0.975)

__all__ = ["ArrivalStream", "BookedAdmissions", "Newcomers", "OccupancyDay",
           "StayDistribution", "StayMixture", "newcomers", "occupancy_days",
           "stream_presence", "with_current"]


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
    level_size : float or None
        Gamma size of one multiplier of the rate shared by all the stream's days (mean 1,
        variance 1 / level_size: the demand level's own error over the forecast,
        app/stats/demand_spread.py); None: the days' rates are independent.
    """

    name: str
    slot_at: tuple[float, ...]
    slot_mean: tuple[float, ...]
    slot_day: tuple[int, ...]
    size: float | None
    stay: Any
    clock: Any = None
    level_size: float | None = None

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
    # Patients passed on by other units expected in at the census (after the ceiling).
    passed_mean: float | None = None


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


def _stream_pmf(presence_k: FloatArray, size: float | None,
                level_size: float | None = None) -> FloatArray:
    """Arrivals still present at one instant: the days' counts (Poisson, or NB2 of size
    ``size``) summed, mixed over the shared multiplier of size ``level_size`` if any."""
    total = float(presence_k.sum())
    if size is None:
        # With a shared gamma multiplier, a Poisson count is negative binomial, exactly.
        if level_size is None:
            return poisson_pmf(total)
        return negative_binomial_pmf(total, level_size)
    if level_size is None:
        parts = [negative_binomial_pmf(float(m), size) for m in presence_k if m > 0]
        return convolve_pmfs(*parts) if parts else np.ones(1)
    if total <= 0:
        return np.ones(1)
    # Both: the negative binomial with the same mean and variance, total + (sum m^2) / size
    # + total^2 / level_size + (sum m^2) / (size level_size) (law of total variance), as
    # one size S with total^2 / S the part beyond the Poisson. The mixture itself has no
    # closed form, and integrating the days' convolution over the multiplier costs tens of
    # milliseconds per instant; against that integral, this one's total variation distance
    # was 0.008-0.020 on the tests' cases (tests/stats/test_demand_spread.py).
    squares = float(np.sum(presence_k**2))
    beyond = squares / size + total**2 / level_size + squares / (size * level_size)
    return negative_binomial_pmf(total, total**2 / beyond)


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
    booked_pmfs = poisson_binomial_pmf(p_booked.reshape(-1, h.size))
    pmfs, arriving, arriving_mean = [], [], []
    for k in range(h.size):
        checkpoint()
        pmfs.append(booked_pmfs[k])
        by_name: dict[str, list[FloatArray]] = {}
        means: dict[str, float] = {}
        for stream, present in zip(streams, presence, strict=True):
            by_name.setdefault(stream.name, []).append(_stream_pmf(present[:, k], stream.size,
                                                                   stream.level_size))
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
                 p_grid: npt.ArrayLike | None = None,
                 passed: PassedOn | None = None, lost: Losses | None = None,
                 passed_limits: Sequence[int | None] | None = None) -> list[OccupancyDay]:
    """Add the current stays (Poisson-binomial) to the newcomers, instant by instant, and
    turn arrivals away at the ceiling: at the instant they come, by the paths ``draws``
    (:mod:`app.stats.loss`; ``p_grid`` the current stays on their grid, interpolated from
    ``p_current`` if None; ``lost`` those paths already followed, :func:`losses`), or
    without draws at the census instant (``_within_limit``).

    ``passed``: patients other units pass on (:mod:`app.stats.transfer_presence`); like
    current stays and bookings they are never turned away (a transfer waits in its unit),
    and they count in the ``emergency`` component. Without draws they take room from the
    arrivals at the census instant (``_within_limit``); with draws the paths do not follow
    them (a passed-on patient's presence rises and falls, which the paths' current stays
    cannot), so their count is added to the unit's corrected one: the arrivals turned away
    are those the unit's own patients alone would turn away, which understates the turning
    away when many transfers come in. ``passed_limits``: the ceiling the passed-on patients
    come in below at each instant (None: ``limits``; a unit may take them only below its
    staffed beds and its own emergencies one bed further)."""
    n_instants = len(others.booked)
    p_now = np.asarray(p_current, dtype=float).reshape(-1, n_instants)
    ceiling = [None] * n_instants if limits is None else list(limits)
    if len(ceiling) != n_instants:
        raise ValueError(f"limits: needs one per census instant ({n_instants}), "
                         f"got {len(ceiling)}")
    if lost is None and draws is not None and any(c is not None for c in ceiling):
        if p_grid is None:
            p_grid = interpolated_current(p_now, draws.grid[draws.census_index], draws.grid)
        lost = losses(draws, p_grid, ceiling)
    out = []
    current = poisson_binomial_pmf(p_now)          # every instant's at once: (K, stays + 1)
    for k in range(n_instants):
        checkpoint()
        fixed = convolve_pmfs(current[k], others.booked[k])
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
        passed_mean = None
        if passed is not None:
            passed_limit = limit if passed_limits is None else passed_limits[k]
            pmf, passed_mean = waiting_when_full(pmf, passed.pmf(k), passed_limit)
            components["emergency"] += passed_mean
        levels = np.atleast_1d(pmf_quantile(pmf, QUANTILE_LEVELS))
        quantiles = dict(zip((f"{q:g}" for q in QUANTILE_LEVELS), (int(v) for v in levels),
                             strict=True))
        bed_count = beds[k]
        over = None if bed_count is None else float(pmf_sf_over(pmf, bed_count))
        out.append(OccupancyDay(pmf=pmf, mean=pmf_mean(pmf), quantiles=quantiles,
                                p_over_capacity=over, components=components,
                                passed_mean=passed_mean))
    return out


def waiting_when_full(own: FloatArray, passed: FloatArray, limit: int | None
                      ) -> tuple[FloatArray, float]:
    """The count with patients passed on by other units added, and their expected number in.

    ``own``: the unit's count without them (its ceiling already applied to its arrivals);
    ``passed``: the count the senders would pass on by the census instant. A transfer is
    never turned away, but it waits in its unit while this one is at its ceiling (exit
    block): with A patients of its own and B passed on, A + min(B, (limit - A)+) are in.
    Without a ceiling, A + B."""
    a = np.asarray(own, dtype=float)
    b = np.asarray(passed, dtype=float)
    if limit is None:
        pmf = convolve_pmfs(a, b)
        return pmf, pmf_mean(b)
    count = np.flatnonzero(a > 0)
    room = np.maximum(int(limit) - count, 0)
    # (own count, passed-on count) pairs: min(B, room) of them are in.
    admitted = np.minimum(np.arange(b.size)[None, :], room[:, None])
    weight = a[count][:, None] * b[None, :]
    total: FloatArray = np.asarray(np.bincount(
        (count[:, None] + admitted).ravel(), weights=weight.ravel(),
        minlength=max(a.size + b.size - 1, 1)), dtype=float)
    expected = float((weight * admitted).sum())
    nonzero = np.flatnonzero(total > 0)
    total = total[: int(nonzero[-1]) + 1] if nonzero.size else np.ones(1)
    return total / total.sum(), expected


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


def day_to_json(day: OccupancyDay) -> Mapping[str, Any]:
    """The per-day numbers in the forecast JSON's shape (full precision, no rounding)."""
    return {"pmf": [float(v) for v in day.pmf], "mean": day.mean, "quantiles": day.quantiles,
            "p_over_capacity": day.p_over_capacity, "components": day.components}
