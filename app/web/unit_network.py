"""The unit page's part of the hospital network: where the newcomers at each census come from
(emergency, booked, transfers from each sending unit) and, on a unit that passes patients on,
who is fit to leave but still here, waiting for a bed elsewhere (exit block).

The split reads each forecast day's ``components`` and ``transfers_in`` (DATA_CONTRACT.md,
forecast JSON): transfers are counted inside ``components["emergency"]``, so "emergency
(other)" is that minus their sum. A forecast without ``transfers_in`` (a model trained
before routing) shows no split, and a model without routing shows no waiting panel.
"""

from __future__ import annotations

import math
from datetime import datetime
from typing import Any

from sqlalchemy.orm import Session

from app.forecast.routing import DIED, ELSEWHERE, HOME, Routing
from app.forecast.service import NoModel, model_for
from app.forecast.step_down import admission_groups, waiting_to_step_down
from app.nights import night_of
from app.stats.exit_block import ExitBlock
from app.store import repo
from app.web.forecasts import Shown

# Waits under two days read best in hours, longer ones in days (common practice, no source).
HOURS_UP_TO = 48.0
# Routing's words for places that are not units of the hospital (app/forecast/routing.py).
PLACES = {HOME: "home", ELSEWHERE: "another ward or hospital (not forecast here)",
          DIED: "died"}


def context(session: Session, unit: str, shown: Shown) -> dict[str, Any]:
    """``transfers_in`` (the split by night, or None) and ``step_down`` (the waiting panel,
    or None) for templates/unit.html."""
    return {"transfers_in": shown.view("transfers-in", lambda: transfer_split(shown)),
            "step_down": shown.view("step-down", lambda: _step_down(session, unit, shown))}


def transfer_split(shown: Shown) -> dict[str, Any] | None:
    """Per census night: expected newcomers present by source; None when no day names a
    sending unit."""
    forecast = shown.forecast
    if forecast is None:
        return None
    days = forecast["days"]
    senders = sorted({u for d in days for u, v in (d.get("transfers_in") or {}).items()
                      if v is not None})
    if not senders:
        return None
    state = shown.state
    today = state.as_of.tz_convert(state.tz).date()
    nights, emergency, booked = [], [], []
    transfers: dict[str, list[float]] = {u: [] for u in senders}
    for day in days:
        night = night_of(datetime.fromisoformat(day["census_at"]), state.tz)
        nights.append({"name": night.name, "relative": night.relative_name(today),
                       "census_label": night.census_label})
        moved = {u: float((day.get("transfers_in") or {}).get(u) or 0.0) for u in senders}
        components = day.get("components", {})
        # Rounding in the sums may leave a hair below zero: none came otherwise.
        emergency.append(max(float(components.get("emergency", 0.0)) - sum(moved.values()),
                             0.0))
        booked.append(float(components.get("elective", 0.0)))
        for u in senders:
            transfers[u].append(moved[u])
    return {"nights": nights, "senders": senders, "emergency": emergency, "booked": booked,
            "transfers": transfers,
            "total": [e + b + sum(transfers[u][i] for u in senders)
                      for i, (e, b) in enumerate(zip(emergency, booked, strict=True))]}


def _step_down(session: Session, unit: str, shown: Shown) -> dict[str, Any] | None:
    """The waiting panel, or None: no model, no routing, or a unit whose routing sends no
    patient to another unit of the hospital. Flagged patients whose likeliest next place is
    home are counted, not listed: they wait for a discharge, not for a bed elsewhere."""
    state = shown.state
    try:
        record = model_for(session, unit, state.as_of.to_pydatetime())
    except NoModel:
        return None
    routing = Routing.from_payload(record.payload)
    if routing is None:
        return None
    units = set(routing.receiving_units())
    overall = routing.shares_for(None)
    receiving = sorted(u for u in units if overall.get(u, 0.0) > 0)
    if not receiving:
        return None
    current = state.current_stays()
    beds = repo.latest_beds(session, unit, [str(s) for s in current["stay_id"]])
    groups = admission_groups(record.payload, state)
    flagged = waiting_to_step_down(state, routing, beds=beds, groups=groups)
    # Fit for discharge and likely going home is a discharge, not a step-down to a bed.
    waiting = [w for w in flagged if w.destination != HOME]
    return {"receiving": receiving, "going_home": len(flagged) - len(waiting),
            "held_back": held_back(record.payload), "rows": [{
        "stay_id": w.stay_id, "bed": w.bed, "flagged_at": w.flagged_at.to_pydatetime(),
        "hours": w.hours_waiting, "waited": waited_words(w.hours_waiting),
        "destination": None if w.destination is None else place_words(w.destination, units),
        "share": w.share} for w in waiting]}


def held_back(payload: dict[str, Any]) -> list[dict[str, Any]]:
    """From the model's exit-block estimate (app/forecast/exit_block.py): per receiving unit,
    the typical wait of a patient fit to move there while it had a bed free and while it was
    full (a constant rate's median, ln 2 / rate), with the waits it comes from."""
    out = []
    for code, found in sorted((payload.get("exit_block") or {}).items()):
        block = ExitBlock.from_dict(found)
        room, full = block.with_room.rate, block.when_full.rate
        out.append({
            "unit": code, "waits": block.waits,
            "with_room": None if not room else waited_words(24.0 * math.log(2) / room),
            # Fewer than five moves while full say more as a count than as a typical wait.
            "when_full": None if full is None or block.when_full.events < 5
            else waited_words(24.0 * math.log(2) / full),
            "moved_when_full": block.when_full.events,
            "full_days": block.when_full.exposure_days})
    return out


def waited_words(hours: float) -> str:
    """A wait in whole hours (under an hour, below one) up to two days, then in days to
    one decimal."""
    if hours < 1.0:
        return "under an hour"
    if hours < HOURS_UP_TO:
        whole = int(hours)
        return f"{whole} hour{'s' if whole != 1 else ''}"
    return f"{hours / 24.0:.1f} days"


def place_words(destination: str, units: set[str]) -> str:
    """A routing destination in plain words: a unit's code, or the place it stands for."""
    if destination in units:
        return destination
    return PLACES.get(destination, destination)
