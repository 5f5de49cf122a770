"""The forecast a page shows: computed once per unit, model, minute and data version.

Forecasts are exact convolutions plus simulated joint paths, so a page view would otherwise
redo the same work many times a minute at a huddle. Any write (every write is an import
batch) changes the data marker and so the key. A score changes only its patient's part: the
backdrop (bookings, arrivals, the paths' draws) is kept until stays, bookings, the model or
the minute change, and only the current patients' probabilities are computed again. A
forecast made "now" is stored at most once an hour per unit and model, to be compared later
with the census that followed.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from typing import Any

from sqlalchemy.exc import IntegrityError, OperationalError
from sqlalchemy.orm import Session

from app.config import current_time, get_settings
from app.forecast.service import (
    Backdrop,
    ModelRecord,
    NoModel,
    expected_admissions,
    forecast_backdrop,
    forecast_on,
    forecast_state,
    model_for,
    senders_of,
    store_forecast,
)
from app.state import UnitState, with_current_observations
from app.store import repo
from app.store.retry import is_busy

CACHE_SIZE = 64


@dataclass(frozen=True)
class Shown:
    forecast: dict[str, Any] | None
    state: UnitState
    problem: str | None
    admissions: list[float] | None = None
    # Derived views of this forecast (patient rows, figure JSON), computed once per key.
    views: dict[str, Any] = field(default_factory=dict)

    def view(self, name: str, build: Callable[[], Any]) -> Any:
        if name not in self.views:
            self.views[name] = build()
        return self.views[name]


_cache: OrderedDict[tuple[Any, ...], Shown] = OrderedDict()
_backdrops: OrderedDict[tuple[Any, ...], tuple[Backdrop | None, UnitState]] = OrderedDict()
_lock = threading.Lock()
_compute_lock = threading.Lock()
_stored: dict[tuple[Any, ...], datetime] = {}
BACKDROPS = 16


def forecast_moment(now: datetime, written_at: datetime | None) -> datetime:
    """The instant a "now" forecast is made as of: the current minute, or the end of it when
    data was written during it, so that a score just entered counts at once (the "as of"
    rule needs ``recorded_at <= as_of``). Forecasts stay shareable for a whole minute."""
    moment = now.replace(second=0, microsecond=0)
    if written_at is not None and moment < written_at <= now + timedelta(minutes=1):
        moment += timedelta(minutes=1)
    return moment


# A page showing several units fills one of these as it computes them: a unit computed after
# its sending units takes their states as they are, so their patients are asked of their
# models once (app/forecast/transfers.AtHand, app/forecast/stay_grid.py).
AtHand = dict[str, tuple[UnitState, dict[str, Any] | None]]


def current(session: Session, unit: str, *, as_of: datetime | None = None,
            days: int = 7, at_hand: AtHand | None = None) -> Shown:
    """The forecast for ``unit`` now (to the minute) or at ``as_of``; ``at_hand`` (a page
    showing several units) gains this unit's state when it is computed here."""
    markers = repo.data_markers(session)
    if as_of is None:
        moment = forecast_moment(current_time().astimezone(UTC), markers.written_at)
    else:
        moment = as_of.astimezone(UTC)
    where = str(session.get_bind().engine.url)
    record: ModelRecord | None = None
    problem = None
    try:
        record = model_for(session, unit, moment)
    except NoModel as exc:
        problem = str(exc)
    model_id = None if record is None else record.id
    key = (where, unit, model_id, moment, days, markers.latest)
    with _lock:
        if key in _cache:
            _cache.move_to_end(key)
            return _cache[key]
    # One computation at a time: when the minute turns, ten clients at a huddle would
    # otherwise all compute the same forecast at once.
    with _compute_lock:
        with _lock:
            if key in _cache:
                return _cache[key]
        backdrop, state = _backdrop(session, (where, unit, model_id, moment, days,
                                              markers.structure), record, days, at_hand)
        if record is None or backdrop is None:
            shown = Shown(None, state, problem)
        else:
            forecast, inputs = forecast_on(backdrop, state, record)
            shown = Shown(forecast, state, None, expected_admissions(inputs))
        _remember(key, shown)
        if at_hand is not None:
            at_hand[unit] = (state, None if record is None else record.payload)
    if as_of is None and record is not None:
        _store_now_and_then(session, shown.forecast, (where, unit, record.id), moment)
    return shown


def _backdrop(session: Session, key: tuple[Any, ...], record: ModelRecord | None, days: int,
              at_hand: AtHand | None = None) -> tuple[Backdrop | None, UnitState]:
    """The forecast's backdrop (None without a model) and a state with the current
    observations. Only scores came in since the backdrop was made when its key (with the
    structure marker) is unchanged, so only the observations are read again."""
    found = _backdrops.get(key)
    if found is None:
        _, unit, _, moment, _, _ = key
        state = forecast_state(session, unit, moment, get_settings().tz,
                               None if record is None else record.payload)
        backdrop = None if record is None else forecast_backdrop(
            state, record, days=days, senders=senders_of(session, state, record, at_hand))
        _backdrops[key] = (backdrop, state)
        while len(_backdrops) > BACKDROPS:
            _backdrops.popitem(last=False)
        return backdrop, state
    _backdrops.move_to_end(key)
    backdrop, state = found
    return backdrop, with_current_observations(session, state)


def _remember(key: tuple[Any, ...], shown: Shown) -> None:
    with _lock:
        _cache[key] = shown
        while len(_cache) > CACHE_SIZE:
            _cache.popitem(last=False)


def _store_now_and_then(session: Session, forecast: dict[str, Any] | None,
                        key: tuple[Any, ...], moment: datetime) -> None:
    """Store the first forecast of each clock hour per unit and model. Several workers may
    try at once: the database keeps one (a unique index) and the others step back.

    It is stored in a transaction of its own on a second connection, committed at once: in
    the page's session the INSERT held SQLite's write lock until the page was rendered (on
    the home page, through every other unit's forecast), and every writer waited. Only pages
    call this, and they have written nothing before, so the second connection never waits
    for a lock its own request holds. A busy database skips it: the next view stores it."""
    if forecast is None:
        return
    hour = moment.replace(minute=0, second=0, microsecond=0)
    if _stored.get(key) == hour:
        return
    try:
        with Session(session.get_bind()) as own, own.begin():
            store_forecast(own, forecast, origin="page", hour=hour)
    except IntegrityError:
        pass  # this hour's forecast is stored already
    except OperationalError as exc:
        if not is_busy(exc):
            raise
        return
    _stored[key] = hour
