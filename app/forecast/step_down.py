"""Patients fit to leave a unit who are still in it: the step-down queue ("exit block").

A stay waits from its first ``fit_for_discharge`` = 1 that still stands: the latest value
known at ``as_of`` is 1, and it has been 1 since that observation (a 0 in between starts the
wait again). Values follow the state's "as of" rule (app/state/frames.py): observed and
recorded by ``as_of``, each instant's latest correction, withdrawn values already removed at
load (app/state/load.py).

Where a waiting patient is likely to go comes from the sending unit's routing (the shares
learnt from its discharges, app/forecast/routing.py), for the patient's admission group when
it is known. A patient fit to leave is not expected to die here, so the destination is the
likeliest of the places patients went alive, with its share among those; the shares are
what happened to past patients of the group, not a booking of a bed.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np
import pandas as pd

from app.state import UnitState

FLAG = "fit_for_discharge"
DIED = "died"


class Shares(Protocol):
    """What this module needs of a unit's routing (``app.forecast.routing.Routing``)."""

    def shares_for(self, group: int | None) -> Mapping[str, float]: ...


@dataclass(frozen=True)
class Waiting:
    """One patient fit to leave the unit and still in it at ``as_of``."""

    stay_id: str
    bed: str  # "" when no census lists a bed
    flagged_at: pd.Timestamp  # the first fit-for-discharge flag still standing, UTC
    hours_waiting: float  # from flagged_at to as_of
    destination: str | None  # likeliest place patients like this went alive; None: unknown
    share: float | None  # that place's share among them


def waiting_to_step_down(state: UnitState, routing: Shares | None, *,
                         beds: Mapping[str, str] | None = None,
                         groups: Mapping[str, int] | None = None) -> list[Waiting]:
    """The current stays of ``state`` flagged fit for discharge, longest wait first.

    Parameters
    ----------
    state : UnitState
        The sending unit as of now; its ``observations`` hold the stays' flag entries.
    routing : Routing or None
        The unit's learnt routing; None (a model trained before routing) leaves the
        destinations unknown.
    beds : mapping, optional
        Stay id to its bed in the latest census (``app.store.repo.latest_beds``).
    groups : mapping, optional
        Stay id to its admission group node id (the model's admission tree); a stay without
        one takes the unit's overall shares.
    """
    as_of = state.as_of
    current = state.stays.loc[state.present_mask(as_of), "stay_id"].astype(str)
    flagged = flagged_since(state.observations, as_of, set(current))
    out = []
    for stay_id, since in flagged.items():
        destination, share = (None, None)
        if routing is not None:
            group = None if groups is None else groups.get(stay_id)
            destination, share = likeliest_alive(routing.shares_for(group))
        out.append(Waiting(
            stay_id=stay_id, bed=(beds or {}).get(stay_id, ""), flagged_at=since,
            hours_waiting=(as_of - since).total_seconds() / 3600.0,
            destination=destination, share=share))
    out.sort(key=lambda w: (-w.hours_waiting, w.stay_id))
    return out


def likeliest_alive(shares: Mapping[str, float]) -> tuple[str | None, float | None]:
    """The destination with the largest share other than death, and its share among the
    destinations other than death (ties: the first in alphabetical order)."""
    alive = {d: float(p) for d, p in shares.items() if d != DIED and p > 0}
    total = sum(alive.values())
    if total <= 0:
        return None, None
    best = min(alive, key=lambda d: (-alive[d], d))
    return best, alive[best] / total


def flagged_since(observations: pd.DataFrame, as_of: pd.Timestamp,
                  stay_ids: set[str]) -> dict[str, pd.Timestamp]:
    """Per stay whose flag stands at ``as_of``: when the standing run of 1s began (the one rule
    for "fit to leave since", also used by the exit-block estimate, app/forecast/exit_block.py).
    """
    obs = observations
    if obs.empty:
        return {}
    keep = ((obs["name"] == FLAG) & (obs["observed_at"] <= as_of)
            & (obs["recorded_at"] <= as_of) & obs["stay_id"].astype(str).isin(stay_ids))
    rows = obs.loc[keep, ["stay_id", "observed_at", "value", "recorded_at"]].copy()
    if rows.empty:
        return {}
    rows["stay_id"] = rows["stay_id"].astype(str)
    rows["row"] = np.arange(len(rows))  # same recorded_at: the later row is the correction
    rows = rows.sort_values(["stay_id", "observed_at", "recorded_at", "row"], kind="mergesort")
    values = rows.groupby(["stay_id", "observed_at"], sort=False).tail(1)
    out: dict[str, pd.Timestamp] = {}
    for stay_id, series in values.groupby("stay_id", sort=True):
        flags = series["value"].to_numpy(dtype=float) == 1.0
        if not flags[-1]:
            continue
        unset = np.flatnonzero(~flags)
        start = 0 if unset.size == 0 else int(unset[-1]) + 1
        out[str(stay_id)] = _utc(series["observed_at"].iloc[start])
    return out


def _utc(value: Any) -> pd.Timestamp:
    moment = pd.Timestamp(value)
    return moment.tz_localize("UTC") if moment.tzinfo is None else moment.tz_convert("UTC")


def admission_groups(model_payload: Mapping[str, Any], state: UnitState) -> dict[str, int]:
    """Each current stay's admission group node id in the model's admission tree (the key of
    its routing shares); empty when the payload has no length-of-stay model."""
    from app.forecast.los.model import LosModel

    if "los" not in model_payload:
        return {}
    los = LosModel.from_payload(model_payload)
    current = state.current_stays()
    if current.empty:
        return {}
    nodes = los.groups.group_of(los.design.covariate_matrix(current))
    return {str(s): int(g) for s, g in zip(current["stay_id"], nodes, strict=True)}
