"""One replication's demand: arrival instants, groups and stays (common random numbers)."""

from __future__ import annotations

import math
import zlib
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
import numpy.typing as npt
from scipy import stats

from app.stats.cancel import checkpoint
from app.stats.planning.inputs import (
    DemandStream,
    ElectiveList,
    FloatArray,
    PlanningInput,
    StayDistribution,
)

IntArray = npt.NDArray[np.int64]
# Stay quantile table on [0, x_max], x_max where S(x) first drops below exp(_LOG_TAIL).
_STAY_GRID_POINTS = 8193
_LOG_TAIL = math.log(1e-12)
# Purposes of the generators of one stream in one replication (part of the seed key).
_COUNT, _HOUR, _GROUP, _STAY, _CANCEL, _BOOKED = range(6)


@dataclass(frozen=True, eq=False)
class Demand:
    """The arrivals of one replication, sorted by time (before any bed is refused).

    Attributes
    ----------
    time : ndarray of float, shape (n,)
        Arrival times in days from the start of the warm-up.
    stay : ndarray of float, shape (n,)
        Stay in days, if admitted.
    stream : ndarray of int, shape (n,)
        Index of the arrival's stream in ``PlanningInput.streams``.
    group : ndarray of int, shape (n,)
        Index of the arrival's group in ``PlanningInput.groups``.
    n_days : int
        Days simulated (warm-up plus measured).
    """

    time: FloatArray
    stay: FloatArray
    stream: IntArray
    group: IntArray
    n_days: int

    def counts_by_day(self, stream: int | None = None) -> IntArray:
        """Arrivals on each day 0..n_days-1 (of one stream, or of all)."""
        mask = slice(None) if stream is None else self.stream == stream
        days = np.floor(self.time[mask]).astype(np.int64)
        return np.bincount(days, minlength=self.n_days).astype(np.int64)


def _key(text: str) -> int:
    return zlib.crc32(text.encode("utf-8"))


def _generator(
    inp: PlanningInput, replication: int, name: str, purpose: int
) -> np.random.Generator:
    sequence = np.random.SeedSequence(inp.seed, spawn_key=(replication, _key(name), purpose))
    return np.random.Generator(np.random.PCG64(sequence))


@lru_cache(maxsize=256)
def _stay_table(stay: StayDistribution) -> tuple[FloatArray, FloatArray, float]:
    """Grid x_j and -log S(x_j), increasing, and the tail slope (days per unit of -log S).

    A quantile is read off by linear interpolation of x against -log S: exact for an
    exponential, and every phase-type tail is asymptotically exponential, so interpolation in
    log S (not S) keeps the far tail right too.
    """
    x_max = stay.mean()
    while float(stay.logsf(x_max)) > _LOG_TAIL:
        x_max *= 2.0
    # Uniform points for the body and tail, geometric ones near 0 where S is flat (an Erlang's
    # -log S grows like x^k there, which a uniform grid would interpolate too coarsely).
    x = np.unique(
        np.r_[
            np.linspace(0.0, x_max, _STAY_GRID_POINTS),
            np.geomspace(x_max * 1e-8, x_max, _STAY_GRID_POINTS // 2),
        ]
    )
    neg_log_s = -np.asarray(stay.logsf(x), dtype=float)
    neg_log_s[0] = 0.0
    # Round-off near x = 0 can make -log S dip by 1e-16; np.interp needs it non-decreasing.
    neg_log_s = np.maximum.accumulate(neg_log_s)
    slope = (x[-1] - x[-2]) / max(neg_log_s[-1] - neg_log_s[-2], 1e-300)
    return x, neg_log_s, float(slope)


def _stay_quantile(stay: StayDistribution, survival: FloatArray) -> FloatArray:
    """Stays x with S(x) = survival (survival in (0, 1]): inverse-CDF sampling."""
    x, neg_log_s, slope = _stay_table(stay)
    target = -np.log(survival)
    out = np.interp(target, neg_log_s, x)
    beyond = target > neg_log_s[-1]
    out[beyond] = x[-1] + (target[beyond] - neg_log_s[-1]) * slope
    return out


def _clock_time(profile: tuple[float, ...] | None, u: FloatArray) -> FloatArray:
    """Time within the day (fraction of a day) from uniforms, by the hour profile."""
    if profile is None:
        return u
    cumulative = np.cumsum(profile)
    cumulative[-1] = 1.0
    hour = np.minimum(np.searchsorted(cumulative, u, side="right"), 23)
    start = np.where(hour > 0, cumulative[hour - 1], 0.0)
    within = np.clip((u - start) / np.asarray(profile)[hour], 0.0, 1.0 - 1e-12)
    return (hour + within) / 24.0


def _daily_counts(
    stream: DemandStream | ElectiveList,
    inp: PlanningInput,
    replication: int,
    weekday: IntArray,
) -> tuple[IntArray, npt.NDArray[np.bool_] | None]:
    """Arrivals per day, and for an elective list which booked slots go ahead (K x days)."""
    n_days = weekday.size
    if isinstance(stream, DemandStream):
        mean = np.asarray(stream.rate_by_weekday)[weekday]
        # Inverse-CDF counts: a higher rate gives at least as many arrivals from the same u.
        u = np.maximum(_generator(inp, replication, stream.name, _COUNT).random(n_days), 1e-300)
        if stream.dispersion is None:
            counts = stats.poisson.ppf(u, mean)
        else:
            size = stream.dispersion
            counts = stats.nbinom.ppf(u, size, size / (size + mean))
        return counts.astype(np.int64), None
    booked = np.asarray(stream.booked_by_weekday)[weekday]
    whole = np.floor(booked)
    extra = _generator(inp, replication, stream.name, _BOOKED).random(n_days) < booked - whole
    n_booked = (whole + extra).astype(np.int64)
    slots = int(n_booked.max(initial=0))
    goes_ahead = (
        _generator(inp, replication, stream.name, _CANCEL).random((slots, n_days))
        >= stream.cancellation
    )
    booked_slot = np.arange(slots)[:, None] < n_booked[None, :]
    return n_booked, goes_ahead & booked_slot


def draw_demand(inp: PlanningInput, replication: int) -> Demand:
    """Draw one replication's arrivals, groups and stays (see "Common random numbers").

    Parameters
    ----------
    inp : PlanningInput
    replication : int
        0-based replication number (part of the random-number key).

    Returns
    -------
    Demand
        Over warm-up plus measured days, sorted by arrival time.
    """
    n_days = inp.resolved_warmup_days() + inp.days
    weekday = (inp.start_weekday + np.arange(n_days)) % 7
    group_index = {g.name: i for i, g in enumerate(inp.groups)}
    times, stays, streams, groups = [], [], [], []
    for s_index, stream in enumerate(inp.streams):
        checkpoint()
        counts, present = _daily_counts(stream, inp, replication, weekday)
        slots = int(counts.max(initial=0))
        if present is None:
            present = np.arange(slots)[:, None] < counts[None, :]
        # One row of uniforms per slot k (k-th arrival of each day), drawn row by row, so the
        # rows a smaller count uses are the same whatever the largest count is.
        hour_u = _generator(inp, replication, stream.name, _HOUR).random((slots, n_days))
        group_u = _generator(inp, replication, stream.name, _GROUP).random((slots, n_days))
        stay_u = 1.0 - _generator(inp, replication, stream.name, _STAY).random((slots, n_days))
        day = np.broadcast_to(np.arange(n_days, dtype=float), (slots, n_days))[present]
        time = day + _clock_time(stream.hour_profile, hour_u[present])
        names = [n for n, _ in stream.group_weights]
        cumulative = np.cumsum([w for _, w in stream.group_weights])
        cumulative[-1] = 1.0
        choice = np.minimum(
            np.searchsorted(cumulative, group_u[present], side="right"), len(names) - 1
        )
        survival = stay_u[present]
        stay = np.empty(time.size)
        group = np.empty(time.size, dtype=np.int64)
        for j, name in enumerate(names):
            chosen = choice == j
            stay[chosen] = _stay_quantile(inp.groups[group_index[name]].stay, survival[chosen])
            group[chosen] = group_index[name]
        times.append(time)
        stays.append(stay)
        streams.append(np.full(time.size, s_index, dtype=np.int64))
        groups.append(group)
    time_all = np.concatenate(times)
    order = np.argsort(time_all, kind="stable")
    return Demand(
        time=time_all[order],
        stay=np.concatenate(stays)[order],
        stream=np.concatenate(streams)[order],
        group=np.concatenate(groups)[order],
        n_days=n_days,
    )
