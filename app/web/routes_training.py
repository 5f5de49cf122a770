"""Training from the model page: a bed manager starts a run, everyone sees how far it is.

The fit runs in a process of its own (app/forecast/training_jobs.py); these routes only
record the request, start that process and read its progress, so no page waits for it.
While a run is going the page reloads itself every few seconds (a ``Refresh`` header: the
Content-Security-Policy allows no inline script).
"""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any
from urllib.parse import urlencode

from fastapi import APIRouter, HTTPException, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response

from app.config import current_time
from app.forecast.training_jobs import (
    RunView,
    TrainingBusy,
    cancel_training,
    describe,
    last_duration,
    recent_runs,
    request_training,
    start_process,
)
from app.store import repo
from app.web.deps import RowId, SessionDep
from app.web.security import DataActor, ReadActor, form_origin
from app.web.templating import templates

router = APIRouter()
REFRESH_S = 3


def _runs(session: SessionDep, unit: str) -> list[RunView]:
    if repo.get_unit(session, unit) is None:
        raise HTTPException(status_code=404, detail=f"unit {unit} is not known")
    expected = last_duration(session, unit)
    now = datetime.now(UTC)  # elapsed time is real time, also when replaying (MORROW_NOW)
    return [describe(run, now, expected) for run in recent_runs(session, unit)]


@router.get("/units/{unit}/training", response_class=HTMLResponse)
def training_page(request: Request, unit: str, session: SessionDep, actor: ReadActor,
                  message: str = "") -> Response:
    """The unit's training runs; the bed manager starts one here."""
    runs = _runs(session, unit)
    active = next((r for r in runs if r.active), None)
    response = templates.TemplateResponse(request, "training.html", {
        "unit": unit, "runs": runs, "active": active, "message": message[:300],
        "until": current_time()})
    if active is not None:
        response.headers["Refresh"] = str(REFRESH_S)
    return response


@router.post("/units/{unit}/training")
def start_training(request: Request, unit: str, session: SessionDep,
                   actor: DataActor) -> Response:
    """Start a training run on what is known now, in a process of its own."""
    if repo.get_unit(session, unit) is None:
        raise HTTPException(status_code=404, detail=f"unit {unit} is not known")
    url = request.app.state.database_url
    try:
        run_id = request_training(url, unit, actor.username, current_time(),
                                  form=form_origin(request))
    except TrainingBusy as busy:
        return _back(unit, f"not started: {busy}")
    start_process(url, run_id)
    return _back(unit, f"training run {run_id} started")


@router.post("/units/{unit}/training/{run_id}/cancel")
def stop_training(request: Request, unit: str, run_id: RowId, session: SessionDep,
                  actor: DataActor) -> Response:
    """Ask a queued or running training run to stop."""
    if repo.get_unit(session, unit) is None:
        raise HTTPException(status_code=404, detail=f"unit {unit} is not known")
    stopped = cancel_training(request.app.state.database_url, run_id, actor.username,
                              form=form_origin(request))
    return _back(unit, f"training run {run_id} is stopping" if stopped
                 else f"training run {run_id} was not running")


def _back(unit: str, message: str) -> RedirectResponse:
    return RedirectResponse(f"/units/{unit}/training?{urlencode({'message': message})}",
                            status_code=303)


@router.get("/api/units/{unit}/training")
def training_runs(unit: str, session: SessionDep, actor: ReadActor) -> list[dict[str, Any]]:
    """The unit's latest training runs, newest first, with their progress."""
    return [{"id": r.id, "status": r.status, "stage": r.stage, "requested_by": r.requested_by,
             "requested_at": r.requested_at.isoformat(), "until": r.until.isoformat(),
             "started_at": r.started_at.isoformat() if r.started_at else None,
             "finished_at": r.finished_at.isoformat() if r.finished_at else None,
             "elapsed_s": round(r.elapsed_s, 1), "expected_s": r.expected_s,
             "fraction": r.fraction, "model_id": r.model_id, "message": r.message}
            for r in _runs(session, unit)]
