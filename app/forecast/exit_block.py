"""Exit block learnt from a sending unit's history and its receiving unit's occupancy.

A wait starts when a patient's ``fit_for_discharge`` flag turns to 1 and stays so (the last
run of 1s before the stay ended, or before as_of while the patient is still in) and ends at the
stay's end: a transfer to the receiving unit is the event, as_of censors it, and waits that
ended anywhere else (home, another unit, death) are not the receiver's to explain. The
receiving unit is full while its patients are at least its staffed beds. Waits are counted
only from the receiving unit's first recorded discharge on: before it the extract does not
hold everyone who was in there, so "full" is unknown.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from app.forecast.step_down import flagged_since
from app.state import UnitState
from app.stats.exit_block import ExitBlock, exit_block_rates

NS_PER_DAY = 86_400e9


def ready_since(state: UnitState) -> pd.Series:
    """Per stay id, the instant its standing ``fit_for_discharge`` = 1 began, judged at the
    stay's end (its discharge, or as_of while it is in); stays not fit at their end are left
    out. The rule is :func:`app.forecast.step_down.flagged_since`'s."""
    obs = state.observations
    if obs.empty:
        return pd.Series(dtype="datetime64[ns, UTC]")
    # An open stay's entries up to as_of count; entries at or after a discharge say nothing
    # about the wait that ended it.
    ends = state.stays.set_index("stay_id")["discharged_at"].fillna(
        state.as_of + pd.Timedelta(1, "ns"))
    end_of = obs["stay_id"].map(ends)
    before_end = obs.loc[end_of.notna() & (obs["observed_at"] < end_of)]
    found = flagged_since(before_end, state.as_of, set(ends.index.astype(str)))
    return pd.Series(found, dtype="datetime64[ns, UTC]")


def full_steps(receiver: UnitState) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The receiving unit's head count as a step function in ns: each instant it changes, the
    count after every change at that instant, and the staffed beds then."""
    stays = receiver.stays
    admitted = stays["admitted_at"].array.asi8
    discharged = stays["discharged_at"].dropna().array.asi8
    at = np.r_[admitted, discharged]
    step = np.r_[np.ones(admitted.size, dtype=int), -np.ones(discharged.size, dtype=int)]
    # Discharges first at a shared instant: a bed freed and filled at once never shows full.
    order = np.lexsort((step, at))
    at, count = at[order], np.cumsum(step[order])
    keep = np.r_[at[1:] != at[:-1], True]  # the state after the last change at an instant
    at, count = at[keep], count[keep]
    local_days = pd.to_datetime(at, utc=True).tz_convert(receiver.tz).date
    beds = np.array([receiver.beds_on(d) or 0 for d in local_days])
    return at, count, beds


def learn_exit_block(sender: UnitState, receiver: UnitState) -> ExitBlock | None:
    """Transfer rates of ready patients from ``sender`` to ``receiver`` while the receiver has
    room and while it is full (None when no wait can be measured)."""
    discharges = receiver.stays["discharged_at"].dropna()
    if discharges.empty:
        return None
    known_from = discharges.min()
    since = ready_since(sender)
    if since.empty:
        return None
    stays = sender.stays.set_index("stay_id").loc[since.index]
    end = stays["discharged_at"].fillna(sender.as_of)
    start = since.clip(lower=known_from)
    to_unit = stays["to_unit"] if "to_unit" in stays else pd.Series(None, index=stays.index)
    moved = (stays["discharged_at"].notna() & (to_unit == receiver.unit)).to_numpy()
    # The waits of patients bound for the receiver: those who moved there, and those still
    # waiting at as_of (censored; some may yet go elsewhere). Waits that ended elsewhere
    # are left out, so the rate describes a patient waiting for this unit's bed.
    keep = ((end > start) & (moved | stays["discharged_at"].isna())).to_numpy()
    if not keep.any():
        return None
    change_at, count, beds = full_steps(receiver)
    full_after = (beds > 0) & (count >= beds)
    # A transfer counts as made while full when the receiver, the moving patient left out,
    # still had no staffed bed for them: it took an escalation bed.
    at_end = np.clip(np.searchsorted(change_at, end.array.asi8, side="right") - 1, 0, None)
    full_then = (beds[at_end] > 0) & (count[at_end] - 1 >= beds[at_end])
    origin = int(known_from.value)

    def days(values: pd.Series) -> np.ndarray:
        return (values.array.asi8 - origin) / NS_PER_DAY

    return exit_block_rates(days(start)[keep], days(end)[keep], moved[keep],
                            (change_at - origin) / NS_PER_DAY, full_after,
                            full_then=full_then[keep])


def exit_blocks(sender: UnitState, receivers: dict[str, UnitState]) -> dict[str, Any]:
    """The JSON part of a sending unit's model: exit block towards each receiving unit."""
    out: dict[str, Any] = {}
    for code, receiver in receivers.items():
        found = learn_exit_block(sender, receiver)
        if found is not None:
            out[code] = found.to_dict()
    return out
