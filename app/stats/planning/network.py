"""Several units simulated together: routing between them and exit block.

The units
---------
Each :class:`NetworkUnit` has its beds (plus escalation beds opened when the staffed ones are
full), its external arrival streams (the one-unit model's :class:`DemandStream` and
:class:`ElectiveList`, drawn by :func:`app.stats.planning.draw_demand` with the same common
random numbers) and its patient groups with their stay distributions. A :class:`Transfer`
says that a patient leaving unit A goes on to unit B with a given probability (the same for
every patient of A, or one per patient group of A), and which of B's groups (and so which
stay distribution) the arriving patient draws from. Whatever probability is left over, the
patient leaves the network (home, died, a place not simulated).

What happens
------------
- An external arrival that finds every bed (staffed + escalation) of its unit taken is turned
  away, as in the one-unit loss system.
- A patient whose stay in A ends and who is routed to B moves at once if B has a free bed.
  Otherwise the patient waits in the bed in A ("blocking after service", exit block) and
  keeps it; patients waiting for B are served first come, first served when a bed in B frees,
  and the bed they leave in A goes at once to the first patient waiting for A, and so on.
  A freed bed always goes to a waiting transfer before any later external arrival.
- Two patients each waiting for the other's unit swap beds at once (a two-unit deadlock
  cannot form). Longer cycles of full units waiting on one another are not resolved: give
  one unit of such a cycle no bed limit, or expect a deadlocked run to show as long waits.

Measured per unit over the measured days (after warm-up), per replication
----------------------------------------------------------------------------
``mean_occupancy``
    Time-average beds held (patients in their stay plus patients waiting to move out).
``share_time_full``
    Share of time with every bed (staffed + escalation) held (finite beds only).
``arrivals_per_week``, ``turned_away_per_week``, ``share_turned_away``
    External arrivals offered, turned away, and their ratio.
``transfers_in_per_week``, ``transfers_out_per_week``
    Patients entering from / leaving to another simulated unit.
``waits_per_week``
    Transfers out of this unit that had to wait for a bed (step-down waits).
``waiting_bed_days_per_week``
    Bed-days of this unit held by patients waiting to move on (exit block).
``escalation_bed_days_per_week``
    Bed-days above the staffed beds (only with escalation beds).
``entries_per_day``, ``mean_time_in_unit``
    Patients entering the unit (external or transferred) per day, and their mean time in the
    unit in days, waiting to move out included (followed to their end, past the measured
    days). Little's law says ``mean_occupancy`` = ``entries_per_day`` x ``mean_time_in_unit``
    up to edge effects; the tests check it.

Waits (hours, of the transfers out that waited) are also kept one by one, for their median
and 90th centile. The census (beds held at each day's ``census_hour``, every unit at the same
instant) is kept per replication for the joint distribution.

Common random numbers
---------------------
External arrivals come from ``draw_demand`` with a per-unit seed (:func:`unit_seed`), so a
network with one unit and no routing replays exactly the one-unit simulation's demand with
that seed. Each external arrival k of unit A owns its row of uniforms for every later hop
(destination, group, stay), whichever unit it is in, so a different bed count changes only
who waits and who is turned away, not where patients go or how long they stay: differences
between bed counts are estimated from paired replications.

References
----------
Jackson JR (1957). Networks of waiting lines. Operations Research 5(4):518-521: with no bed
limits the mean number in each unit solves the traffic equations (cited from memory).
Little JDC (1961). A proof for the queuing formula L = lambda W. Operations Research
9(3):383-387 (cited from memory).
Law AM (2015). Simulation Modeling and Analysis, 5th ed.: independent replications, common
random numbers, paired t intervals (cited from memory).
"""

from __future__ import annotations

import bisect
import heapq
import math
from collections import deque
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from functools import lru_cache
from typing import Any

import numpy as np

from app.stats.cancel import checkpoint
from app.stats.planning.demand import _stay_table, draw_demand
from app.stats.planning.inputs import FloatArray, StayDistribution
from app.stats.planning.network_inputs import (
    NetworkInput,
    NetworkUnit,
    Transfer,
    _key,
    traffic_equations,
    unit_seed,
)
from app.stats.planning.simulation import Estimate, t_interval

__all__ = ["NetworkInput", "NetworkResult", "NetworkUnit", "Transfer", "simulate_network",
           "traffic_equations", "unit_seed"]

# Hops of one patient drawn in advance (row of uniforms per external arrival); a patient
# with more hops draws the rest from an overflow generator.
_HOPS = 6
_CHECK_EVERY = 4096
_ARRIVAL, _END = 0, 1

NETWORK_METRICS = (
    "mean_occupancy", "share_time_full", "arrivals_per_week", "turned_away_per_week",
    "share_turned_away", "transfers_in_per_week", "transfers_out_per_week", "waits_per_week",
    "waiting_bed_days_per_week", "escalation_bed_days_per_week", "entries_per_day",
    "mean_time_in_unit",
)


# -- one replication -----------------------------------------------------------------------------

class _Sampler:
    """Stay quantiles by bisection on the one-unit model's table (scalar, fast in Python)."""

    def __init__(self, stay: StayDistribution) -> None:
        x, neg_log_s, slope = _stay_table(stay)
        self.x = x.tolist()
        self.y = neg_log_s.tolist()
        self.slope = slope

    def __call__(self, survival: float) -> float:
        target = -math.log(max(survival, 1e-300))
        y, x = self.y, self.x
        if target >= y[-1]:
            return x[-1] + (target - y[-1]) * self.slope
        j = bisect.bisect_right(y, target)
        if j <= 0:
            return x[0]
        y0, y1 = y[j - 1], y[j]
        if y1 == y0:
            return x[j - 1]
        return x[j - 1] + (target - y0) / (y1 - y0) * (x[j] - x[j - 1])


@lru_cache(maxsize=256)
def _sampler(stay: StayDistribution) -> _Sampler:
    return _Sampler(stay)


@dataclass
class _Unit:
    cap: float
    beds: float
    held: int = 0
    blocked: int = 0  # patients in this unit waiting to move out
    queue: deque[tuple[int, int, float]] = field(default_factory=deque)  # (patient, from, since)
    last: float = 0.0
    area: float = 0.0
    area_full: float = 0.0
    area_blocked: float = 0.0
    area_escalation: float = 0.0


@dataclass
class _Rep:
    values: dict[str, dict[str, float]]
    waits: dict[str, FloatArray]
    census: np.ndarray


def _simulate_once(net: NetworkInput, replication: int) -> _Rep:
    units = net.units
    n_units = len(units)
    index = {u.name: i for i, u in enumerate(units)}
    start = float(net.resolved_warmup_days())
    end = start + net.days
    n_days = int(start) + net.days

    # External arrivals of every unit, and each patient's rows of uniforms.
    arrival_time: list[float] = []
    arrival_unit: list[int] = []
    arrival_stay: list[float] = []
    arrival_group: list[int] = []
    arrival_type: list[str] = []
    for i, unit in enumerate(units):
        inp = net._unit_input(unit)
        if inp is None:
            continue
        d = draw_demand(inp, replication)
        keep = d.time < n_days
        arrival_time += d.time[keep].tolist()
        arrival_unit += [i] * int(keep.sum())
        arrival_stay += d.stay[keep].tolist()
        arrival_group += d.group[keep].tolist()
        kinds = [s.admission_type for s in unit.streams]
        arrival_type += [kinds[k] for k in d.stream[keep].tolist()]
    n_patients = len(arrival_time)
    generator = np.random.Generator(np.random.PCG64(
        np.random.SeedSequence(net.seed, spawn_key=(replication, _key("network hops")))))
    hop_u = generator.random((n_patients, _HOPS, 3)).tolist()
    overflow = np.random.Generator(np.random.PCG64(
        np.random.SeedSequence(net.seed, spawn_key=(replication, _key("network overflow")))))

    # Routing tables: per unit and group, cumulative (target index, group weights).
    routes: list[list[list[tuple[float, int]]]] = []
    for unit in units:
        per_group = []
        out = [tr for tr in net.transfers if tr.source == unit.name]
        for g in unit.groups:
            acc, rows = 0.0, []
            for tr in out:
                acc += tr.share_for(g.name)
                rows.append((acc, index[tr.target]))
            per_group.append(rows)
        routes.append(per_group)
    entry_groups: dict[tuple[int, int], tuple[list[float], list[int]]] = {}
    for tr in net.transfers:
        receiver = net.unit(tr.target)
        cumulative = np.cumsum([w for _, w in tr.group_weights]).tolist()
        cumulative[-1] = 1.0
        entry_groups[(index[tr.source], index[tr.target])] = (
            cumulative, [receiver.group_index(n) for n, _ in tr.group_weights])
    samplers = [[_sampler(g.stay) for g in unit.groups] for unit in units]

    state = [_Unit(cap=math.inf if unit.capacity is None else float(unit.capacity),
                   beds=math.inf if unit.beds is None else float(unit.beds)) for unit in units]
    hop = [0] * n_patients
    group_of = list(arrival_group)
    entered = [0.0] * n_patients
    counts = {name: np.zeros(n_units) for name in (
        "arrivals", "turned_away", "transfers_in", "transfers_out", "waits", "entries")}
    time_in: list[list[float]] = [[] for _ in range(n_units)]
    waits: list[list[float]] = [[] for _ in range(n_units)]
    census_at = (np.arange(n_days) + net.census_hour / 24.0)
    census_at = census_at[(census_at >= start) & (census_at < end)].tolist()
    census = np.zeros((len(census_at), n_units), dtype=np.int64)
    census_next = 0

    def advance(i: int, t: float) -> None:
        s = state[i]
        a, b = max(s.last, start), min(t, end)
        if b > a:
            span = b - a
            s.area += s.held * span
            s.area_blocked += s.blocked * span
            if s.held >= s.cap:
                s.area_full += span
            if s.held > s.beds:
                s.area_escalation += (s.held - s.beds) * span
        s.last = t

    def uniforms(p: int) -> list[float]:
        k = hop[p]
        if k < _HOPS:
            row: list[float] = hop_u[p][k]
            return row
        return overflow.random(3).tolist()

    events: list[tuple[float, int, int, int]] = []  # (time, kind, patient, unit)
    for p in range(n_patients):
        events.append((arrival_time[p], _ARRIVAL, p, arrival_unit[p]))
    heapq.heapify(events)
    push, pop = heapq.heappush, heapq.heappop

    def begin(p: int, i: int, t: float, stay: float) -> None:
        """Patient p starts a stay in unit i (the bed is already counted)."""
        entered[p] = t
        if start <= t < end:
            counts["entries"][i] += 1
        push(events, (t + stay, _END, p, i))

    def left(p: int, i: int, t: float) -> None:
        if start <= entered[p] < end:
            time_in[i].append(t - entered[p])

    def hand_over(p: int, i: int, j: int, t: float, since: float | None) -> None:
        """Patient p's time in i ends (after waiting since ``since``, or none) and p starts
        a stay in j. Beds are counted by the caller."""
        if since is not None:
            advance(i, t)
            state[i].blocked -= 1
            if start <= t < end:
                counts["waits"][i] += 1
                waits[i].append((t - since) * 24.0)
        if start <= t < end:
            counts["transfers_out"][i] += 1
            counts["transfers_in"][j] += 1
        left(p, i, t)
        u = uniforms(p)
        cumulative, groups = entry_groups[(i, j)]
        g = groups[min(bisect.bisect_right(cumulative, u[1]), len(groups) - 1)]
        group_of[p] = g
        begin(p, j, t, samplers[j][g](1.0 - u[2]))

    def free_bed(i: int, t: float) -> None:
        """A bed in i frees: the first patient waiting for i takes it (freeing theirs)."""
        advance(i, t)
        s = state[i]
        s.held -= 1
        if s.queue:
            q, from_unit, since = s.queue.popleft()
            s.held += 1
            hand_over(q, from_unit, i, t, since)
            free_bed(from_unit, t)

    processed = 0
    while events:
        t, kind, p, i = pop(events)
        processed += 1
        if processed % _CHECK_EVERY == 0:
            checkpoint()
        while census_next < len(census_at) and census_at[census_next] <= t:
            census[census_next] = [s.held for s in state]
            census_next += 1
        s = state[i]
        if kind == _ARRIVAL:
            in_window = start <= t < end
            if in_window:
                counts["arrivals"][i] += 1
            if s.held >= s.cap:
                if in_window:
                    counts["turned_away"][i] += 1
                continue
            advance(i, t)
            s.held += 1
            begin(p, i, t, arrival_stay[p])
            continue
        # The end of p's stay in unit i: where next?
        hop[p] += 1
        u = uniforms(p)
        target = next((j for acc, j in routes[i][group_of[p]] if u[0] < acc), -1)
        if target < 0:
            left(p, i, t)
            free_bed(i, t)
            continue
        r = state[target]
        if r.held < r.cap:
            advance(target, t)
            r.held += 1
            hand_over(p, i, target, t, None)
            free_bed(i, t)
            continue
        # Exit block. A patient of the target waiting for a bed in i swaps beds with p.
        swap = next((k for k, (_, f, _) in enumerate(s.queue) if f == target), None)
        if swap is not None:
            q, _, since = s.queue[swap]
            del s.queue[swap]
            hand_over(q, target, i, t, since)
            hand_over(p, i, target, t, None)
            continue
        advance(i, t)
        s.blocked += 1
        r.queue.append((p, i, t))

    for i in range(n_units):
        advance(i, end)
    weeks = net.days / 7.0
    values: dict[str, dict[str, float]] = {}
    for i, unit in enumerate(units):
        s = state[i]
        arrived = counts["arrivals"][i]
        v = {
            "mean_occupancy": s.area / net.days,
            "share_time_full": s.area_full / net.days if unit.capacity is not None else 0.0,
            "arrivals_per_week": arrived / weeks,
            "turned_away_per_week": counts["turned_away"][i] / weeks,
            "share_turned_away": counts["turned_away"][i] / arrived if arrived else 0.0,
            "transfers_in_per_week": counts["transfers_in"][i] / weeks,
            "transfers_out_per_week": counts["transfers_out"][i] / weeks,
            "waits_per_week": counts["waits"][i] / weeks,
            "waiting_bed_days_per_week": s.area_blocked / weeks,
            "escalation_bed_days_per_week": s.area_escalation / weeks,
            "entries_per_day": counts["entries"][i] / net.days,
            "mean_time_in_unit": float(np.mean(time_in[i])) if time_in[i] else 0.0,
        }
        values[unit.name] = {k: float(x) for k, x in v.items()}
    return _Rep(values=values,
                waits={unit.name: np.asarray(waits[i], dtype=float)
                       for i, unit in enumerate(units)},
                census=census)


# -- results -------------------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class NetworkResult:
    """Every replication's figures per unit, waits one by one, and the census.

    Attributes
    ----------
    units : tuple of str
    beds : mapping of str to int or None
        Staffed beds simulated per unit.
    days, warmup_days, replications : int
    values : mapping unit -> metric -> tuple of float (one per replication)
    waits : mapping unit -> tuple of arrays (hours, one array per replication)
    census : tuple of arrays, shape (census instants, units), one per replication
    """

    units: tuple[str, ...]
    beds: Mapping[str, int | None]
    days: int
    warmup_days: int
    replications: int
    values: Mapping[str, Mapping[str, tuple[float, ...]]]
    waits: Mapping[str, tuple[FloatArray, ...]]
    census: tuple[np.ndarray, ...]

    def estimate(self, unit: str, metric: str, level: float = 0.95) -> Estimate:
        """Mean over replications with a Student-t interval."""
        return t_interval(self.values[unit][metric], level)

    def wait_hours(self, unit: str, q: float) -> float | None:
        """Quantile ``q`` of the waits (hours) of transfers out of ``unit`` that waited,
        pooled over replications; None when nobody waited."""
        pooled = np.concatenate(self.waits[unit]) if self.waits[unit] else np.zeros(0)
        return float(np.quantile(pooled, q)) if pooled.size else None

    def difference(self, other: NetworkResult, unit: str, metric: str,
                   level: float = 0.95) -> Estimate:
        """``other`` minus this, paired by replication (the same seed: common random
        numbers), with a t interval of the differences."""
        if other.replications != self.replications:
            raise ValueError("other: needs the same replications to pair")
        a = np.asarray(self.values[unit][metric])
        b = np.asarray(other.values[unit][metric])
        return t_interval(b - a, level)

    def summary(self, level: float = 0.95) -> dict[str, Any]:
        """JSON-ready: per unit, each metric's mean and interval, and the wait centiles."""
        out: dict[str, Any] = {}
        for u in self.units:
            row: dict[str, Any] = {"beds": self.beds[u]}
            for m in NETWORK_METRICS:
                e = self.estimate(u, m, level)
                row[m] = {"mean": e.mean, "ci_low": e.ci_low, "ci_high": e.ci_high}
            row["wait_median_hours"] = self.wait_hours(u, 0.5)
            row["wait_p90_hours"] = self.wait_hours(u, 0.9)
            out[u] = row
        return out


def simulate_network(net: NetworkInput, *,
                     progress: Callable[[int, int], None] | None = None) -> NetworkResult:
    """Run ``net.replications`` independent replications of the network.

    Parameters
    ----------
    net : NetworkInput
    progress : callable, optional
        ``progress(done, total)`` after each replication.

    Returns
    -------
    NetworkResult
    """
    reps = []
    for r in range(net.replications):
        checkpoint()
        reps.append(_simulate_once(net, r))
        if progress is not None:
            progress(r + 1, net.replications)
    names = net.names()
    return NetworkResult(
        units=names,
        beds={u.name: u.beds for u in net.units},
        days=net.days, warmup_days=net.resolved_warmup_days(), replications=net.replications,
        values={u: {m: tuple(rep.values[u][m] for rep in reps) for m in NETWORK_METRICS}
                for u in names},
        waits={u: tuple(rep.waits[u] for rep in reps) for u in names},
        census=tuple(rep.census for rep in reps))
