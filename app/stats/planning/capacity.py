"""Beds against demand: capacity curves, beds needed for a target, demand for an occupancy."""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import pandas as pd

from app.stats.erlang import beds_for_blocking, erlang_b, mean_occupancy
from app.stats.planning.demand import draw_demand
from app.stats.planning.inputs import PlanningInput, scale_arrivals
from app.stats.planning.simulation import (
    Estimate,
    PlanningResult,
    _collect,
    _measure,
    _prepare,
    _prepared_demands,
    simulate,
)


@dataclass(frozen=True, eq=False)
class CapacityCurve:
    """Simulated figures for a range of bed counts, on the same demand.

    Attributes
    ----------
    offered_load : float
        Erlangs.
    results : tuple of PlanningResult
        One per bed count, increasing.
    """

    offered_load: float
    results: tuple[PlanningResult, ...]

    @property
    def beds(self) -> tuple[int, ...]:
        """Bed counts, increasing."""
        return tuple(int(r.beds) for r in self.results if r.beds is not None)

    def result(self, beds: int) -> PlanningResult:
        """The result for ``beds`` beds."""
        for r in self.results:
            if r.beds == beds:
                return r
        raise ValueError(f"beds: {beds!r} is not on the curve ({self.beds!r})")

    def to_frame(self, level: float = 0.95) -> pd.DataFrame:
        """One row per bed count, for the planning plot.

        Columns: beds; for share_turned_away, mean_occupancy, occupancy_rate and
        share_days_turning_away the mean and ``_low`` / ``_high`` interval bounds; erlang_b
        (the Erlang loss formula at the offered load, for comparison).
        """
        rows = []
        for r in self.results:
            assert r.beds is not None
            row: dict[str, float] = {"beds": r.beds}
            for name in ("share_turned_away", "mean_occupancy", "occupancy_rate",
                         "share_days_turning_away"):
                e = r.estimate(name, level)
                row[name], row[f"{name}_low"], row[f"{name}_high"] = e.mean, e.ci_low, e.ci_high
            row["erlang_b"] = erlang_b(r.beds, self.offered_load)
            rows.append(row)
        return pd.DataFrame(rows)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict; exact round trip with :meth:`from_dict`."""
        return {"offered_load": self.offered_load, "results": [r.to_dict() for r in self.results]}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> CapacityCurve:
        """Inverse of :meth:`to_dict`."""
        return cls(
            offered_load=float(data["offered_load"]),
            results=tuple(PlanningResult.from_dict(r) for r in data["results"]),
        )


def _default_bed_range(inp: PlanningInput) -> range:
    load = inp.offered_load()
    low = max(1, math.floor(0.6 * load))
    high = max(low + 1, beds_for_blocking(load, 1e-3) + 2)
    return range(low, high + 1)


def capacity_curve(
    inp: PlanningInput,
    beds: Iterable[int] | None = None,
    *,
    progress: Callable[[int, int], None] | None = None,
) -> CapacityCurve:
    """Simulate every bed count in ``beds`` on the same demand (common random numbers).

    Parameters
    ----------
    inp : PlanningInput
        ``inp.beds`` is ignored.
    beds : iterable of int, optional
        Bed counts (>= 1). Default: from 60% of the offered load up to two beds past the
        Erlang loss formula's count for 0.1% turned away.
    progress : callable, optional
        Called as ``progress(done, total)`` after each replication's demand is drawn and each
        bed count is measured (for a progress bar on long runs).

    Returns
    -------
    CapacityCurve
    """
    counts = sorted({int(b) for b in (_default_bed_range(inp) if beds is None else beds)})
    if not counts or counts[0] < 1:
        raise ValueError(f"beds: needs bed counts >= 1, got {counts!r}")
    total = inp.replications + len(counts)
    demands = []
    for r in range(inp.replications):
        demands.append(_prepare(draw_demand(inp, r)))
        if progress is not None:
            progress(r + 1, total)
    results = []
    for i, c in enumerate(counts):
        results.append(_collect(inp, c, [_measure(inp, d, c) for d in demands]))
        if progress is not None:
            progress(inp.replications + i + 1, total)
    return CapacityCurve(offered_load=inp.offered_load(), results=tuple(results))


@dataclass(frozen=True, eq=False)
class BedsNeeded:
    """The smallest bed count that keeps the share turned away under a target.

    Attributes
    ----------
    target : float
        Largest acceptable share of arrivals finding no bed.
    beds : int
        Smallest bed count whose simulated mean share turned away is <= target, as is every
        larger count on the curve.
    beds_confident : int
        Smallest bed count whose upper confidence bound is <= target (the cautious answer).
    erlang_beds : int
        The Erlang loss formula's answer for the same offered load (Poisson arrivals at a flat
        rate); a weekday pattern, booked lists and overdispersion usually need more.
    offered_load : float
    curve : CapacityCurve
        Every bed count simulated in the search.
    level : float
        Confidence level of ``beds_confident``.
    """

    target: float
    beds: int
    beds_confident: int
    erlang_beds: int
    offered_load: float
    curve: CapacityCurve
    level: float

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict; exact round trip with :meth:`from_dict`."""
        return {
            "target": self.target,
            "beds": self.beds,
            "beds_confident": self.beds_confident,
            "erlang_beds": self.erlang_beds,
            "offered_load": self.offered_load,
            "curve": self.curve.to_dict(),
            "level": self.level,
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> BedsNeeded:
        """Inverse of :meth:`to_dict`."""
        return cls(
            target=float(data["target"]),
            beds=int(data["beds"]),
            beds_confident=int(data["beds_confident"]),
            erlang_beds=int(data["erlang_beds"]),
            offered_load=float(data["offered_load"]),
            curve=CapacityCurve.from_dict(data["curve"]),
            level=float(data["level"]),
        )


def beds_needed(
    inp: PlanningInput,
    target: float = 0.05,
    *,
    level: float = 0.95,
    max_beds: int | None = None,
) -> BedsNeeded:
    """Smallest bed count whose share of arrivals finding no bed is at most ``target``.

    Starts at the Erlang loss formula's answer and walks down while the simulated share stays
    under the target, then up until both the mean and the upper confidence bound are under
    it. Every bed count is simulated on the same demand (common random numbers), so the
    curve is smooth and the search needs few steps.

    Parameters
    ----------
    inp : PlanningInput
        ``inp.beds`` is ignored.
    target : float, default 0.05
        In (0, 1).
    level : float, default 0.95
        Confidence level for ``beds_confident``.
    max_beds : int, optional
        Search limit (default: four times the Erlang answer plus 20); exceeding it raises.

    Returns
    -------
    BedsNeeded
    """
    if not (math.isfinite(target) and 0 < target < 1):
        raise ValueError(f"target: must be in (0, 1), got {target!r}")
    load = inp.offered_load()
    erlang_beds = beds_for_blocking(load, target)
    limit = 4 * erlang_beds + 20 if max_beds is None else int(max_beds)
    demands = _prepared_demands(inp)
    done: dict[int, PlanningResult] = {}

    def share(c: int) -> Estimate:
        if c not in done:
            done[c] = _collect(inp, c, [_measure(inp, d, c) for d in demands])
        return done[c].estimate("share_turned_away", level)

    c = max(1, erlang_beds)
    while c > 1 and share(c).mean <= target:
        c -= 1
    while share(c).mean > target or share(c).ci_high > target:
        c += 1
        if c > limit:
            raise ValueError(
                f"max_beds: more than {limit} beds needed for target={target!r} "
                f"(offered load {load:.3g} Erlangs)"
            )
    counts = sorted(done)
    curve = CapacityCurve(offered_load=load, results=tuple(done[b] for b in counts))
    under = [share(b).mean <= target for b in counts]
    under_ci = [share(b).ci_high <= target for b in counts]
    return BedsNeeded(
        target=float(target),
        beds=_first_of_tail(counts, under),
        beds_confident=_first_of_tail(counts, under_ci),
        erlang_beds=erlang_beds,
        offered_load=load,
        curve=curve,
        level=level,
    )


def _first_of_tail(counts: Sequence[int], ok: Sequence[bool]) -> int:
    """The smallest count from which every larger count is ok (the last one is ok)."""
    first = counts[-1]
    for c, good in zip(reversed(counts), reversed(ok), strict=True):
        if not good:
            break
        first = c
    return first


def demand_scale_for_occupancy(
    inp: PlanningInput,
    target: float,
    *,
    admission_type: str | None = None,
    tolerance: float = 0.002,
    max_iterations: int = 30,
) -> float:
    """The factor on arrival rates that makes the simulated occupancy rate equal ``target``.

    For example, the demand a unit of ``inp.beds`` beds carries at 85% mean occupancy. Solved
    by the Illinois variant of regula falsi on the simulated occupancy rate (common random
    numbers make it a smooth, increasing function of the factor), started from the Erlang loss
    formula's answer.

    Parameters
    ----------
    inp : PlanningInput
        Needs ``beds``.
    target : float
        Mean occupancy rate in (0, 1).
    admission_type : str, optional
        Scale only the streams of this type (rates, or booked lists); default all.
    tolerance : float, default 0.002
        Stop when the simulated occupancy rate is within this of ``target``.
    max_iterations : int, default 30

    Returns
    -------
    float
        The factor; apply it with :func:`scale_arrivals` (or a ``ScaleArrivals`` scenario).
    """
    if inp.beds is None:
        raise ValueError("inp: beds must be set to aim at an occupancy rate")
    if not (math.isfinite(target) and 0 < target < 1):
        raise ValueError(f"target: must be in (0, 1), got {target!r}")
    beds = int(inp.beds)

    def occupancy(factor: float) -> float:
        scaled = scale_arrivals(inp, factor, admission_type=admission_type)
        return simulate(scaled).estimate("occupancy_rate").mean - target

    load = inp.offered_load()
    if admission_type is None:
        scaled_part = load
    else:
        scaled_part = sum(
            s.expected_by_weekday().mean() * inp.mean_stay(s)
            for s in inp.streams
            if s.admission_type == admission_type
        )
        if scaled_part == 0:
            raise ValueError(f"admission_type: no stream of type {admission_type!r}")
    # Erlang: the offered load whose carried load is target * beds (mean_occupancy increases
    # in the load up to 1, so bisection on the load finds it).
    lo_load, hi_load = 0.0, float(beds)
    while mean_occupancy(beds, hi_load) < target:
        hi_load *= 2.0
    for _ in range(100):
        mid = (lo_load + hi_load) / 2.0
        lo_load, hi_load = (mid, hi_load) if mean_occupancy(beds, mid) < target else (lo_load, mid)
    guess = max((lo_load - (load - scaled_part)) / scaled_part, 1e-3)

    a, fa = guess, occupancy(guess)
    if abs(fa) <= tolerance:
        return a
    b = a * (1.1 if fa < 0 else 0.9)
    fb = occupancy(b)
    widenings = 0
    while fa * fb > 0:  # widen until the target is bracketed
        widenings += 1
        if widenings > max_iterations:
            raise ValueError(f"target: occupancy {target!r} not bracketed by arrival factors "
                             f"up to {b!r}")
        a, fa = b, fb
        b = b * (1.25 if fb < 0 else 0.8)
        fb = occupancy(b)
    for _ in range(max_iterations):
        c = (a * fb - b * fa) / (fb - fa)
        fc = occupancy(c)
        if abs(fc) <= tolerance:
            return c
        if fc * fb < 0:
            a, fa = b, fb
        else:
            # Illinois step: halve the kept end's value so regula falsi cannot stall on it.
            fa = fa / 2.0
        b, fb = c, fc
    raise ValueError(
        f"target: occupancy {target!r} not reached within {max_iterations} iterations"
    )
