"""Backtests from the model page: a bed manager starts one, anyone sees how far it is.

As with training (routes_training.py), the replay runs in a process of its own
(app/forecast/backtest_jobs.py); these routes record the request, start that process, or ask
it to stop, then send the browser back to the model page, which shows the progress and
reloads itself while a run is going.
"""

from __future__ import annotations

from urllib.parse import urlencode

from fastapi import APIRouter, Form, HTTPException, Request
from fastapi.responses import RedirectResponse, Response

from app import bounds
from app.config import current_time, get_settings
from app.forecast import backtest_jobs
from app.forecast.backtest_jobs import SPAN_CHOICES, BacktestBusy, backtest_span
from app.store import repo
from app.web.deps import RowId, SessionDep
from app.web.security import DataActor, form_origin

router = APIRouter()


def _known(session: SessionDep, unit: str) -> None:
    if repo.get_unit(session, unit) is None:
        raise HTTPException(status_code=404, detail=f"unit {unit} is not known")


def _back(unit: str, message: str) -> RedirectResponse:
    return RedirectResponse(f"/units/{unit}/model?{urlencode({'message': message})}#backtest-h",
                            status_code=303)


@router.post("/units/{unit}/backtests")
def start_backtest(request: Request, unit: str, session: SessionDep, actor: DataActor,
                   mornings: int = Form(backtest_jobs.DEFAULT_SPAN)) -> Response:
    """Replay the last ``mornings`` mornings whose week has passed, in a process of its own."""
    _known(session, unit)
    if mornings not in SPAN_CHOICES:
        return _back(unit, f"not started: choose {', '.join(map(str, SPAN_CHOICES))} mornings")
    start, end = backtest_span(current_time(), get_settings().tz, mornings)
    try:
        bounds.check_date_range(start, end, "mornings")
    except bounds.OutOfBounds as exc:
        return _back(unit, f"not started: {exc}")
    url = request.app.state.database_url
    try:
        run_id = backtest_jobs.request_backtest(url, unit, actor.username, start, end, 7,
                                                form=form_origin(request))
    except BacktestBusy as busy:
        return _back(unit, f"not started: {busy}")
    backtest_jobs.start_process(url, run_id)
    return _back(unit, f"backtest {run_id} started: {mornings} mornings, "
                       f"{start:%a %d %b} to {end:%a %d %b %Y}")


@router.post("/units/{unit}/backtests/{run_id}/cancel")
def cancel_backtest(request: Request, unit: str, run_id: RowId, session: SessionDep,
                    actor: DataActor) -> Response:
    """Ask a queued or running backtest to stop (it stops after the morning it is on)."""
    _known(session, unit)
    url = request.app.state.database_url
    stopped = backtest_jobs.cancel_backtest(url, run_id, actor.username,
                                            form=form_origin(request))
    return _back(unit, f"backtest {run_id} is stopping" if stopped
                 else f"backtest {run_id} was not running")
