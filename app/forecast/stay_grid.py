"""Current stays asked of the length-of-stay model once per state, model and grid.

A unit's forecast needs its current patients' chance of still being in at the census
instants and, under a ceiling, at every instant of the ceiling's paths; a unit it passes
patients on to needs the same curves on a grid of leaving instants. Both ask on one grid,
``leaving_grid(census_at, STEP_DAYS)`` (every three hours from as_of, and each census
instant), and the answer is kept on the state (``UnitState.memo``) for the model it came
from: in a forecast of the whole hospital each unit's patients are asked once, whether for
its own forecast or for the units after it. A state with newer scores is a new object
(``with_current_observations``) and starts with an empty memo.
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime, timedelta
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd

from app.forecast.los import LosModel, StayPredictions, predict_stays
from app.forecast.los.constants import NS_PER_DAY
from app.state import UnitState
from app.stats.transfer_presence import leaving_grid
from app.timeutil import census_instants_after

# Three hours: the curves move by far less than the ceiling's Monte-Carlo error in between
# (the ceiling's paths interpolate linearly; common practice, no source).
STEP_DAYS = 0.125

FloatArray = npt.NDArray[np.float64]


def days_after(instant: datetime, as_of: pd.Timestamp) -> float:
    """Days from ``as_of`` to ``instant`` (to the nanosecond)."""
    return (pd.Timestamp(instant) - as_of).value / NS_PER_DAY


def census_offsets(state: UnitState, instants: Sequence[datetime]) -> FloatArray:
    """Days from the state's as_of to each of ``instants`` (its census instants)."""
    return np.array([days_after(h, state.as_of) for h in instants], dtype=float)


def own_census_offsets(state: UnitState, count: int) -> FloatArray:
    """The state's unit's next ``count`` census instants, as days after as_of."""
    return census_offsets(state, census_instants_after(state.as_of.to_pydatetime(),
                                                       state.census_time, state.tz, count))


def grid_instants(state: UnitState, offsets: FloatArray) -> list[datetime]:
    """Aware instants ``offsets`` days after the state's as_of (to the microsecond)."""
    as_of = state.as_of.to_pydatetime()
    return [as_of + timedelta(microseconds=round(float(t) * 86_400e6)) for t in offsets]


def predicted_on_grid(payload: dict[str, Any], los: LosModel, state: UnitState,
                      census_at: npt.ArrayLike) -> tuple[FloatArray, StayPredictions]:
    """The grid u (``u[0] = 0``, as_of) and the current stays' predictions at ``u[1:]`` by
    the model of ``payload`` (``los`` made from it)."""
    u = leaving_grid(census_at, STEP_DAYS)
    key = ("stays-on-grid", id(payload), u.tobytes())
    found = state.memo.get(key)
    if found is not None and found[0] is payload:
        return u, found[1]
    predicted = predict_stays(los, state, grid_instants(state, u[1:]))
    state.memo[key] = (payload, predicted)
    return u, predicted


def on_instants(u: FloatArray, p_at_u: FloatArray, t: npt.ArrayLike) -> FloatArray:
    """(stays, len(t)) the chances ``p_at_u`` (stays, len(u) - 1, at ``u[1:]``; 1 at
    ``u[0]``) read at instants ``t`` in [0, u[-1]], linearly in time in between."""
    at = np.asarray(t, dtype=float)
    p = np.hstack([np.ones((p_at_u.shape[0], 1)), p_at_u])
    hi = np.clip(np.searchsorted(u, at), 1, max(u.size - 1, 1))
    lo = hi - 1
    width = u[hi] - u[lo]
    w = np.where(width > 0, (at - u[lo]) / np.where(width > 0, width, 1.0), 1.0)
    return np.asarray(p[:, lo] * (1.0 - w) + p[:, hi] * w, dtype=float)
