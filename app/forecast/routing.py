"""Where a unit's patients go when they leave it, learnt from its history as of the cut-off.

For a sending unit, every stay discharged by the training cut-off (the "as of" rule: a
discharge after it is unknown then) has a destination: a unit of the hospital (its
``to_unit`` names a unit of the units table at training), ``"home"``, ``"died"`` (outcome
``died``) or ``"elsewhere"`` (any other place: another hospital, a ward Morrow does not
forecast, an outcome not given). The shares are counted per admission group of the unit's
length-of-stay model (``los.groups.group_of`` on the stays' admission covariates).

A small group's shares are shrunk towards the unit's overall shares by a Dirichlet prior
with the overall shares as its mean and ``PRIOR_STRENGTH`` pseudo-discharges: the posterior
mean is (n_gd + a p_d) / (n_g + a). Adding a few pseudo-observations of the pooled mean is
common practice (no source); a = 2 matches the Beta prior of two bookings the arrivals model
uses for its go-ahead chances (app/forecast/arrivals.py ``_p_go_by_lead``).

The same payload also records, for the receiving side, where the unit's own stays that came
from each other unit fell among its admission groups (``received_from``): the stay a
transferred patient then has in this unit is the mixture of those groups' stays.
"""

from __future__ import annotations

from collections.abc import Collection, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from app.state import UnitState

HOME, DIED, ELSEWHERE = "home", "died", "elsewhere"
PLACES = (HOME, DIED, ELSEWHERE)
PRIOR_STRENGTH = 2.0


def destination_of(outcome: Any, to_unit: Any, units: Collection[str]) -> str:
    """The destination word of one discharge (module docstring)."""
    if isinstance(outcome, str) and outcome == "died":
        return DIED
    if isinstance(to_unit, str) and to_unit in units:
        return to_unit
    if isinstance(outcome, str) and outcome == "home":
        return HOME
    return ELSEWHERE


def _column(stays: pd.DataFrame, name: str) -> pd.Series:
    return stays[name] if name in stays else pd.Series([None] * len(stays), index=stays.index)


def fit_routing(state: UnitState, units: Collection[str], groups: Any, design: Any, *,
                strength: float = PRIOR_STRENGTH) -> dict[str, Any]:
    """The routing part of a unit's model (``payload["routing"]``), from what ``state`` knew.

    ``units``: the hospital's unit codes at training (the unit itself is never a
    destination of its own discharges); ``groups``, ``design``: the unit's admission groups
    and covariate design (``LosModel.groups`` / ``.design``)."""
    others = {u for u in units if u != state.unit}
    stays = state.stays
    done = stays["discharged_at"].notna() & (stays["discharged_at"] <= state.as_of)
    ended = stays.loc[done]
    dest = [destination_of(o, t, others) for o, t in
            zip(_column(ended, "outcome"), _column(ended, "to_unit"), strict=True)]
    destinations = sorted(others) + list(PLACES)
    node = (groups.group_of(design.covariate_matrix(ended)) if len(ended)
            else np.zeros(0, dtype=np.int64))
    total = {d: 0 for d in destinations}
    by_group: dict[int, dict[str, int]] = {int(g.node): {d: 0 for d in destinations}
                                           for g in groups.groups}
    for d, g in zip(dest, node, strict=True):
        total[d] += 1
        by_group.setdefault(int(g), {x: 0 for x in destinations})[d] += 1
    n_all = sum(total.values())
    overall = ({d: total[d] / n_all for d in destinations} if n_all
               else {d: (1.0 if d == ELSEWHERE else 0.0) for d in destinations})
    shares = {}
    for g, counts in by_group.items():
        n = sum(counts.values())
        shares[str(g)] = {d: (counts[d] + strength * overall[d]) / (n + strength)
                          for d in destinations}
    return {"destinations": destinations, "overall": overall, "groups": shares,
            "counts": {"overall": total, "groups": {str(g): c for g, c in by_group.items()}},
            "prior_strength": strength, "trained_until": state.as_of.isoformat(),
            "received_from": _received_from(state, others, groups, design)}


def _received_from(state: UnitState, others: Collection[str], groups: Any, design: Any
                   ) -> dict[str, dict[str, Any]]:
    """For each other unit that passed patients to this one, how many stays came from it and
    the share of them in each of this unit's admission groups."""
    stays = state.stays
    came = _column(stays, "from_unit")
    out: dict[str, dict[str, Any]] = {}
    for sender in sorted(others):
        mask = (came == sender).to_numpy()
        if not mask.any():
            continue
        node = groups.group_of(design.covariate_matrix(stays.loc[mask]))
        values, counts = np.unique(node, return_counts=True)
        out[sender] = {"n": int(mask.sum()),
                       "groups": {str(int(v)): float(c / mask.sum())
                                  for v, c in zip(values, counts, strict=True)}}
    return out


@dataclass(frozen=True)
class Routing:
    """A unit's learnt routing, read from its model payload."""

    unit: str | None
    destinations: tuple[str, ...]
    overall: Mapping[str, float]
    groups: Mapping[int, Mapping[str, float]]
    counts: Mapping[str, Any]
    trained_until: str
    received: Mapping[str, Mapping[str, Any]]

    @classmethod
    def from_payload(cls, model_payload: Mapping[str, Any]) -> Routing | None:
        """The routing of a model's payload; None for a model trained before routing
        existed."""
        data = model_payload.get("routing")
        if not data:
            return None
        return cls(unit=model_payload.get("unit"),
                   destinations=tuple(data["destinations"]),
                   overall={str(k): float(v) for k, v in data["overall"].items()},
                   groups={int(g): {str(k): float(v) for k, v in shares.items()}
                           for g, shares in data["groups"].items()},
                   counts=data.get("counts", {}), trained_until=str(data["trained_until"]),
                   received=data.get("received_from", {}))

    def shares_for(self, group: int | None) -> dict[str, float]:
        """The destination shares of an admission group; the unit's overall shares for None
        or a group the routing has not seen."""
        if group is None or int(group) not in self.groups:
            return dict(self.overall)
        return dict(self.groups[int(group)])

    def to_unit(self, dest: str, group: int | None = None) -> float:
        """The chance a discharge (of ``group``, or of the unit overall) goes to ``dest``."""
        return float(self.shares_for(group).get(dest, 0.0))

    def receiving_units(self) -> tuple[str, ...]:
        """The hospital's units this unit passes patients to (destinations other than the
        words home, died, elsewhere)."""
        return tuple(d for d in self.destinations if d not in PLACES)

    def senders(self) -> tuple[str, ...]:
        """The units that passed patients to this one by the cut-off."""
        return tuple(sorted(self.received))

    def received_groups(self, sender: str) -> dict[int, float]:
        """Where this unit's stays that came from ``sender`` fell among its admission groups
        (shares adding to 1; empty when none came)."""
        found = self.received.get(sender)
        if not found:
            return {}
        return {int(g): float(w) for g, w in found["groups"].items()}

    def table(self, rules: Mapping[int, str]) -> list[dict[str, Any]]:
        """Rows for the model page: each group's rule, discharges counted, and shares."""
        counted = self.counts.get("groups", {})
        rows = [{"rule": rules.get(g, f"group {g}"),
                 "n": int(sum(counted.get(str(g), {}).values())),
                 "shares": [float(shares.get(d, 0.0)) for d in self.destinations]}
                for g, shares in sorted(self.groups.items())]
        rows.append({"rule": "all discharges",
                     "n": int(sum(self.counts.get("overall", {}).values())),
                     "shares": [float(self.overall.get(d, 0.0)) for d in self.destinations]})
        return rows
