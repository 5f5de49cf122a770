"""The loss system: who finds a bed, one replication's measures, results over replications."""

from __future__ import annotations

import heapq
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from itertools import islice
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd
from scipy import stats

from app.stats.cancel import checkpoint
from app.stats.planning.demand import Demand, IntArray, draw_demand
from app.stats.planning.inputs import FloatArray, PlanningInput

# The loss system's loop calls the caller's cancellation check once per this many arrivals
# (about 10 ms of work; app.stats.cancel).
_CHECK_EVERY = 16384


def _turned_away(time: list[float], leave: list[float], beds: int) -> list[int]:
    """Indices of arrivals that find all ``beds`` occupied (arrivals in time order).

    A heap of the admitted patients' leaving times; O(n log beds). A patient leaving at the
    very instant of an arrival frees the bed for it.
    """
    if len(time) != len(leave):
        raise ValueError(f"time and leave differ in length: {len(time)} and {len(leave)}")
    occupied: list[float] = []
    refused: list[int] = []
    push, pop = heapq.heappush, heapq.heappop
    arrivals = enumerate(zip(time, leave))  # noqa: B905 (lengths checked above)
    # In chunks, so the caller's cancellation check stays out of the per-arrival loop.
    for _ in range(0, len(time), _CHECK_EVERY):
        checkpoint()
        for i, (t, d) in islice(arrivals, _CHECK_EVERY):
            while occupied and occupied[0] <= t:
                pop(occupied)
            if len(occupied) < beds:
                push(occupied, d)
            else:
                refused.append(i)
    return refused


@dataclass(frozen=True)
class _Prepared:
    demand: Demand
    leave: FloatArray
    time_list: list[float] = field(repr=False)
    leave_list: list[float] = field(repr=False)


def _prepare(demand: Demand) -> _Prepared:
    leave = demand.time + demand.stay
    return _Prepared(demand, leave, demand.time.tolist(), leave.tolist())


def _measure(
    inp: PlanningInput, prepared: _Prepared, beds: int | None
) -> tuple[dict[str, float], IntArray]:
    """One replication's figures for one bed count, and its census counts."""
    checkpoint()
    demand = prepared.demand
    admitted = np.ones(demand.time.size, dtype=bool)
    if beds is not None:
        admitted[_turned_away(prepared.time_list, prepared.leave_list, beds)] = False
    start = float(inp.resolved_warmup_days())
    end = start + inp.days
    in_window = (demand.time >= start) & (demand.time < end)
    arrived = int(in_window.sum())
    refused = in_window & ~admitted

    came_in = demand.time[admitted]
    went_out = prepared.leave[admitted]
    overlap = np.clip(np.minimum(went_out, end) - np.maximum(came_in, start), 0.0, None)
    census_at = start + np.arange(inp.days) + inp.census_hour / 24.0
    census = np.searchsorted(came_in, census_at, side="right") - np.searchsorted(
        np.sort(went_out), census_at, side="right"
    )
    refused_days = np.unique(np.floor(demand.time[refused] - start)).size

    values: dict[str, float] = {"mean_occupancy": float(overlap.sum() / inp.days)}
    if beds is not None:
        values["occupancy_rate"] = values["mean_occupancy"] / beds
    values["mean_census"] = float(census.mean())
    values["arrivals_per_day"] = arrived / inp.days
    if beds is None:
        # Nobody is turned away without a bed limit: the refusal figures would be zeros.
        return values, census.astype(np.int64)
    values["share_turned_away"] = float(refused.sum() / arrived) if arrived else 0.0
    stream_type = np.asarray([s.admission_type for s in inp.streams], dtype=object)
    arrival_type = stream_type[demand.stream]
    for kind in inp.admission_types():
        of_kind = in_window & (arrival_type == kind)
        n_kind = int(of_kind.sum())
        values[f"share_turned_away_{kind}"] = (
            float((of_kind & refused).sum() / n_kind) if n_kind else 0.0
        )
    values["share_days_turning_away"] = refused_days / inp.days
    values["share_days_full_at_census"] = float(np.mean(census >= beds))
    values["turned_away_per_day"] = float(refused.sum()) / inp.days
    return values, census.astype(np.int64)


@dataclass(frozen=True)
class Estimate:
    """A mean over replications and its confidence interval.

    Attributes
    ----------
    mean : float
    ci_low, ci_high : float
        Student-t interval mean -/+ t_{(1+level)/2, n-1} s / sqrt(n).
    level : float
    n : int
        Replications.
    """

    mean: float
    ci_low: float
    ci_high: float
    level: float
    n: int

    def contains(self, value: float) -> bool:
        """Whether ``value`` lies in the interval (inclusive)."""
        return self.ci_low <= value <= self.ci_high

    @property
    def half_width(self) -> float:
        """Half the interval's width."""
        return (self.ci_high - self.ci_low) / 2.0


def t_interval(values: npt.ArrayLike, level: float = 0.95) -> Estimate:
    """Mean of independent replications with a Student-t confidence interval.

    Parameters
    ----------
    values : array_like, shape (n,)
        One figure per replication, n >= 2.
    level : float, default 0.95

    Returns
    -------
    Estimate
    """
    x = np.asarray(values, dtype=float).reshape(-1)
    if x.size < 2:
        raise ValueError(f"values: needs at least 2 replications, got {x.size}")
    if not np.all(np.isfinite(x)):
        raise ValueError("values: must be finite")
    if not 0 < level < 1:
        raise ValueError(f"level: must be in (0, 1), got {level!r}")
    mean = float(x.mean())
    half = float(stats.t.ppf(0.5 + level / 2.0, x.size - 1) * x.std(ddof=1) / math.sqrt(x.size))
    return Estimate(mean=mean, ci_low=mean - half, ci_high=mean + half, level=level, n=x.size)


@dataclass(frozen=True, eq=False)
class PlanningResult:
    """Figures of every replication of one simulation, and their summaries.

    Attributes
    ----------
    beds : int or None
        Beds simulated (None: no limit).
    days, warmup_days, replications : int
    offered_load : float
        Expected arrivals per day x mean stay (Erlangs), from the input.
    values : mapping of str to tuple of float
        Metric name -> one value per replication (the names are in the module docstring).
    census_counts : tuple of tuple of int
        Per replication, the number of census instants at which k beds were occupied, k = 0..K
        (K the largest seen in any replication, or ``beds``).
    """

    beds: int | None
    days: int
    warmup_days: int
    replications: int
    offered_load: float
    values: Mapping[str, tuple[float, ...]]
    census_counts: tuple[tuple[int, ...], ...]

    @property
    def metrics(self) -> tuple[str, ...]:
        """Metric names, in report order."""
        return tuple(self.values)

    def estimate(self, metric: str, level: float = 0.95) -> Estimate:
        """Mean and confidence interval of ``metric`` over the replications."""
        if metric not in self.values:
            raise ValueError(f"metric: unknown {metric!r}; known are {self.metrics!r}")
        return t_interval(self.values[metric], level)

    def summary(self, level: float = 0.95) -> pd.DataFrame:
        """One row per metric: metric, mean, ci_low, ci_high."""
        rows = []
        for name in self.metrics:
            e = self.estimate(name, level)
            rows.append({"metric": name, "mean": e.mean, "ci_low": e.ci_low, "ci_high": e.ci_high})
        return pd.DataFrame(rows, columns=["metric", "mean", "ci_low", "ci_high"])

    def occupancy_pmf(self) -> FloatArray:
        """Share of census instants with k beds occupied, k = 0..K, pooled over replications."""
        counts = np.asarray(self.census_counts, dtype=float)
        return counts.sum(axis=0) / counts.sum()

    def occupancy_table(self, level: float = 0.95) -> pd.DataFrame:
        """The census distribution with a t interval per k: census, share, ci_low, ci_high."""
        counts = np.asarray(self.census_counts, dtype=float)
        shares = counts / counts.sum(axis=1, keepdims=True)
        rows = []
        for k in range(shares.shape[1]):
            e = t_interval(shares[:, k], level)
            rows.append({"census": k, "share": e.mean, "ci_low": max(e.ci_low, 0.0),
                         "ci_high": min(e.ci_high, 1.0)})
        return pd.DataFrame(rows, columns=["census", "share", "ci_low", "ci_high"])

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict; exact round trip with :meth:`from_dict`."""
        return {
            "beds": self.beds,
            "days": self.days,
            "warmup_days": self.warmup_days,
            "replications": self.replications,
            "offered_load": self.offered_load,
            "values": {k: list(v) for k, v in self.values.items()},
            "census_counts": [list(c) for c in self.census_counts],
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> PlanningResult:
        """Inverse of :meth:`to_dict`."""
        return cls(
            beds=None if data["beds"] is None else int(data["beds"]),
            days=int(data["days"]),
            warmup_days=int(data["warmup_days"]),
            replications=int(data["replications"]),
            offered_load=float(data["offered_load"]),
            values={str(k): tuple(float(x) for x in v) for k, v in data["values"].items()},
            census_counts=tuple(tuple(int(x) for x in c) for c in data["census_counts"]),
        )


def _collect(
    inp: PlanningInput,
    beds: int | None,
    per_replication: Sequence[tuple[dict[str, float], IntArray]],
) -> PlanningResult:
    names = list(per_replication[0][0])
    values = {n: tuple(float(v[n]) for v, _ in per_replication) for n in names}
    width = max(int(c.max(initial=0)) for _, c in per_replication) + 1
    if beds is not None:
        width = max(width, beds + 1)
    counts = tuple(
        tuple(int(x) for x in np.bincount(c, minlength=width)) for _, c in per_replication
    )
    return PlanningResult(
        beds=beds,
        days=inp.days,
        warmup_days=inp.resolved_warmup_days(),
        replications=inp.replications,
        offered_load=inp.offered_load(),
        values=values,
        census_counts=counts,
    )


def _prepared_demands(inp: PlanningInput) -> list[_Prepared]:
    return [_prepare(draw_demand(inp, r)) for r in range(inp.replications)]


def simulate(inp: PlanningInput) -> PlanningResult:
    """Simulate the unit ``inp.replications`` times and collect the figures.

    Parameters
    ----------
    inp : PlanningInput
        ``inp.beds`` None simulates no bed limit (offered occupancy).

    Returns
    -------
    PlanningResult
    """
    demands = _prepared_demands(inp)
    return _collect(inp, inp.beds, [_measure(inp, d, inp.beds) for d in demands])
