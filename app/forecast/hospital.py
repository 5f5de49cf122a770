"""Every unit's forecast at one as_of, made together.

Each unit's state is loaded once and its model read once. A unit that passes patients on to
another is that unit's sender with the very same state and model, so its current patients are
asked of its length-of-stay model once (app/forecast/stay_grid.py), for its own forecast and
for every unit after it, instead of once per receiving unit plus once for itself.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from datetime import datetime
from typing import Any
from zoneinfo import ZoneInfo

from sqlalchemy.orm import Session

from app.forecast.service import (
    DEFAULT_DAYS,
    WEEK_PATHS,
    ForecastInputs,
    ModelRecord,
    NoModel,
    forecast_state,
    forecast_with_inputs,
    model_for,
    senders_of,
)
from app.state import UnitState


@dataclass(frozen=True)
class LoadedUnit:
    """A unit's state at as_of and its newest model then (None, with ``problem``: none)."""

    state: UnitState
    record: ModelRecord | None
    problem: str | None = None


def load_units(session: Session, units: Iterable[str], as_of: datetime, tz: ZoneInfo
               ) -> dict[str, LoadedUnit]:
    """Each unit's state (current stays only) and newest model at ``as_of``."""
    out = {}
    for unit in units:
        try:
            record = model_for(session, unit, as_of)
        except NoModel as exc:
            out[unit] = LoadedUnit(forecast_state(session, unit, as_of, tz, None), None,
                                   str(exc))
            continue
        out[unit] = LoadedUnit(forecast_state(session, unit, as_of, tz, record.payload), record)
    return out


def forecast_units(session: Session, loaded: dict[str, LoadedUnit], *,
                   days: int = DEFAULT_DAYS, paths: int = WEEK_PATHS, seed: int = 0
                   ) -> dict[str, tuple[dict[str, Any], ForecastInputs] | None]:
    """The forecast JSON and its inputs for every loaded unit with a model (None without),
    senders among ``loaded`` taken as they are (the others read from ``session``)."""
    at_hand = {u: (x.state, None if x.record is None else x.record.payload)
               for u, x in loaded.items()}
    out: dict[str, tuple[dict[str, Any], ForecastInputs] | None] = {}
    for unit, x in loaded.items():
        if x.record is None:
            out[unit] = None
            continue
        senders = senders_of(session, x.state, x.record, loaded=at_hand)
        out[unit] = forecast_with_inputs(x.state, x.record, days=days, paths=paths, seed=seed,
                                         senders=senders)
    return out
