"""Build a ``UnitState`` from the store, applying the "as of" rule in the queries."""

from __future__ import annotations

from dataclasses import replace
from datetime import datetime, timedelta
from zoneinfo import ZoneInfo

import pandas as pd
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from app.state.frames import (
    BOOKING_COLUMNS,
    OBSERVATION_COLUMNS,
    SNAPSHOT_COLUMNS,
    STAY_COLUMNS,
    UnitState,
)
from app.store import repo
from app.store.models import Booking, CensusRow, CensusSnapshot, Observation, Stay
from app.timeutil import as_utc, parse_clock


class UnknownUnit(LookupError):
    """The unit code is not stored."""


def _utc_column(values: list[datetime | None]) -> pd.Series:
    return pd.Series(pd.to_datetime([None if v is None else as_utc(v) for v in values], utc=True),
                     dtype="datetime64[ns, UTC]")


def _observations(session: Session, unit: str, as_of: datetime, *,
                  current_only: bool) -> pd.DataFrame:
    query = (select(*[getattr(Observation, c) for c in OBSERVATION_COLUMNS],
                    Observation.withdrawn)
             .join(Stay, Observation.stay_id == Stay.stay_id)
             .where(Stay.unit == unit, Stay.admitted_at <= as_of,
                    Observation.observed_at <= as_of, Observation.recorded_at <= as_of))
    if current_only:
        query = query.where((Stay.discharged_at.is_(None)) | (Stay.discharged_at > as_of))
    # Entries with the same recorded_at follow in the order they were made (revision): the
    # frames' rule takes the last row of each instant as its latest value.
    rows = session.execute(query.order_by(
        Observation.stay_id, Observation.name, Observation.observed_at,
        Observation.recorded_at, Observation.revision)).all()
    observations = _without_withdrawn(pd.DataFrame(rows, columns=[*OBSERVATION_COLUMNS,
                                                                  "withdrawn"]))
    observations["observed_at"] = _utc_column(list(observations["observed_at"]))
    observations["recorded_at"] = _utc_column(list(observations["recorded_at"]))
    observations["value"] = observations["value"].astype(float)
    return observations


def _without_withdrawn(rows: pd.DataFrame) -> pd.DataFrame:
    """The rows without withdrawals: where the latest entry known (the last row of its
    (stay, name, observed_at), rows in the order of entry) withdraws the value, that
    measurement has no value at all; an entry after a withdrawal gives it a value again.

    Applied at load, so a state holds no withdrawn value, also for instants before the
    withdrawal that ``UnitState.known_at`` replays (a withdrawn value was a mistake; a model
    should not learn from it either).
    """
    withdrawn = rows["withdrawn"].astype(bool)
    if withdrawn.any():
        key = [rows["stay_id"], rows["name"], rows["observed_at"]]
        latest_withdrawn = withdrawn.groupby(key, sort=False).transform("last").astype(bool)
        rows = rows.loc[~(withdrawn | latest_withdrawn)]
    return rows.drop(columns="withdrawn").reset_index(drop=True)


def with_current_observations(session: Session, state: UnitState) -> UnitState:
    """``state`` with its current stays' observations read again (scores come in often;
    stays and bookings change with imports). Earlier stays' observations are dropped."""
    as_of = state.as_of.to_pydatetime()
    return replace(state, observations=_observations(session, state.unit, as_of,
                                                     current_only=True))


def load_state(session: Session, unit: str, as_of: datetime, tz: ZoneInfo, *,
               with_history: bool = True, recent_days: float = 0.0) -> UnitState:
    """What was known about ``unit`` at ``as_of``.

    With ``with_history=False`` only the stays in the unit at ``as_of`` or discharged in the
    ``recent_days`` before it (the observations of the current ones) and the bookings planned
    from yesterday on are loaded: enough for a forecast from a trained model
    (``app.forecast.service.forecast_state`` says how many recent days its demand reads), and
    much faster.
    """
    stored_unit = repo.get_unit(session, unit)
    if stored_unit is None:
        raise UnknownUnit(f"unit {unit!r} is not known; import units.csv first")
    as_of = as_utc(as_of)
    stay_query = select(*[getattr(Stay, c) for c in STAY_COLUMNS]).where(
        Stay.unit == unit, Stay.admitted_at <= as_of)
    if not with_history:
        since = as_of - timedelta(days=recent_days)
        stay_query = stay_query.where(
            (Stay.discharged_at.is_(None)) | (Stay.discharged_at > since))
    stay_rows = session.execute(stay_query.order_by(Stay.admitted_at, Stay.stay_id)).all()
    stays = pd.DataFrame(stay_rows, columns=STAY_COLUMNS)
    discharged = [d if d is not None and d <= as_of else None for d in stays["discharged_at"]]
    stays["admitted_at"] = _utc_column(list(stays["admitted_at"]))
    stays["discharged_at"] = _utc_column(discharged)
    stays["outcome"] = stays["outcome"].where(stays["discharged_at"].notna(), None)
    stays["to_unit"] = stays["to_unit"].where(stays["discharged_at"].notna(), None)
    stays["age"] = pd.to_numeric(stays["age"], errors="coerce").astype(float)

    observations = _observations(session, unit, as_of, current_only=not with_history)

    booking_query = select(*[getattr(Booking, c) for c in BOOKING_COLUMNS]).where(
        Booking.unit == unit, Booking.booked_at <= as_of)
    if not with_history:
        # A forecast needs bookings planned for today on; a day's margin for the zone.
        yesterday = as_of.astimezone(tz).date() - timedelta(days=1)
        booking_query = booking_query.where(Booking.planned_date >= yesterday)
    booking_rows = session.execute(
        booking_query.order_by(Booking.planned_date, Booking.booking_id)).all()
    bookings = pd.DataFrame(booking_rows, columns=BOOKING_COLUMNS)
    cancelled = [c if c is not None and c <= as_of else None for c in bookings["cancelled_at"]]
    bookings["booked_at"] = _utc_column(list(bookings["booked_at"]))
    bookings["cancelled_at"] = _utc_column(cancelled)
    bookings["age"] = pd.to_numeric(bookings["age"], errors="coerce").astype(float)

    if with_history:
        snapshot_rows = session.execute(
            select(CensusSnapshot.taken_at, func.count(CensusRow.id))
            .join(CensusRow, CensusRow.snapshot_id == CensusSnapshot.id)
            .where(CensusSnapshot.unit == unit, CensusSnapshot.taken_at <= as_of)
            .group_by(CensusSnapshot.id, CensusSnapshot.taken_at)
            .order_by(CensusSnapshot.taken_at)).all()
    else:
        snapshot_rows = []
    snapshots = pd.DataFrame(snapshot_rows, columns=SNAPSHOT_COLUMNS)
    snapshots["taken_at"] = _utc_column(list(snapshots["taken_at"]))
    snapshots["occupancy"] = snapshots["occupancy"].astype(int)

    return UnitState(
        unit=unit,
        as_of=pd.Timestamp(as_of),
        tz=tz,
        census_time=parse_clock(stored_unit.census_time),
        bed_plan=tuple(repo.bed_plan(session, unit)),
        stays=stays,
        observations=observations,
        bookings=bookings,
        snapshots=snapshots,
    )
