"""The unit page (morning huddle), score entry, booking check and data upload."""

from __future__ import annotations

import csv
import io
import json
from datetime import datetime, timedelta
from typing import Annotated, Any

from fastapi import APIRouter, File, Form, HTTPException, Request, UploadFile
from fastapi.responses import HTMLResponse, Response
from sqlalchemy import select

from app.config import current_time, get_settings
from app.feeds.activity import feed_activity
from app.ingest import KINDS, ImportRefused, Problem
from app.ingest.importer import SCORE_RANGES
from app.ingest.retried import IMPORT_TIME_LIMIT_S, ImportTimedOut, import_once
from app.store import repo
from app.store.models import ImportBatch
from app.web import figures, routes_scores, unit_alerts, unit_network
from app.web.deps import SessionDep
from app.web.forecasts import Shown, current
from app.web.security import DataActor, ReadActor
from app.web.templating import templates

router = APIRouter()

SCORE_CHOICES = ("sofa", "news2", "apache_ii", "fit_for_discharge")


def _unit_or_404(session: SessionDep, unit: str) -> None:
    if repo.get_unit(session, unit) is None:
        raise HTTPException(status_code=404, detail=f"unit {unit} is not known")


def _day_rows(shown: Shown) -> list[dict[str, Any]]:
    """Each census day with its bands, risk and expected admissions and discharges."""
    forecast = shown.forecast
    assert forecast is not None
    previous = float(shown.state.occupancy_at(shown.state.as_of))
    rows = []
    admissions: list[float | None] = (list(shown.admissions) if shown.admissions
                                      else [None] * len(forecast["days"]))
    for day, admitted in zip(forecast["days"], admissions, strict=True):
        q = day["quantiles"]
        row = {"date": day["date"], "census_at": day["census_at"], "beds": day["beds"],
               "median": q["0.5"], "band80": (q["0.1"], q["0.9"]),
               "band95": (q["0.025"], q["0.975"]), "mean": day["mean"],
               "p_over": day["p_over_capacity"], "admissions": admitted,
               "discharges": None if admitted is None else previous + admitted - day["mean"]}
        previous = day["mean"]
        rows.append(row)
    return rows


def _patients(session: SessionDep, shown: Shown) -> list[dict[str, Any]]:
    forecast = shown.forecast
    current_stays = shown.state.current_stays()
    beds = repo.latest_beds(session, shown.state.unit, list(current_stays["stay_id"]))
    predictions = {s["stay_id"]: s for s in (forecast or {}).get("stays", [])}
    names = [n for n in SCORE_CHOICES if n in current_stays.columns and n != "fit_for_discharge"]
    out = []
    for row in current_stays.itertuples(index=False):
        stay = row._asdict()
        prediction = predictions.get(stay["stay_id"], {})
        p = prediction.get("p_present", [])
        score_name = next((n for n in names if stay.get(n) == stay.get(n)), None)  # not NaN
        out.append({
            "stay_id": stay["stay_id"], "bed": beds.get(stay["stay_id"], ""),
            "days_in": stay["days_in"], "admission_type": stay["admission_type"],
            "score_name": score_name,
            "score": None if score_name is None else stay[score_name],
            "score_hours": None if score_name is None else stay[f"{score_name}_hours"],
            "fit_for_discharge": stay.get("fit_for_discharge") == 1.0,
            "p_tonight": p[0] if p else None, "p_day3": p[2] if len(p) > 2 else None,
            "median_remaining": prediction.get("median_remaining_days"),
            "group": prediction.get("group", ""),
        })
    out.sort(key=lambda r: (r["p_tonight"] if r["p_tonight"] is not None else 2))
    return out


@router.get("/units/{unit}", response_class=HTMLResponse)
def unit_page(request: Request, unit: str, session: SessionDep, actor: ReadActor,
              entered: str | None = None, message: str | None = None) -> Response:
    """The huddle page: tonight, the week, the patients, score entry and booking check."""
    _unit_or_404(session, unit)
    shown = current(session, unit)
    state = shown.state
    now_local = state.as_of.tz_convert(state.tz)
    beds_now = state.beds_on(now_local.date())
    occupied = state.occupancy_at(state.as_of)
    latest_census = repo.latest_snapshot_at(session, unit)
    context: dict[str, Any] = {
        "unit": unit, "as_of": state.as_of.to_pydatetime(), "beds_now": beds_now,
        "occupied": occupied, "free": None if beds_now is None else beds_now - occupied,
        "problem": shown.problem, "forecast": shown.forecast, "entered": entered,
        "message": message, "patients": shown.view("patients", lambda: _patients(session, shown)),
        "score_choices": SCORE_CHOICES, "score_ranges": SCORE_RANGES,
        "unit_score": next((p["score_name"] for p in shown.view(
            "patients", lambda: _patients(session, shown)) if p["score_name"]), None),
        "latest_census": latest_census,
        "stale_hours": _stale_hours(latest_census, state.as_of.to_pydatetime()),
        "units": [u.code for u in repo.list_units(session)],
        "today": now_local.date().isoformat(),
    }
    forecast = shown.forecast
    if forecast is not None:
        context["days"] = shown.view("days", lambda: _day_rows(shown))
        context["tonight"] = forecast["days"][0]
        context["fan_json"] = shown.view("fan", lambda: json.dumps(figures.fan_chart(
            forecast, occupied, f"now {now_local:%H:%M}")))
    # Score entry: the answer at the entered row, score names with ranges, the time box.
    context.update(routes_scores.page_context(
        request, list(state.observations["name"].unique()), current_time()))
    # Alert levels, the plain sentences, the learnt ceiling and the leaving list.
    context.update(unit_alerts.context(session, unit, shown, context["patients"], beds_now))
    # Newcomers by source (transfers from other units) and the step-down queue (issue 16).
    context.update(unit_network.context(session, unit, shown))
    return templates.TemplateResponse(request, "unit.html", context)


STALE_AFTER = timedelta(hours=26)


def _stale_hours(latest_census: datetime | None, as_of: datetime) -> int | None:
    """Hours since the latest census when more than a day has passed (common practice)."""
    if latest_census is None or as_of - latest_census <= STALE_AFTER:
        return None
    return int((as_of - latest_census).total_seconds() // 3600)


def _one_row_csv(header: list[str], values: list[Any]) -> bytes:
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(header)
    writer.writerow(["" if v is None else v for v in values])
    return out.getvalue().encode("utf-8")


# The booking check and booking: app/web/routes_booking.py.


@router.get("/data", response_class=HTMLResponse)
def data_page(request: Request, session: SessionDep, actor: ReadActor) -> Response:
    """Upload CSV files; import history; units and their staffed beds."""
    return _render_data(request, session, None, None, None)


def _render_data(request: Request, session: SessionDep, problems: Any, result: Any,
                 kind: str | None, status: int = 200) -> Response:
    batches = session.scalars(select(ImportBatch).order_by(ImportBatch.id.desc()).limit(30)).all()
    units = [{"code": u.code, "census_time": u.census_time, "plan": repo.bed_plan(session, u.code)}
             for u in repo.list_units(session)]
    return templates.TemplateResponse(request, "data.html", {
        "kinds": KINDS, "batches": batches, "units": units, "problems": problems,
        "result": result, "kind": kind,
        "feeds": feed_activity(session, current_time(), get_settings().tz),
        "max_mb": get_settings().max_upload_bytes // (1024 * 1024)}, status_code=status)


@router.post("/data/upload", response_class=HTMLResponse)
def upload(request: Request, session: SessionDep, actor: DataActor,
           kind: Annotated[str, Form()], file: Annotated[UploadFile, File()]) -> Response:
    """One CSV file, imported whole or not at all.

    A plain ``def``, so FastAPI runs it in a worker thread: an import takes seconds for a
    large file (longer while another writer holds the lock) and must not hold up the
    requests of everyone else. The import commits in a transaction of its own
    (``import_once``), run again if an identical upload got in first, before this answers.
    """
    if kind not in KINDS:
        raise HTTPException(status_code=422, detail=f"kind must be one of {', '.join(KINDS)}")
    name = (file.filename or f"{kind}.csv")[:200]
    # The request guard (app/web/security.py) refused any body over the upload limit before
    # the form was parsed; the parser spooled the file to disk, read here once.
    data = file.file.read()
    try:
        # Within the request's own time limit, so the page answers before it is given up on.
        result = import_once(request.app.state.database_url, kind, data, name,
                             tz=get_settings().tz, actor=actor.username,
                             limit_s=min(IMPORT_TIME_LIMIT_S, get_settings().request_seconds))
    except ImportRefused as refused:
        return _render_data(request, session, refused.problems, None, kind, status=422)
    except ImportTimedOut as late:
        return _render_data(request, session, [Problem(name, None, None, None, str(late))],
                            None, kind, status=503)
    return _render_data(request, session, None, result, kind)

