"""The planning report of a unit: beds against risk, beds needed, and what-if scenarios.

One function, :func:`run_plan`, serves the command line (``morrow plan``) and the planning
page, so both show the same numbers for the same settings. It simulates, on the demand of the
unit's trained model (``app.forecast.planning_inputs``):

1. the capacity curve: for each bed count, the share of arrivals finding no bed, the mean
   occupancy and the share of days on which someone found no bed, with confidence intervals
   from independent replications, beside the Erlang loss formula at the same offered load;
2. beds needed: the smallest bed count whose simulated share finding no bed is under the
   target (and the cautious count whose upper confidence bound is), beside Erlang's answer;
3. each scenario against the current state at the same bed count (paired replications), and
   the beds each scenario would need.

Scenarios are built here from plain words and numbers (:func:`arrivals_scenario` and its
siblings), with errors that name the choices, so the command line and the page parse alike.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import pandas as pd

from app import bounds
from app.forecast.planning_inputs import UnitDemand
from app.stats.erlang import erlang_b
from app.stats.planning import (
    WEEKDAYS,
    DemandStream,
    ElectiveList,
    PlanningInput,
    beds_needed,
    capacity_curve,
)
from app.stats.planning_scenarios import (
    MoveElectives,
    MoveGroupShare,
    ScaleArrivals,
    ScaleStay,
    Scenario,
    compare,
)

__all__ = ["METRICS", "PlanSettings", "arrivals_scenario", "electives_scenario", "parse_weekday",
           "run_plan", "share_scenario", "stay_scenario"]

# The figures reported for each bed count and each scenario, in report order.
METRICS = ("share_turned_away", "mean_occupancy", "occupancy_rate", "share_days_turning_away")
CURRENT = "current state"
Progress = Callable[[str, int, int], None]
_DAY_NAMES = ("monday", "tuesday", "wednesday", "thursday", "friday", "saturday", "sunday")


@dataclass(frozen=True)
class PlanSettings:
    """How much to simulate and what to aim at.

    Attributes
    ----------
    target : float
        Largest acceptable share of arrivals finding no bed, in (0, 1).
    days : int
        Days simulated per replication (after the warm-up).
    replications : int
        Independent replications (>= 2).
    seed : int
    beds : tuple of int, optional
        Bed counts of the curve; None: the engine's default range around the offered load.
    compare_at : int, optional
        Beds at which scenarios are compared; None: the staffed beds (or, with no bed plan,
        the beds needed).
    level : float
        Confidence level of the intervals.
    """

    target: float = 0.05
    days: int = 730
    replications: int = 20
    seed: int = 0
    beds: tuple[int, ...] | None = None
    compare_at: int | None = None
    level: float = 0.95

    def __post_init__(self) -> None:
        if not (math.isfinite(self.target) and 0 < self.target < 1):
            raise ValueError(f"target: must be between 0 and 1 (e.g. 0.05), got {self.target!r}")
        bounds.check_plan_days(self.days)
        bounds.check_whole(self.replications, "replications", bounds.MIN_PLAN_REPLICATIONS,
                           bounds.MAX_PLAN_REPLICATIONS)
        bounds.check_whole(self.seed, "seed", 0, bounds.MAX_SEED)
        if self.beds is not None:
            if not self.beds:
                raise ValueError("beds: give at least one bed count")
            for count in (min(self.beds), max(self.beds)):
                bounds.check_whole(count, "beds", 1, bounds.MAX_BEDS)
        if self.compare_at is not None:
            bounds.check_whole(self.compare_at, "compare at", 1, bounds.MAX_BEDS)


# ---------------------------------------------------------------------------------------------
# Scenarios in words
# ---------------------------------------------------------------------------------------------


def _percent_change(factor: float) -> str:
    change = round((factor - 1.0) * 100.0, 1)
    return f"{abs(change):g}% {'more' if change > 0 else 'fewer'}"


def arrivals_scenario(demand: UnitDemand, what: str, factor: float) -> Scenario:
    """More or fewer arrivals: ``what`` is an admission type (emergency, elective), a stream
    name, or ``all``; ``factor`` 1.1 means 10% more."""
    types = set(demand.baseline.admission_types())
    streams = {s.name for s in demand.baseline.streams}
    bounds.check_arrivals_factor(factor)
    if what == "all":
        change = ScaleArrivals(factor)
        label = "admissions"
    elif what in types:
        change = ScaleArrivals(factor, admission_type=what)
        label = f"{what} admissions"
    elif what in streams:
        change = ScaleArrivals(factor, stream=what)
        label = what
    else:
        choices = ", ".join(sorted(types | streams | {"all"}))
        raise ValueError(f"no arrivals called {what!r}; choose from: {choices}")
    name = f"{label} unchanged" if factor == 1 else f"{_percent_change(factor)} {label}"
    return Scenario(name, (change,))


def _group(demand: UnitDemand, name: str) -> str:
    if name == "longest":
        return demand.longest_group()
    if name in demand.group_rules:
        return name
    choices = "; ".join(demand.group_label(g) for g in demand.group_rules)
    raise ValueError(f"no patient group {name!r}; groups are {choices} (or 'longest')")


def stay_scenario(demand: UnitDemand, group: str, factor: float) -> Scenario:
    """Every stay of ``group`` (``G1``... or ``longest``) times ``factor`` (0.8: 20% shorter)."""
    name = _group(demand, group)
    bounds.check_stay_factor(factor)
    change = round(abs(factor - 1.0) * 100.0, 1)
    words = "unchanged" if change == 0 else f"{change:g}% {'longer' if factor > 1 else 'shorter'}"
    return Scenario(f"stays in {name} {words}", (ScaleStay(name, factor),))


def share_scenario(demand: UnitDemand, from_group: str, to_group: str, share: float
                   ) -> Scenario:
    """A share of ``from_group``'s arrivals moved to ``to_group`` (for example earlier
    treatment making patients less ill)."""
    source, target = _group(demand, from_group), _group(demand, to_group)
    if source == target:
        raise ValueError(f"move patients between two different groups, got {source} twice")
    bounds.check_share(share)
    return Scenario(f"{share:.0%} of {source} patients as {target}",
                    (MoveGroupShare(source, target, share),))


def parse_weekday(text: str) -> int:
    """0 (Monday) .. 6 from 'Mon', 'monday', 'fr' (two letters or more) or '0'..'6'."""
    value = text.strip().lower()
    if value.isdigit() and 0 <= int(value) <= 6:
        return int(value)
    matches = [i for i, day in enumerate(_DAY_NAMES) if len(value) >= 2 and day.startswith(value)]
    if len(matches) != 1:
        raise ValueError(f"{text!r} is not a weekday (Mon, Tue, Wed, Thu, Fri, Sat, Sun)")
    return matches[0]


def electives_scenario(demand: UnitDemand, from_day: int, to_day: int, share: float
                       ) -> Scenario:
    """A share of one weekday's booked operations moved to another weekday."""
    if not any(isinstance(s, ElectiveList) or s.admission_type == "elective"
               for s in demand.baseline.streams):
        raise ValueError(f"unit {demand.unit} has no elective admissions to move")
    if from_day == to_day:
        raise ValueError(f"move electives between two different weekdays, got "
                         f"{WEEKDAYS[from_day]} twice")
    bounds.check_share(share)
    return Scenario(f"{share:.0%} of {WEEKDAYS[from_day]} electives on {WEEKDAYS[to_day]}",
                    (MoveElectives(from_day, to_day, share),))


# ---------------------------------------------------------------------------------------------
# The report
# ---------------------------------------------------------------------------------------------


def _clipped(metric: str, low: float, high: float) -> tuple[float, float]:
    """A t interval kept within what the figure can be: shares in [0, 1], beds >= 0 (with
    few replications and a share near 0 the symmetric interval would dip below it)."""
    top = math.inf if metric == "mean_occupancy" else 1.0
    return max(low, 0.0), min(high, top)


def _estimate(frame_row: pd.Series, name: str) -> dict[str, float]:
    low, high = _clipped(name, float(frame_row[f"{name}_low"]), float(frame_row[f"{name}_high"]))
    return {"mean": float(frame_row[name]), "ci_low": low, "ci_high": high}


def _curve_rows(curve_frame: pd.DataFrame) -> list[dict[str, Any]]:
    rows = []
    for _, row in curve_frame.iterrows():
        entry: dict[str, Any] = {"beds": int(row["beds"]), "erlang_b": float(row["erlang_b"])}
        for metric in METRICS:
            entry[metric] = _estimate(row, metric)
        rows.append(entry)
    return rows


def _scenario_rows(frame: pd.DataFrame, needed: dict[str, dict[str, Any]]
                   ) -> list[dict[str, Any]]:
    out = []
    for name, part in frame.groupby("scenario", sort=False):
        by_metric = part.set_index("metric")
        entry: dict[str, Any] = {
            "name": str(name), "description": str(part["description"].iloc[0]),
            "beds": int(by_metric.loc["beds", "mean"]),
            "offered_load": float(by_metric.loc["offered_load", "mean"]),
            "beds_needed": needed[str(name)], "metrics": {}}
        for metric in METRICS:
            r = by_metric.loc[metric]
            entry["metrics"][metric] = {k: float(r[k]) for k in (
                "mean", "ci_low", "ci_high", "difference", "difference_low", "difference_high")}
            low, high = _clipped(metric, float(r["ci_low"]), float(r["ci_high"]))
            entry["metrics"][metric].update(ci_low=low, ci_high=high)
        out.append(entry)
    return out


def run_plan(demand: UnitDemand, settings: PlanSettings, scenarios: Sequence[Scenario] = (), *,
             progress: Progress | None = None) -> dict[str, Any]:
    """Simulate the capacity curve, beds needed and scenarios; a JSON-ready report.

    Parameters
    ----------
    demand : UnitDemand
        The unit's planning input (``unit_planning_input``).
    settings : PlanSettings
    scenarios : sequence of Scenario
        Compared with the current state at ``settings.compare_at`` beds.
    progress : callable, optional
        ``progress(stage, done, total)`` as the work goes on.

    Returns
    -------
    dict
        ``unit``, ``model``, ``settings`` (as run, with the warm-up), ``demand`` (streams,
        groups, offered load), ``staffed_beds``, ``curve`` (one row per bed count),
        ``beds_needed`` (simulation, cautious, Erlang), ``compare_at``, ``scenarios`` (the
        current state first) and ``seconds``.
    """
    clock = time.perf_counter()
    names = [CURRENT] + [s.name for s in scenarios]
    if len(set(names)) != len(names):
        raise ValueError(f"scenarios: each needs its own name, got {names!r}")
    base = demand.baseline.replace(days=settings.days, replications=settings.replications,
                                   seed=settings.seed)

    def report(stage: str) -> Callable[[int, int], None] | None:
        if progress is None:
            return None
        return lambda done, total: progress(stage, done, total)

    curve = capacity_curve(base, settings.beds, progress=report("beds against risk"))
    needed = {CURRENT: _needed(base, settings)}
    for done, scenario in enumerate(scenarios, start=1):
        needed[scenario.name] = _needed(scenario.apply(base), settings)
        if progress is not None:
            progress("beds needed in each scenario", done, len(scenarios))
    compare_at = settings.compare_at or demand.staffed_beds or needed[CURRENT]["simulation"]
    frame = compare(base.replace(beds=compare_at), scenarios, baseline_name=CURRENT,
                    level=settings.level, progress=report("scenarios"))
    return {
        "unit": demand.unit,
        "model": {"id": demand.model_id, "trained_until": demand.trained_until.isoformat()},
        "settings": {"target": settings.target, "days": settings.days,
                     "years": settings.days / 365.0, "replications": settings.replications,
                     "seed": settings.seed, "level": settings.level,
                     "warmup_days": base.resolved_warmup_days()},
        "demand": {"offered_load": base.offered_load(),
                   "arrivals_per_day": base.daily_arrivals(),
                   "streams": _json_streams(demand), "groups": demand.groups_table(),
                   "elective_window": (None if demand.elective_window is None else
                                       [d.isoformat() for d in demand.elective_window])},
        "staffed_beds": demand.staffed_beds,
        "curve": _curve_rows(curve.to_frame(settings.level)),
        "beds_needed": needed[CURRENT],
        "compare_at": compare_at,
        "scenarios": _scenario_rows(frame, needed),
        "seconds": time.perf_counter() - clock,
    }


def _needed(inp: PlanningInput, settings: PlanSettings) -> dict[str, Any]:
    answer = beds_needed(inp, settings.target, level=settings.level)
    return {"simulation": answer.beds, "simulation_confident": answer.beds_confident,
            "erlang": answer.erlang_beds,
            # Erlang's share at the simulated answer: how far the formula's assumptions
            # (flat Poisson arrivals) are from the unit's demand.
            "erlang_b_at_simulation": erlang_b(answer.beds, answer.offered_load)}


def _json_streams(demand: UnitDemand) -> list[dict[str, Any]]:
    rows = demand.streams_table()
    for row, stream in zip(rows, demand.baseline.streams, strict=True):
        row["kind"] = "booked list" if isinstance(stream, ElectiveList) else (
            "negative binomial" if isinstance(stream, DemandStream) and stream.dispersion
            else "Poisson")
    return rows
