"""A unit's alert levels: the page that shows and (for a bed manager) sets them, and the API.

The levels are the chance of more patients than staffed beds that the unit's pages colour as
a warning and as an alarm (``app.alert_levels``). The form takes percentages, the API and the
command line chances (0.1 = 10%); all three check them against ``app.bounds`` and store them
through ``app.store.unit_levels``, which audits the change.
"""

from __future__ import annotations

from typing import Annotated, Any
from urllib.parse import quote, urlencode

from fastapi import APIRouter, Form, HTTPException, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from pydantic import BaseModel, Field

from app import bounds
from app.alert_levels import DEFAULT_ALARM, DEFAULT_WARNING, RISK_TERM
from app.ingest.parse import number
from app.store import repo
from app.store.unit_levels import set_unit_levels, unit_levels
from app.web.deps import SessionDep
from app.web.security import DataActor, ReadActor
from app.web.templating import templates

router = APIRouter()


def _known(session: SessionDep, unit: str) -> None:
    if repo.get_unit(session, unit) is None:
        raise HTTPException(status_code=404, detail=f"unit {unit} is not known")


def _render(request: Request, session: SessionDep, unit: str, *, message: str | None = None,
            error: str | None = None, typed: dict[str, str] | None = None,
            status: int = 200) -> Response:
    levels = unit_levels(session, unit)
    stored = repo.get_unit(session, unit)
    own = stored is not None and (stored.warning_level is not None
                                  or stored.alarm_level is not None)
    context: dict[str, Any] = {
        "unit": unit, "levels": levels, "own": own, "message": message, "error": error,
        "risk_term": RISK_TERM, "defaults": (DEFAULT_WARNING, DEFAULT_ALARM),
        "bounds": (bounds.MIN_ALERT_LEVEL, bounds.MAX_ALERT_LEVEL),
        "typed": typed or {"warning": f"{levels.warning * 100:g}",
                           "alarm": f"{levels.alarm * 100:g}"}}
    return templates.TemplateResponse(request, "levels.html", context, status_code=status)


@router.get("/units/{unit}/levels", response_class=HTMLResponse)
def levels_page(request: Request, unit: str, session: SessionDep, actor: ReadActor,
                message: str | None = None) -> Response:
    """The unit's warning and alarm levels, and a form to change them (bed managers)."""
    _known(session, unit)
    return _render(request, session, unit, message=message)


@router.post("/units/{unit}/levels", response_class=HTMLResponse)
def set_levels(request: Request, unit: str, session: SessionDep, actor: DataActor,
               warning: Annotated[str, Form(max_length=20)],
               alarm: Annotated[str, Form(max_length=20)]) -> Response:
    """Store the levels typed as percentages; a refusal comes back on the form, as typed."""
    _known(session, unit)
    typed = {"warning": warning, "alarm": alarm}
    try:
        values = []
        for field, text in (("warning level", warning), ("alarm level", alarm)):
            try:
                values.append(number(text) / 100.0)
            except ValueError:
                raise bounds.OutOfBounds(f"{field}: {text.strip()!r} is not a percentage "
                                         "(type a number such as 10 for 10%)") from None
        levels = set_unit_levels(session, unit, values[0], values[1], actor=actor.username,
                                 form=f"POST /units/{unit}/levels")
    except bounds.OutOfBounds as exc:
        return _render(request, session, unit, error=f"Not saved: {exc}", typed=typed,
                       status=422)
    saved = (f"Saved: warning at {levels.warning * 100:g}%, alarm at {levels.alarm * 100:g}% "
             f"{RISK_TERM}.")
    return RedirectResponse(f"/units/{quote(unit, safe='')}/levels?"
                            f"{urlencode({'message': saved})}", status_code=303)


class LevelsIn(BaseModel):
    warning: float = Field(strict=True, allow_inf_nan=False, description="chance, 0.1 = 10%")
    alarm: float = Field(strict=True, allow_inf_nan=False, description="chance, 0.25 = 25%")


def _levels_json(session: SessionDep, unit: str) -> dict[str, Any]:
    levels = unit_levels(session, unit)
    stored = repo.get_unit(session, unit)
    return {"unit": unit, "warning": levels.warning, "alarm": levels.alarm,
            "defaults": stored is None or (stored.warning_level is None
                                           and stored.alarm_level is None),
            "means": RISK_TERM}


@router.get("/api/units/{unit}/levels")
def api_levels(unit: str, session: SessionDep, actor: ReadActor) -> dict[str, Any]:
    """The unit's alert levels (chances; ``defaults`` true when the site's are used)."""
    _known(session, unit)
    return _levels_json(session, unit)


@router.put("/api/units/{unit}/levels")
def api_set_levels(unit: str, body: LevelsIn, session: SessionDep,
                   actor: DataActor) -> dict[str, Any]:
    """Set the unit's alert levels (chances from 0.01 to 0.99, warning below alarm)."""
    _known(session, unit)
    try:
        set_unit_levels(session, unit, body.warning, body.alarm, actor=actor.username,
                        form=f"PUT /api/units/{unit}/levels")
    except bounds.OutOfBounds as exc:
        raise HTTPException(status_code=422, detail=str(exc)) from None
    return _levels_json(session, unit)
