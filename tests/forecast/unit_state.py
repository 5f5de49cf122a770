"""A unit's "as of" state built directly from frames, for tests on invented units."""

from __future__ import annotations

from datetime import time
from zoneinfo import ZoneInfo

import pandas as pd

from app.state.frames import BOOKING_COLUMNS, OBSERVATION_COLUMNS, UnitState


def unit_state(unit: str, stays: pd.DataFrame, as_of: pd.Timestamp, *, beds: int,
               bookings: list[dict[str, object]] | None = None,
               zone: str = "UTC") -> UnitState:
    """The state of ``unit`` at ``as_of`` (the site in ``zone``, census at local midnight)
    with these stays (their ``*_at`` columns made UTC times here), the given bookings and no
    observations."""
    stays = stays.copy()
    for column in ("admitted_at", "discharged_at"):
        stays[column] = pd.to_datetime(stays[column], utc=True)
    booking_frame = pd.DataFrame(bookings or [], columns=list(BOOKING_COLUMNS))
    for column in BOOKING_COLUMNS:
        if column.endswith("_at"):
            booking_frame[column] = pd.to_datetime(booking_frame[column], utc=True)
    return UnitState(unit=unit, as_of=as_of, tz=ZoneInfo(zone), census_time=time(0, 0),
                     bed_plan=((None, beds),), stays=stays,
                     observations=pd.DataFrame({c: pd.Series(dtype=object)
                                                for c in OBSERVATION_COLUMNS}),
                     bookings=booking_frame,
                     snapshots=pd.DataFrame({"taken_at": pd.Series(dtype="datetime64[ns, UTC]"),
                                             "occupancy": pd.Series(dtype=int)}))
