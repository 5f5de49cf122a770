"""The HTTP API: the forecast JSON of the data contract, and score entry for scripts."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, HTTPException, Query, Request
from pydantic import BaseModel, Field

from app import bounds
from app.config import current_time, get_settings
from app.forecast.service import NoModel, forecast
from app.ingest import ImportRefused
from app.ingest.retried import ImportTimedOut, import_once
from app.store import repo
from app.timeutil import parse_timestamp
from app.web.deps import SessionDep
from app.web.forecasts import current
from app.web.pages import _one_row_csv
from app.web.security import ReadActor, ScoresActor

router = APIRouter(prefix="/api")


@router.get("/units")
def units(session: SessionDep, actor: ReadActor) -> list[dict[str, Any]]:
    """Units with their census time and bed plan."""
    return [{"unit": u.code, "census_time": u.census_time,
             "beds": [{"valid_from": None if v is None else v.isoformat(), "beds": b}
                      for v, b in repo.bed_plan(session, u.code)]}
            for u in repo.list_units(session)]


@router.get("/units/{unit}/forecast")
def unit_forecast(unit: str, session: SessionDep, actor: ReadActor,
                  as_of: str | None = None,
                  days: Annotated[int, Query(ge=bounds.MIN_FORECAST_DAYS,
                                             le=bounds.MAX_FORECAST_DAYS)] = 7
                  ) -> dict[str, Any]:
    """The forecast JSON (format 1) from ``as_of`` (default: now) for the next ``days``."""
    if repo.get_unit(session, unit) is None:
        raise HTTPException(status_code=404, detail=f"unit {unit} is not known")
    if as_of is None:
        shown = current(session, unit, days=days)
        if shown.forecast is None:
            raise HTTPException(status_code=409, detail=shown.problem)
        return shown.forecast
    try:
        moment = parse_timestamp(as_of, get_settings().tz)
    except ValueError:
        raise HTTPException(status_code=422,
                            detail=f"as_of {as_of!r} is not an ISO 8601 timestamp") from None
    try:
        bounds.check_as_of(moment, "as_of")
    except bounds.OutOfBounds as exc:
        raise HTTPException(status_code=422, detail=str(exc)) from None
    try:
        return forecast(session, unit, moment, get_settings().tz, days=days)
    except NoModel as exc:
        raise HTTPException(status_code=409, detail=str(exc)) from None


class ScoreIn(BaseModel):
    stay_id: str = Field(min_length=1, max_length=64)
    name: str = Field(min_length=1, max_length=64)
    # A JSON number only (its grammar has ASCII digits alone): a string would be read by
    # Python's float(), which takes "1_2" as 12.
    value: float = Field(strict=True, allow_inf_nan=False)
    observed_at: str | None = None


@router.post("/units/{unit}/observations", status_code=201)
def post_observation(request: Request, unit: str, body: ScoreIn, session: SessionDep,
                     actor: ScoresActor) -> dict[str, Any]:
    """Record one score or flag; returns that stay's updated prediction.

    The score is committed in a transaction of its own before the prediction is computed:
    inside one, SQLite's write lock was held while the forecast was worked out (and while
    this request waited for another page's forecast), and every other writer waited."""
    if repo.get_unit(session, unit) is None:
        raise HTTPException(status_code=404, detail=f"unit {unit} is not known")
    now = current_time().replace(microsecond=0)
    observed = body.observed_at or now.isoformat()
    if body.observed_at is not None:
        # The same bound as the score form's (app/bounds.py): never after now.
        try:
            bounds.check_observed_at(parse_timestamp(body.observed_at, get_settings().tz), now,
                                     get_settings().tz, "observed_at")
        except ValueError as exc:  # OutOfBounds, or not a timestamp at all
            why = str(exc) if isinstance(exc, bounds.OutOfBounds) else "not an ISO 8601 timestamp"
            raise HTTPException(status_code=422, detail=[
                {"column": "observed_at", "value": body.observed_at, "why": why}]) from None
    data = _one_row_csv(["stay_id", "observed_at", "name", "value", "recorded_at"],
                        [body.stay_id, observed, body.name, repr(body.value), now.isoformat()])
    if not repo.stay_in_unit(session, unit, body.stay_id, now):
        raise HTTPException(status_code=422, detail=f"{body.stay_id} is not in {unit} now")
    try:
        import_once(request.app.state.database_url, "observations", data, "api",
                    tz=get_settings().tz, actor=actor.username)
    except ImportRefused as refused:
        raise HTTPException(status_code=422, detail=[
            {"column": p.column, "value": p.value, "why": p.why}
            for p in refused.problems]) from None
    except ImportTimedOut as late:
        raise HTTPException(status_code=503, detail=str(late)) from None
    shown = current(session, unit)
    stay = next((s for s in (shown.forecast or {}).get("stays", [])
                 if s["stay_id"] == body.stay_id), None)
    return {"recorded": True, "stay": stay}
