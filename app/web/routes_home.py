"""The hospital at a glance (``/``) and its wall-screen form (``/wall``, or ``/?wall=1``).

Every unit in one table, one small chart each, and a hospital total, all from the forecasts
the unit pages show (app/web/forecasts.py), so each unit's tonight figures are its unit
page's own and the page is quick once they are computed. The total's distribution is the
convolution of the units' pmfs for the same night (app/forecast/hospital_total.py).

The wall screen shows the same in large type, reloads itself every few minutes (a
``Refresh`` header, as the training page's: no script needed; the screen was asked for by
its address and says how often it reloads), says when it was made and marks data that has
gone stale.
"""

from __future__ import annotations

import json
from datetime import UTC, datetime
from typing import Annotated, Any

from fastapi import APIRouter, HTTPException, Query, Request
from fastapi.responses import HTMLResponse, Response

from app import bounds
from app.alert_levels import RISK_TERM, AlertLevels, levels_of
from app.config import current_time, get_settings
from app.forecast.hospital_total import NightTotal, nights_of, total_by_night
from app.store import repo
from app.store.models import Unit
from app.web import forecasts
from app.web.deps import SessionDep
from app.web.fan_chart import fan_figure
from app.web.pages import STALE_AFTER
from app.web.security import ReadActor
from app.web.templating import templates

router = APIRouter()

# A unit's data is stale when its latest census is older than the unit page's limit (a day
# and a bit: one census a day, plus two hours' grace; common practice, no source).


def _as_utc(value: datetime | None) -> datetime | None:
    if value is None:
        return None
    return value.replace(tzinfo=UTC) if value.tzinfo is None else value.astimezone(UTC)


def stale_hours(latest: datetime | None, now: datetime) -> int | None:
    """Whole hours since ``latest`` when more than STALE_AFTER has passed, else None."""
    latest = _as_utc(latest)
    if latest is None or now - latest <= STALE_AFTER:
        return None
    return int((now - latest).total_seconds() // 3600)


def _unit_row(session: SessionDep, unit: Unit, wall: bool, at_hand: forecasts.AtHand
              ) -> dict[str, Any]:
    """One unit's figures now and tonight, its week's risk and its small chart."""
    shown = forecasts.current(session, unit.code, at_hand=at_hand)
    state = shown.state
    now_local = state.as_of.tz_convert(state.tz)
    today = now_local.date()
    beds_now = state.beds_on(today)
    occupied = int(state.occupancy_at(state.as_of))
    levels = levels_of(unit.warning_level, unit.alarm_level)
    latest_census = _as_utc(repo.latest_snapshot_at(session, unit.code))
    row: dict[str, Any] = {
        "code": unit.code, "census_time": unit.census_time, "beds_now": beds_now,
        "occupied": occupied, "free": None if beds_now is None else beds_now - occupied,
        "levels": levels, "latest_census": latest_census,
        "stale_hours": stale_hours(latest_census, state.as_of.to_pydatetime()),
        "problem": shown.problem, "forecast": shown.forecast,
    }
    forecast = shown.forecast
    if forecast is None or not forecast["days"]:
        return row
    days = forecast["days"]
    nights = nights_of(forecast, state.tz)
    tonight = days[0]
    q = tonight["quantiles"]
    admitted = shown.admissions[0] if shown.admissions else None
    row.update({
        "night": nights[0], "night_label": nights[0].relative_name(today),
        "median": q["0.5"], "band80": (q["0.1"], q["0.9"]), "beds_tonight": tonight["beds"],
        "p_tonight": tonight["p_over_capacity"],
        "p_week": forecast.get("p_over_capacity_any_day"),
        "admissions": admitted,
        # As the unit page's day table: now + admissions - the expected census.
        "discharges": None if admitted is None else occupied + admitted - tonight["mean"],
        "chart_json": shown.view(f"home-chart-{wall}", lambda: json.dumps(fan_figure(
            forecast, occupied, state.tz, small=True, wall=wall))),
    })
    rated = [(d["p_over_capacity"], n) for d, n in zip(days, nights, strict=True)
             if d["p_over_capacity"] is not None]
    if rated:
        p, night = max(rated, key=lambda r: r[0])  # the earliest of equal nights
        row["worst"] = {"name": night.relative_name(today), "census": night.census_label,
                        "p_over": p}
    return row


def _total(rows: list[dict[str, Any]]) -> dict[str, Any]:
    """The hospital's figures: sums where sums are right (beds, patients, expected counts),
    the convolution of the units' pmfs for tonight's census and the riskiest night."""
    with_forecast = {r["code"]: r["forecast"] for r in rows if r.get("forecast")}
    nights: list[NightTotal] = total_by_night(with_forecast, get_settings().tz)

    def summed(key: str) -> float | None:
        values = [r.get(key) for r in rows]
        known = [v for v in values if v is not None]
        return sum(known) if len(known) == len(values) else None

    out: dict[str, Any] = {
        "beds_now": summed("beds_now"), "occupied": summed("occupied"), "free": summed("free"),
        "admissions": summed("admissions"), "discharges": summed("discharges"),
        "units": sorted(with_forecast), "left_out": [r["code"] for r in rows
                                                     if not r.get("forecast")],
        "nights": nights,
    }
    if nights:
        out["tonight"] = nights[0]
        rated = [n for n in nights if n.p_over is not None]
        if rated:
            out["worst"] = worst = max(rated, key=lambda n: n.p_over or 0.0)
            today = current_time().astimezone(get_settings().tz).date()
            out["worst_name"] = worst.night.relative_name(today)
    return out


def _render(request: Request, session: SessionDep, wall: bool, refresh: int) -> Response:
    try:
        bounds.check_wall_refresh(refresh)
    except bounds.OutOfBounds as exc:
        raise HTTPException(status_code=422, detail=str(exc)) from None
    units = repo.list_units(session)
    at_hand: forecasts.AtHand = {}      # senders' states for the units after them
    rows = [_unit_row(session, unit, wall, at_hand) for unit in units]
    now = current_time()
    markers = repo.data_markers(session)
    # Levels for the total: the site's defaults (each unit is coloured by its own).
    total_levels = AlertLevels()
    context: dict[str, Any] = {
        "units": rows, "total": _total(rows) if rows else None, "wall": wall,
        "refresh": refresh, "refresh_minutes": refresh / 60, "made_at": datetime.now(UTC),
        "as_of": now, "latest_import": markers.written_at,
        "stale": [r for r in rows if r["stale_hours"] is not None],
        "risk_term": RISK_TERM, "total_levels": total_levels,
        "stale_after_hours": int(STALE_AFTER.total_seconds() // 3600),
    }
    response = templates.TemplateResponse(request, "wall.html" if wall else "home.html",
                                          context)
    if wall:
        response.headers["Refresh"] = str(refresh)
    return response


@router.get("/", response_class=HTMLResponse)
def home(request: Request, session: SessionDep, actor: ReadActor, wall: bool = False,
         refresh: Annotated[int, Query()] = bounds.WALL_REFRESH_S) -> Response:
    """Every unit at a glance: now, tonight, the week's risk, and the hospital's total."""
    return _render(request, session, wall, refresh)


@router.get("/wall", response_class=HTMLResponse)
def wall_screen(request: Request, session: SessionDep, actor: ReadActor,
                refresh: Annotated[int, Query()] = bounds.WALL_REFRESH_S) -> Response:
    """The home page for a big screen: large type, reloads itself every ``refresh`` s."""
    return _render(request, session, True, refresh)
