"""The inputs of a network of units: units, transfers between them, the traffic equations.

See ``app.stats.planning.network`` for what is simulated and measured.
"""

from __future__ import annotations

import dataclasses
import math
import zlib
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from app.stats.planning.inputs import (
    DemandStream,
    ElectiveList,
    FloatArray,
    PatientGroup,
    PlanningInput,
)

__all__ = ["NetworkInput", "NetworkUnit", "Transfer", "traffic_equations", "unit_seed"]


def _key(text: str) -> int:
    return zlib.crc32(text.encode("utf-8"))


def unit_seed(seed: int, unit: str) -> int:
    """The seed of ``unit``'s external demand in a network run with ``seed``."""
    state = np.random.SeedSequence(seed, spawn_key=(_key(unit),)).generate_state(1)
    return int(state[0])


@dataclass(frozen=True)
class NetworkUnit:
    """One unit of the network.

    Parameters
    ----------
    name : str
    groups : sequence of PatientGroup
        Patient groups and their stay distributions (external arrivals and transfers in).
    streams : sequence of DemandStream or ElectiveList
        External arrivals; may be empty (a unit fed only by transfers).
    beds : int or None
        Staffed beds (>= 1); None for no limit.
    escalation : int, default 0
        Extra beds opened only when the staffed ones are full.
    """

    name: str
    groups: tuple[PatientGroup, ...]
    streams: tuple[DemandStream | ElectiveList, ...] = ()
    beds: int | None = None
    escalation: int = 0

    def __post_init__(self) -> None:
        if not isinstance(self.name, str) or not self.name:
            raise ValueError(f"name: must be a non-empty string, got {self.name!r}")
        object.__setattr__(self, "groups", tuple(self.groups))
        object.__setattr__(self, "streams", tuple(self.streams))
        if not self.groups:
            raise ValueError(f"groups: unit {self.name!r} needs at least one patient group")
        if self.beds is not None and (isinstance(self.beds, bool) or int(self.beds) < 1
                                      or int(self.beds) != self.beds):
            raise ValueError(f"beds: unit {self.name!r} needs a whole number >= 1 or None, "
                             f"got {self.beds!r}")
        if isinstance(self.escalation, bool) or int(self.escalation) != self.escalation or \
                self.escalation < 0:
            raise ValueError(f"escalation: unit {self.name!r} needs a whole number >= 0, "
                             f"got {self.escalation!r}")
        if self.escalation and self.beds is None:
            raise ValueError(f"escalation: unit {self.name!r} has no bed limit")
        names = [g.name for g in self.groups]
        for s in self.streams:
            unknown = [n for n, _ in s.group_weights if n not in names]
            if unknown:
                raise ValueError(f"streams: {s.name!r} of {self.name!r} names unknown groups "
                                 f"{unknown!r}")

    @property
    def capacity(self) -> int | None:
        """Staffed plus escalation beds (None: no limit)."""
        return None if self.beds is None else int(self.beds) + int(self.escalation)

    def group_index(self, name: str) -> int:
        for i, g in enumerate(self.groups):
            if g.name == name:
                return i
        raise ValueError(f"group: unit {self.name!r} has no group {name!r}")

    def external_per_day(self) -> float:
        return float(sum(s.expected_by_weekday().mean() for s in self.streams))

    def external_mean_stay(self) -> float:
        """Mean stay of an external arrival (arrival-weighted over streams)."""
        total = self.external_per_day()
        if total == 0:
            return 0.0
        means = {g.name: g.stay.mean() for g in self.groups}
        return float(sum(s.expected_by_weekday().mean() * sum(w * means[n]
                                                              for n, w in s.group_weights)
                         for s in self.streams) / total)


@dataclass(frozen=True)
class Transfer:
    """Patients leaving ``source`` who go on to ``target``.

    Parameters
    ----------
    source, target : str
        Unit names (different).
    share : float
        Probability that a patient leaving ``source`` goes to ``target``.
    group_weights : sequence of (str, float)
        Which of ``target``'s groups the arriving patient belongs to (stay distribution).
    share_by_group : sequence of (str, float), optional
        Per group of ``source``: the probability for that group's patients (``share`` for a
        group not listed).
    """

    source: str
    target: str
    share: float
    group_weights: tuple[tuple[str, float], ...]
    share_by_group: tuple[tuple[str, float], ...] = ()

    def __post_init__(self) -> None:
        if self.source == self.target:
            raise ValueError(f"transfer: {self.source!r} to itself")
        for p in [self.share] + [v for _, v in self.share_by_group]:
            if not (math.isfinite(p) and 0 <= p <= 1):
                raise ValueError(f"share: {self.source}->{self.target} needs a probability, "
                                 f"got {p!r}")
        given: Any = self.group_weights
        pairs = given.items() if isinstance(given, Mapping) else given
        weights = tuple((str(n), float(w)) for n, w in pairs)
        if not weights or any(not (math.isfinite(w) and w >= 0) for _, w in weights) or \
                sum(w for _, w in weights) <= 0:
            raise ValueError(f"group_weights: {self.source}->{self.target} needs weights >= 0 "
                             "with a positive sum")
        total = sum(w for _, w in weights)
        object.__setattr__(self, "group_weights", tuple((n, w / total) for n, w in weights))
        by_group: Any = self.share_by_group
        by_group = by_group.items() if isinstance(by_group, Mapping) else by_group
        object.__setattr__(self, "share_by_group", tuple((str(n), float(v)) for n, v in by_group))

    def share_for(self, group: str) -> float:
        return dict(self.share_by_group).get(group, self.share)


@dataclass(frozen=True)
class NetworkInput:
    """Units, transfers between them, and how much to simulate.

    ``days``, ``warmup_days`` (None: the largest automatic warm-up of the units' groups, plus
    a week per transfer), ``replications``, ``seed``, ``census_hour`` and ``start_weekday`` as
    in :class:`app.stats.planning.PlanningInput`.
    """

    units: tuple[NetworkUnit, ...]
    transfers: tuple[Transfer, ...] = ()
    days: int = 730
    warmup_days: int | None = None
    replications: int = 20
    seed: int = 0
    census_hour: float = 0.0
    start_weekday: int = 0

    def __post_init__(self) -> None:
        object.__setattr__(self, "units", tuple(self.units))
        object.__setattr__(self, "transfers", tuple(self.transfers))
        names = [u.name for u in self.units]
        if not names or len(set(names)) != len(names):
            raise ValueError(f"units: needs one or more units with unique names, got {names!r}")
        for t in self.transfers:
            for end in (t.source, t.target):
                if end not in names:
                    raise ValueError(f"transfers: unknown unit {end!r}")
            target = self.unit(t.target)
            for n, _ in t.group_weights:
                target.group_index(n)
        pairs = [(t.source, t.target) for t in self.transfers]
        if len(set(pairs)) != len(pairs):
            raise ValueError("transfers: one transfer per pair of units")
        for u in self.units:
            out = [t for t in self.transfers if t.source == u.name]
            for g in u.groups:
                total = sum(t.share_for(g.name) for t in out)
                if total > 1 + 1e-9:
                    raise ValueError(f"transfers: shares out of {u.name!r} (group {g.name!r}) "
                                     f"add up to {total:.3g} > 1")
        if not sum(u.external_per_day() for u in self.units) > 0:
            raise ValueError("units: the expected number of external arrivals is 0")
        if int(self.days) < 1 or int(self.replications) < 2:
            raise ValueError("days must be >= 1 and replications >= 2")

    def unit(self, name: str) -> NetworkUnit:
        for u in self.units:
            if u.name == name:
                return u
        raise ValueError(f"unit: no unit {name!r} in the network")

    def names(self) -> tuple[str, ...]:
        return tuple(u.name for u in self.units)

    def replace(self, **changes: Any) -> NetworkInput:
        return dataclasses.replace(self, **changes)

    def with_beds(self, beds: Mapping[str, int | None]) -> NetworkInput:
        """A copy with some units' staffed beds changed."""
        for name in beds:
            self.unit(name)
        return self.replace(units=tuple(
            dataclasses.replace(u, beds=beds[u.name]) if u.name in beds else u
            for u in self.units))

    def _unit_input(self, u: NetworkUnit) -> PlanningInput | None:
        if not u.streams or u.external_per_day() <= 0:
            return None
        return PlanningInput(groups=u.groups, streams=u.streams, beds=None, days=self.days,
                             warmup_days=self.resolved_warmup_days(), replications=2,
                             seed=unit_seed(self.seed, u.name), census_hour=self.census_hour,
                             start_weekday=self.start_weekday)

    def resolved_warmup_days(self) -> int:
        if self.warmup_days is not None:
            return int(self.warmup_days)
        longest = 0
        for u in self.units:
            probe = PlanningInput(groups=u.groups, streams=(DemandStream(
                "probe", "emergency", (1.0,) * 7, ((u.groups[0].name, 1.0),)),), beds=None)
            longest = max(longest, probe.resolved_warmup_days())
        return longest + 7 * min(len(self.transfers), 4)

    def mean_routing(self) -> FloatArray:
        """Routing matrix R (units x units): R[i, j] = ``share`` of the transfer i -> j (the
        shares per group, if any, are not in it)."""
        n = len(self.units)
        out = np.zeros((n, n))
        index = {u.name: i for i, u in enumerate(self.units)}
        for t in self.transfers:
            out[index[t.source], index[t.target]] = t.share
        return out


def traffic_equations(net: NetworkInput) -> tuple[FloatArray, FloatArray]:
    """Arrival rates and mean occupancies of the network with no bed limits.

    Solves lambda = gamma + R^T lambda (Jackson 1957) by ``numpy.linalg.solve``, with gamma
    the units' external arrivals per day and R the routing shares; for that a group-dependent
    share must not be in use. The mean number in unit i is lambda_i x its mean stay, the mean
    stay weighted over external arrivals and transfers in by their rates.

    Returns
    -------
    (rates, occupancy) : arrays of shape (units,)
    """
    if any(t.share_by_group for t in net.transfers):
        raise ValueError("traffic_equations: shares per group are not supported")
    gamma = np.array([u.external_per_day() for u in net.units])
    routing = net.mean_routing()
    rates = np.linalg.solve(np.eye(len(gamma)) - routing.T, gamma)
    index = {u.name: i for i, u in enumerate(net.units)}
    occupancy = np.zeros(len(gamma))
    for i, u in enumerate(net.units):
        load = gamma[i] * u.external_mean_stay()
        means = {g.name: g.stay.mean() for g in u.groups}
        for t in net.transfers:
            if t.target == u.name:
                flow = rates[index[t.source]] * t.share
                load += flow * sum(w * means[n] for n, w in t.group_weights)
        occupancy[i] = load
    return rates, occupancy
