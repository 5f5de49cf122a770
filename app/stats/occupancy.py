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

Times are in days after ``as_of``. Arrivals are placed at the midpoints of their slots in both
the exact and the simulated forms, so the two describe the same model.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np
import numpy.typing as npt

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
           "simulate_paths", "stream_presence", "with_current"]


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
    """

    name: str
    slot_at: tuple[float, ...]
    slot_mean: tuple[float, ...]
    slot_day: tuple[int, ...]
    size: float | None
    stay: Any


@dataclass(frozen=True)
class BookedAdmissions:
    """Known bookings: each goes ahead with ``p_go``, admitted ``admit_at`` days after as_of."""

    p_go: tuple[float, ...]
    admit_at: tuple[float, ...]
    stays: tuple[Any, ...]

    def p_present(self, census_at: FloatArray) -> FloatArray:
        """(bookings, instants) probability each booking's patient is in at each instant."""
        out = np.zeros((len(self.p_go), census_at.size))
        # Bookings of one patient group share a distribution: one sf call per group.
        by_stay: dict[int, list[int]] = {}
        for j, stay in enumerate(self.stays):
            by_stay.setdefault(id(stay), []).append(j)
        for rows in by_stay.values():
            stay = self.stays[rows[0]]
            lags = census_at[None, :] - np.asarray(self.admit_at, dtype=float)[rows][:, None]
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
    lags = census_at[None, :] - at[:, None]
    before = lags > 0
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
    scores come in and only redoes the current patients' part.
    """

    pmfs: tuple[FloatArray, ...]
    components: tuple[dict[str, float], ...]


def newcomers(booked: BookedAdmissions, streams: Sequence[ArrivalStream],
              census_at: npt.ArrayLike) -> Newcomers:
    """The exact occupancy distribution of bookings and arrival streams at each instant."""
    h = np.asarray(census_at, dtype=float)
    p_booked = booked.p_present(h)
    presence = [stream_presence(s, h) for s in streams]
    pmfs, components = [], []
    for k in range(h.size):
        parts = [poisson_binomial_pmf(p_booked[:, k])]
        counts = {"emergency": 0.0, "elective": float(p_booked[:, k].sum())}
        for stream, present in zip(streams, presence, strict=True):
            parts.append(_stream_pmf(present[:, k], stream.size))
            counts[stream.name] += float(present[:, k].sum())
        pmfs.append(convolve_pmfs(*parts))
        components.append(counts)
    return Newcomers(tuple(pmfs), tuple(components))


def occupancy_days(
    p_current: npt.ArrayLike,
    booked: BookedAdmissions,
    streams: Sequence[ArrivalStream],
    census_at: npt.ArrayLike,
    beds: Sequence[int | None],
) -> list[OccupancyDay]:
    """Exact occupancy distribution at each census instant.

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

    Returns
    -------
    list of OccupancyDay
    """
    return with_current(p_current, newcomers(booked, streams, census_at), beds)


def with_current(p_current: npt.ArrayLike, others: Newcomers,
                 beds: Sequence[int | None]) -> list[OccupancyDay]:
    """Add the current stays (Poisson-binomial) to the newcomers, instant by instant."""
    n_instants = len(others.pmfs)
    p_now = np.asarray(p_current, dtype=float).reshape(-1, n_instants)
    out = []
    for k in range(n_instants):
        pmf = convolve_pmfs(poisson_binomial_pmf(p_now[:, k]), others.pmfs[k])
        components = {"current": float(p_now[:, k].sum()), **others.components[k]}
        quantiles = dict(zip((f"{q:g}" for q in QUANTILE_LEVELS),
                             (int(v) for v in pmf_quantile(pmf, QUANTILE_LEVELS)), strict=True))
        over = None if beds[k] is None else float(pmf_sf_over(pmf, beds[k]))
        out.append(OccupancyDay(pmf=pmf, mean=pmf_mean(pmf), quantiles=quantiles,
                                p_over_capacity=over, components=components))
    return out


@dataclass(frozen=True, eq=False)
class PathDraws:
    """The random part of ``n_paths`` joint paths that does not depend on current patients'
    probabilities: one uniform per path and current stay, and the newcomers' counts."""

    stay_draws: FloatArray
    newcomer_counts: npt.NDArray[np.int64]

    def counts(self, p_current: npt.ArrayLike) -> npt.NDArray[np.int64]:
        """Occupancy along every path, shape (n_paths, K): current stays and newcomers."""
        counts = self.newcomer_counts.copy()
        p_now = np.asarray(p_current, dtype=float).reshape(-1, counts.shape[1])
        if p_now.shape[0] != self.stay_draws.shape[1]:
            raise ValueError(f"p_current: drawn for {self.stay_draws.shape[1]} stays, "
                             f"got {p_now.shape[0]}")
        for k in range(counts.shape[1]):
            counts[:, k] += (self.stay_draws < p_now[:, k]).sum(axis=1)
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
    for g, a, stay in zip(booked.p_go, booked.admit_at, booked.stays, strict=True):
        goes = rng.random(n_paths) < g
        length = np.asarray(stay.sample(n_paths, rng), dtype=float)
        counts += (goes[:, None] & (h[None, :] >= a) & (h[None, :] < a + length[:, None]))
    for stream in streams:
        _add_stream_paths(counts, stream, h, rng)
    return PathDraws(stay_draws, counts)


def simulate_paths(
    p_current: npt.ArrayLike,
    booked: BookedAdmissions,
    streams: Sequence[ArrivalStream],
    census_at: npt.ArrayLike,
    n_paths: int,
    rng: np.random.Generator,
) -> npt.NDArray[np.int64]:
    """Occupancy at every instant along ``n_paths`` joint paths; shape (n_paths, K)."""
    h = np.asarray(census_at, dtype=float)
    p_now = np.asarray(p_current, dtype=float).reshape(-1, h.size)
    return draw_paths(p_now.shape[0], booked, streams, h, n_paths, rng).counts(p_now)


def _add_stream_paths(counts: npt.NDArray[np.int64], stream: ArrivalStream, h: FloatArray,
                      rng: np.random.Generator) -> None:
    at = np.asarray(stream.slot_at, dtype=float)
    mean = np.asarray(stream.slot_mean, dtype=float)
    day = np.asarray(stream.slot_day, dtype=int)
    n_paths = counts.shape[0]
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
        path = np.repeat(np.arange(n_paths), n)
        arrive = at[slots][rng.choice(slots.size, size=total, p=mean[slots] / day_mean)]
        length = np.asarray(stream.stay.sample(total, rng), dtype=float)
        present = (h[None, :] > arrive[:, None]) & (h[None, :] < arrive[:, None] + length[:, None])
        np.add.at(counts, path, present.astype(np.int64))


def day_to_json(day: OccupancyDay) -> Mapping[str, Any]:
    """The per-day numbers in the forecast JSON's shape (full precision, no rounding)."""
    return {"pmf": [float(v) for v in day.pmf], "mean": day.mean, "quantiles": day.quantiles,
            "p_over_capacity": day.p_over_capacity, "components": day.components}
