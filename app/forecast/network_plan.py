"""Planning units together: their demand, the routing between them, and the report.

Serves ``morrow plan --units A,B`` and the planning page's section on units together, so both
show the same numbers. Everything comes from each unit's trained model and what was known at
its cut-off (``app.forecast.planning_inputs``), plus:

Routing
    The chance that a patient leaving unit A goes on to unit B, per admission group of A:
    from A's routing model (``app.forecast.routing``) when its model has one. For a model
    trained before routing existed, the share of A's stays discharged in the year before the
    cut-off whose ``to_unit`` is B (one share for every group; the report says which source
    was used).
Transfers in
    A receiving unit's model keeps the patients passed on from each other unit as a stream of
    their own (``app.forecast.planning_inputs.transfer_streams``); for a sender planned
    together with it that stream is dropped, as its patients now arrive by routing. A model
    trained before transfers were kept apart counts them among its emergency admissions: that
    stream is then scaled down by the share of the unit's emergency admissions in the year
    before the cut-off whose ``from_unit`` is such a sender (the report gives it). Transferred
    patients draw their stays
    from the receiving unit's groups as its own stays that came from the sender fell among
    them (the receiving model's routing, ``received_groups``), else by its emergency group
    shares.

Known limit: the sending unit's stays were learnt from history, in which a patient waiting
for a ward bed stayed on, so its stays already hold some waiting; the simulation adds its own
waiting on top. The absolute queue is therefore somewhat overstated; the change with more
beds (the question asked) is less affected.
"""

from __future__ import annotations

import dataclasses
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any
from zoneinfo import ZoneInfo

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from app import bounds
from app.forecast.planning_inputs import (
    EMERGENCY_STREAM,
    TRANSFER_STREAM,
    UnitDemand,
    unit_planning_input,
)
from app.forecast.service import model_for
from app.stats.planning import DemandStream, ElectiveList
from app.stats.planning.network import (
    NETWORK_METRICS,
    NetworkInput,
    NetworkResult,
    NetworkUnit,
    Transfer,
    simulate_network,
)
from app.store.models import Stay

__all__ = ["CURVE_EXTRA", "NetworkDemand", "NetworkSettings", "network_demand",
           "run_network_plan"]

ROUTING_WINDOW_DAYS = 365
# Extra beds of the curve (waiting against beds): none to four more.
CURVE_EXTRA = (0, 1, 2, 3, 4)
# Figures compared before and after, per unit.
CHANGE_METRICS = ("waiting_bed_days_per_week", "waits_per_week", "turned_away_per_week",
                  "mean_occupancy", "share_time_full")
Progress = Callable[[str, int, int], None]


class NetworkPlanError(ValueError):
    """A plan for units together that cannot be made as asked; the message is for the user."""


@dataclass(frozen=True, eq=False)
class NetworkDemand:
    """The units' planning inputs, the routes between them and where each came from.

    Attributes
    ----------
    demands : tuple of UnitDemand
        One per unit, in the order asked for.
    network : NetworkInput
        The units at their staffed beds, the transfers, external streams scaled down by
        ``transfers_removed``.
    routes : list of dict
        source, target, share, share_by_group, source_of_shares ("routing model" or
        "to_unit counts").
    transfers_removed : mapping of str to float
        Per unit: the share of its emergency admissions that came from the other units
        (taken out of its external emergency stream).
    """

    demands: tuple[UnitDemand, ...]
    network: NetworkInput
    routes: list[dict[str, Any]]
    transfers_removed: Mapping[str, float]

    def demand(self, unit: str) -> UnitDemand:
        for d in self.demands:
            if d.unit == unit:
                return d
        raise NetworkPlanError(f"unit {unit!r} is not among {self.network.names()!r}")


def _group_names(record_payload: Mapping[str, Any]) -> dict[int, str]:
    """Admission group node -> G1, G2, ... as ``app.forecast.planning_inputs`` names them."""
    from app.forecast.los import LosModel

    los = LosModel.from_payload(record_payload)
    return {g.node: f"G{i}" for i, g in enumerate(los.groups.groups, start=1)}


def _model_routing(payload: Mapping[str, Any], names: Mapping[int, str], target: str
                   ) -> tuple[float, tuple[tuple[str, float], ...]] | None:
    """(overall share, per-group shares) to ``target`` from the unit's routing model, or None
    when the model has none (trained before routing existed, or the module is absent)."""
    try:
        from app.forecast.routing import Routing
    except ImportError:  # pragma: no cover - the routing module is part of the tree
        return None
    routing = Routing.from_payload(payload)
    if routing is None:
        return None
    overall = float(routing.shares_for(None).get(target, 0.0))
    by_group = tuple((name, float(routing.shares_for(node).get(target, 0.0)))
                     for node, name in names.items())
    return overall, by_group


def _counted_share(session: Session, source: str, target: str, until: datetime) -> float:
    """Share of ``source``'s stays discharged in the year before ``until`` that went to
    ``target`` (``to_unit``)."""
    since = until - timedelta(days=ROUTING_WINDOW_DAYS)
    ended = (Stay.unit == source) & (Stay.discharged_at.is_not(None)) & \
        (Stay.discharged_at > since) & (Stay.discharged_at <= until)
    total = session.scalar(select(func.count()).select_from(Stay).where(ended)) or 0
    if not total:
        return 0.0
    moved = session.scalar(select(func.count()).select_from(Stay).where(
        ended & (Stay.to_unit == target))) or 0
    return float(moved) / float(total)


def _share_from_units(session: Session, unit: str, others: Sequence[str], until: datetime
                      ) -> float:
    """Share of ``unit``'s emergency admissions in the year before ``until`` that came from
    one of ``others`` (``from_unit``)."""
    since = until - timedelta(days=ROUTING_WINDOW_DAYS)
    came = (Stay.unit == unit) & (Stay.admission_type == "emergency") & \
        (Stay.admitted_at > since) & (Stay.admitted_at <= until)
    total = session.scalar(select(func.count()).select_from(Stay).where(came)) or 0
    if not total or not others:
        return 0.0
    moved = session.scalar(select(func.count()).select_from(Stay).where(
        came & Stay.from_unit.in_(list(others)))) or 0
    return float(moved) / float(total)


def _entry_weights(demand: UnitDemand, payload: Mapping[str, Any], names: Mapping[int, str],
                   sender: str) -> tuple[tuple[tuple[str, float], ...], str]:
    """Group shares of patients transferred into the unit from ``sender``, and their source:
    where the unit's own stays from ``sender`` fell among its groups (its routing model's
    ``received_groups``), else its emergency stream's shares."""
    try:
        from app.forecast.routing import Routing
    except ImportError:  # pragma: no cover - the routing module is part of the tree
        Routing = None  # type: ignore[assignment,misc]  # noqa: N806
    routing = None if Routing is None else Routing.from_payload(payload)
    if routing is not None:
        found = routing.received_groups(sender)
        weights = tuple((names[node], w) for node, w in found.items() if node in names and w > 0)
        if weights:
            return weights, "stays that came from " + sender
    return _emergency_weights(demand), "emergency admissions"


def _emergency_weights(demand: UnitDemand) -> tuple[tuple[str, float], ...]:
    streams = demand.baseline.streams
    for s in streams:
        if s.name == EMERGENCY_STREAM:
            return s.group_weights
    return streams[0].group_weights if streams else ((demand.baseline.groups[0].name, 1.0),)


def _scaled(stream: DemandStream | ElectiveList, factor: float) -> DemandStream | ElectiveList:
    if isinstance(stream, DemandStream) and stream.name == EMERGENCY_STREAM:
        return dataclasses.replace(stream,
                                   rate_by_weekday=tuple(v * factor
                                                         for v in stream.rate_by_weekday))
    return stream


def network_demand(session: Session, units: Sequence[str], as_of: datetime, tz: ZoneInfo, *,
                   days: int = 365, replications: int = 10, seed: int = 0) -> NetworkDemand:
    """The planning input of ``units`` together, from their newest models usable at ``as_of``.

    Raises ``NoModel`` for a unit without a model and :class:`NetworkPlanError` for a unit
    without a bed plan (the plan needs each unit's beds).
    """
    names = list(units)
    bounds.check_whole(len(names), "units", 1, bounds.MAX_NETWORK_UNITS)
    if len(set(names)) != len(names):
        raise NetworkPlanError(f"units: each unit once, got {names!r}")
    records = {u: model_for(session, u, as_of) for u in names}
    demands = [unit_planning_input(session, u, as_of, tz, days=days, replications=replications,
                                   seed=seed, record=records[u]) for u in names]
    for d in demands:
        if d.staffed_beds is None:
            raise NetworkPlanError(f"{d.unit} has no staffed beds in its bed plan today; "
                                   "import a bed plan first")
    group_names = {u: _group_names(records[u].payload) for u in names}
    routes: list[dict[str, Any]] = []
    transfers: list[Transfer] = []
    for source in names:
        until = records[source].trained_until
        for target, t_demand in zip(names, demands, strict=True):
            if target == source:
                continue
            learnt = _model_routing(records[source].payload, group_names[source], target)
            if learnt is not None:
                share, by_group = learnt
                origin = "routing model"
            else:
                share, by_group = _counted_share(session, source, target, until), ()
                origin = "to_unit counts"
            if share <= 0 and not any(p > 0 for _, p in by_group):
                continue
            weights, stays_from = _entry_weights(t_demand, records[target].payload,
                                                 group_names[target], source)
            transfers.append(Transfer(source, target, share, weights,
                                      share_by_group=by_group))
            routes.append({"source": source, "target": target, "share": share,
                           "share_by_group": dict(by_group), "source_of_shares": origin,
                           "trained_until": until.isoformat(),
                           "stays_in_target": {"groups": dict(weights), "from": stays_from}})
    removed = {}
    network_units = []
    for u, d in zip(names, demands, strict=True):
        senders = [r["source"] for r in routes if r["target"] == u]
        # The senders' patients now come by routing: their own streams go, and a model that
        # still counted them among its emergency admissions has that stream scaled down.
        apart = set(records[u].payload["arrivals"]["emergency"].get("not_from", ()))
        routed = {f"{TRANSFER_STREAM} {s}" for s in senders}
        removed[u] = _share_from_units(session, u, [s for s in senders if s not in apart],
                                       records[u].trained_until)
        streams = tuple(_scaled(s, 1.0 - removed[u]) for s in d.baseline.streams
                        if s.name not in routed)
        network_units.append(NetworkUnit(u, d.baseline.groups, streams, beds=d.staffed_beds))
    census = demands[0].baseline.census_hour
    network = NetworkInput(tuple(network_units), tuple(transfers), days=days,
                           replications=replications, seed=seed, census_hour=census,
                           start_weekday=demands[0].baseline.start_weekday)
    return NetworkDemand(tuple(demands), network, routes, removed)


@dataclass(frozen=True)
class NetworkSettings:
    """How much to simulate, which beds change, and whose extra beds make the curve.

    Attributes
    ----------
    days, replications, seed, level
        As for the one-unit plan (same bounds).
    changes : tuple of (unit, int)
        Staffed beds added (or, negative, taken away) per unit for the "after" run.
    vary : str or None
        The unit whose extra beds 0..4 make the curve (default: the first changed unit).
    """

    days: int = 365
    replications: int = 10
    seed: int = 0
    changes: tuple[tuple[str, int], ...] = ()
    vary: str | None = None
    level: float = 0.95

    def __post_init__(self) -> None:
        bounds.check_plan_days(self.days)
        bounds.check_whole(self.replications, "replications", bounds.MIN_PLAN_REPLICATIONS,
                           bounds.MAX_PLAN_REPLICATIONS)
        bounds.check_whole(self.seed, "seed", 0, bounds.MAX_SEED)
        for unit, change in self.changes:
            bounds.check_bed_change(change, f"beds {unit}")
        units = [u for u, _ in self.changes]
        if len(set(units)) != len(units):
            raise NetworkPlanError(f"beds: one change per unit, got {units!r}")


def _estimate(e: Any) -> dict[str, float]:
    return {"mean": e.mean, "ci_low": e.ci_low, "ci_high": e.ci_high}


def run_network_plan(demand: NetworkDemand, settings: NetworkSettings, *,
                     progress: Progress | None = None) -> dict[str, Any]:
    """Simulate the units before and after the bed changes, and the curve of waiting against
    the varied unit's extra beds; a JSON-ready report (every run on the same seed, so the
    differences are paired)."""
    clock = time.perf_counter()
    net = demand.network.replace(days=settings.days, replications=settings.replications,
                                 seed=settings.seed)
    staffed = {u.name: int(u.beds) for u in net.units if u.beds is not None}
    changes = dict(settings.changes)
    for unit in changes:
        net.unit(unit)  # an unknown unit is refused here
        if not 1 <= staffed[unit] + changes[unit] <= bounds.MAX_BEDS:
            raise NetworkPlanError(f"beds {unit}: {staffed[unit]} staffed "
                                   f"{changes[unit]:+d} leaves {staffed[unit] + changes[unit]}")
    vary = settings.vary or (settings.changes[0][0] if settings.changes else net.names()[-1])
    net.unit(vary)
    extras = sorted({e for e in CURVE_EXTRA if staffed[vary] + e >= 1}
                    | ({changes[vary]} if vary in changes else set()))
    runs: dict[tuple[tuple[str, int], ...], NetworkResult] = {}
    plan = [tuple(sorted({**staffed, vary: staffed[vary] + e}.items())) for e in extras]
    after_key = tuple(sorted({**staffed, **{u: staffed[u] + c for u, c in changes.items()}}
                             .items()))
    before_key = tuple(sorted(staffed.items()))
    for key in (before_key, after_key):
        if key not in plan:
            plan.append(key)
    for k, key in enumerate(plan):
        if key in runs:
            continue

        def step(done: int, total: int, k: int = k) -> None:
            if progress is not None:
                progress("units together", k * total + done, len(plan) * total)
        runs[key] = simulate_network(net.with_beds(dict(key)), progress=step)
    before, after = runs[before_key], runs[after_key]
    level = settings.level
    change_rows = {}
    for unit in net.names():
        change_rows[unit] = {m: _estimate(before.difference(after, unit, m, level))
                             for m in CHANGE_METRICS}
    curve = []
    for e, key in zip(extras, plan, strict=False):
        result = runs[key]
        curve.append({"extra": e, "beds": staffed[vary] + e, "units": {
            unit: {m: _estimate(result.estimate(unit, m, level)) for m in
                   ("waiting_bed_days_per_week", "turned_away_per_week")}
            for unit in net.names()}})
    units = []
    for d, u in zip(demand.demands, net.units, strict=True):
        units.append({"unit": u.name, "model": {"id": d.model_id,
                                                "trained_until": d.trained_until.isoformat()},
                      "staffed_beds": staffed[u.name],
                      "beds_after": staffed[u.name] + changes.get(u.name, 0),
                      "external_per_day": u.external_per_day(),
                      "transfers_removed": demand.transfers_removed[u.name]})
    return {
        "units": units,
        "routes": demand.routes,
        "settings": {"days": settings.days, "years": settings.days / 365.0,
                     "replications": settings.replications, "seed": settings.seed,
                     "level": level, "warmup_days": net.resolved_warmup_days(),
                     "changes": dict(changes), "vary": vary},
        "before": before.summary(level),
        "after": after.summary(level),
        "change": change_rows,
        "curve": curve,
        "metrics": list(NETWORK_METRICS),
        "seconds": time.perf_counter() - clock,
    }
