"""The forecast a page shows: computed once per unit, model, minute and data version.

Forecasts are exact convolutions plus 5,000 joint paths, so a page view would otherwise
redo the same work many times a minute at a huddle. Any write (every write is an import
batch) changes the data marker and so the key. A forecast made "now" is stored at most
once an hour per unit and model, to be compared later with the census that followed.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from app.config import current_time, get_settings
from app.forecast.service import (
    NoModel,
    expected_admissions,
    forecast_with_inputs,
    model_for,
    store_forecast,
)
from app.state import UnitState, load_state
from app.store import repo
from app.store.models import StoredForecast

CACHE_SIZE = 64
STORE_EVERY = timedelta(hours=1)


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
_lock = threading.Lock()
_compute_lock = threading.Lock()
_stored: dict[tuple[Any, ...], datetime] = {}


def current(session: Session, unit: str, *, as_of: datetime | None = None,
            days: int = 7) -> Shown:
    """The forecast for ``unit`` now (to the minute) or at ``as_of``."""
    tz = get_settings().tz
    moment = (as_of or current_time()).astimezone(UTC)
    if as_of is None:
        moment = moment.replace(second=0, microsecond=0)
    marker = repo.data_marker(session)
    try:
        record = model_for(session, unit, moment)
    except NoModel as exc:
        key = (str(session.get_bind().url), unit, None, moment, days, marker)
        with _lock:
            if key in _cache:
                return _cache[key]
        shown = Shown(None, load_state(session, unit, moment, tz, with_history=False), str(exc))
        _remember(key, shown)
        return shown
    key = (str(session.get_bind().url), unit, record.id, moment, days, marker)
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
        state = load_state(session, unit, moment, tz, with_history=False)
        forecast, inputs = forecast_with_inputs(state, record, days=days)
        shown = Shown(forecast, state, None, expected_admissions(inputs))
        _remember(key, shown)
    if as_of is None:
        _store_now_and_then(session, shown.forecast, (key[0], unit, record.id, marker), moment)
    return shown


def _remember(key: tuple[Any, ...], shown: Shown) -> None:
    with _lock:
        _cache[key] = shown
        while len(_cache) > CACHE_SIZE:
            _cache.popitem(last=False)


def _store_now_and_then(session: Session, forecast: dict[str, Any] | None,
                        key: tuple[Any, ...], moment: datetime) -> None:
    if forecast is None:
        return
    last = _stored.get(key)
    if last is None:
        last = session.scalar(select(StoredForecast.as_of).where(
            StoredForecast.unit == key[1], StoredForecast.model_id == key[2])
            .order_by(StoredForecast.as_of.desc()).limit(1))
    if last is not None and moment - last < STORE_EVERY:
        return
    store_forecast(session, forecast, origin="page")
    _stored[key] = moment
