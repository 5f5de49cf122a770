"""Joint occupancy paths over the week, from the same inputs as the exact pmfs
(:mod:`app.stats.occupancy`): the questions about several nights together ("more patients
than beds on any night this week").

Every current stay, booking and arrival keeps one uniform draw U for the week and is present
at census instant h_k while U is below its chance of still being in then (p_i(h_k), or the
stay's survival since its arrival): the inverse transform, so a stay's nights are consistent
and no stay length has to be sampled. Under a ceiling, arrivals that would take a path over
it at a census instant are turned away there, the latest first, and stay away; then
:func:`with_exact_marginals` gives each night the exact per-night pmf.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from app.stats.cancel import checkpoint
from app.stats.occupancy import ArrivalStream, BookedAdmissions, FloatArray, _sf_once
from app.stats.poisson_binomial import pmf_quantile

__all__ = ["PathDraws", "any_night_over", "draw_paths", "simulate_paths",
           "with_exact_marginals"]


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
        # A stay is longer than a lag exactly when its survival uniform is below sf(lag):
        # one uniform per path stands for the whole stay (inverse transform, no sampling).
        survival = _sf_once(stay, np.maximum(booked_lags[j], 0.0)[None, :])[0]
        counts += (goes[:, None] & (h[None, :] >= a)
                   & (rng.random(n_paths)[:, None] < survival[None, :]))
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


def any_night_over(counts: npt.NDArray[np.int64], pmfs: Sequence[FloatArray],
                   tie_break: FloatArray, beds: Sequence[int]) -> float:
    """The chance of more patients than ``beds`` on at least one census night: the share of
    paths over on some night, once each night's counts follow that night's exact pmf
    (:func:`with_exact_marginals`)."""
    sims = with_exact_marginals(counts, pmfs, tie_break)
    return float(np.mean((sims > np.asarray(beds)[None, :]).any(axis=1)))


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
    # Each arrival's stay outlasts a lag exactly when its survival uniform is below the stay's
    # sf there (the inverse transform): sf once per slot and instant, no stay sampled.
    survival = _sf_once(stream.stay, np.maximum(lags, 0.0)) if at.size else lags
    paths, times, present = [], [], []
    shared = (np.ones(n_paths) if stream.level_size is None
              else rng.gamma(stream.level_size, 1.0 / stream.level_size, size=n_paths))
    for d in np.unique(day):
        slots = np.flatnonzero(day == d)
        day_mean = mean[slots].sum()
        if day_mean <= 0:
            continue
        rate = day_mean * shared
        if stream.size is not None:
            rate = rate * rng.gamma(stream.size, 1.0 / stream.size, size=n_paths)
        n = rng.poisson(rate)
        total = int(n.sum())
        if total == 0:
            continue
        slot = slots[rng.choice(slots.size, size=total, p=mean[slots] / day_mean)]
        arrive = at[slot]
        u = rng.random(total)
        paths.append(np.repeat(np.arange(n_paths), n))
        times.append(arrive)
        present.append((h[None, :] > arrive[:, None]) & (u[:, None] < survival[slot]))
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
