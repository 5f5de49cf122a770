"""The model page: the tree, each patient group's stay curve, test metrics, backtests and how
past forecasts compared with what happened."""

from __future__ import annotations

import json
import math
from datetime import datetime
from typing import Any

import numpy as np
from fastapi import APIRouter, HTTPException, Request
from fastapi.responses import HTMLResponse, Response
from sqlalchemy import func, select

from app.bounded_cache import BoundedCache
from app.config import current_time, get_settings
from app.forecast import backtest_jobs
from app.forecast.backtest_jobs import (
    DEFAULT_SPAN,
    SPAN_CHOICES,
    backtest_span,
    latest_finished,
)
from app.forecast.los import LosModel
from app.forecast.models import newest_model
from app.forecast.routing import Routing
from app.store import repo
from app.store.models import StoredForecast
from app.web import figures, model_track
from app.web.deps import SessionDep
from app.web.security import ReadActor
from app.web.templating import templates

router = APIRouter()


def _tree_nodes(los: LosModel) -> list[dict[str, Any]]:
    """The hazard tree, depth first, each node with its rule, size and implied median stay."""
    tree = los.hazard.tree
    out: list[dict[str, Any]] = []

    def visit(node: int, depth: int) -> None:
        rate = float(tree.value[node]) * los.scale     # as the forecast uses it
        leaf = bool(tree.left[node] < 0)
        out.append({"node": node, "depth": depth, "leaf": leaf,
                    "rule": tree.rule(node), "size": float(tree.weight[node]),
                    "p_leave_day": 1 - math.exp(-rate) if rate > 0 else 0.0,
                    "median_days": math.log(2) / rate if rate > 0 else None})
        if not leaf:
            visit(int(tree.left[node]), depth + 1)
            visit(int(tree.right[node]), depth + 1)

    visit(0, 0)
    return out


def _groups(los: LosModel) -> list[dict[str, Any]]:
    out = []
    for g in los.groups.groups:
        km = g.km
        grid = np.linspace(0, max(float(g.longest_days), 1.0), 200)
        fitted = np.asarray(g.distribution.sf(grid), dtype=float)
        bic = g.coxian.bic_table()
        out.append({
            "rule": g.rule, "n_stays": g.n_stays, "n_ended": g.n_ended,
            "longest": g.longest_days, "phases": g.distribution.n_phases,
            "km_median": km.median(), "mean": g.distribution.mean(),
            "share": g.share, "bic": bic.to_dict(orient="records"),
            "figure": json.dumps(figures.survival_fit(
                {"phases": g.distribution.n_phases}, list(km.time), list(km.survival),
                grid, fitted)),
        })
    return out


def _model_part(los: LosModel, model_id: str, trained_until: Any,
                payload: dict[str, Any]) -> dict[str, Any]:
    """What the page shows of a stored model: it never changes, so it is built once per id."""
    return {
        "model": {"id": model_id, "trained_until": trained_until,
                  "window": payload.get("window"), "uses": payload["los"].get("uses", {})},
        "metrics": payload.get("metrics", {}), "nodes": _tree_nodes(los),
        "groups": _groups(los), "arrivals": payload.get("arrivals", {}),
        "hazard_scale": payload["los"].get("hazard_scale"),
        "routing": _routing(los, payload),
    }


def _routing(los: LosModel, payload: dict[str, Any]) -> dict[str, Any] | None:
    """Where the unit's discharges went, by admission group (app/forecast/routing.py); None
    for a model trained before routing was learnt."""
    routing = Routing.from_payload(payload)
    if routing is None:
        return None
    rules = {g.node: g.rule for g in los.groups.groups}
    return {"destinations": list(routing.destinations), "rows": routing.table(rules),
            "prior": payload["routing"].get("prior_strength"),
            "senders": {u: int(v.get("n", 0)) for u, v in routing.received.items()}}


def _record_part(session: SessionDep, unit: str, now: datetime) -> dict[str, Any]:
    """The track record: stored forecasts beside the census, and the latest backtest."""
    context: dict[str, Any] = {}
    finished = latest_finished(session, unit)
    if finished is not None:
        result = finished[1]
        context["backtest"] = result
        context["verdict"] = model_track.backtest_verdict(result)
        pit = result.get("pit", {}).get("morrow", [])
        context["pit_json"] = json.dumps(figures.pit_histogram(pit))
    past = model_track.past_forecasts(session, unit, get_settings().tz, now)
    context["past"] = past
    context["shown_sentence"] = model_track.shown_sentence(past)
    return context


_cache: BoundedCache[dict[str, Any]] = BoundedCache(32)


def _record_key(session: SessionDep, unit: str, now: datetime,
                runs: list[backtest_jobs.BacktestView]) -> tuple[Any, ...]:
    """What the track record depends on: the data (any write is an import batch), the
    unit's backtests and their states, its stored forecasts, and the hour (a census
    passes)."""
    stored = session.scalar(select(func.max(StoredForecast.id))
                            .where(StoredForecast.unit == unit))
    return (repo.data_markers(session).latest, tuple((r.id, r.state) for r in runs), stored,
            now.replace(minute=0, second=0, microsecond=0))


@router.get("/units/{unit}/model", response_class=HTMLResponse)
def model_page(request: Request, unit: str, session: SessionDep, actor: ReadActor,
               message: str = "") -> Response:
    """How the unit's model works and how good it has been.

    The model's part is kept per model id (a stored model never changes) and the track
    record per data marker, backtest, stored forecast and hour, so only the backtest runs'
    progress is read on every view."""
    if repo.get_unit(session, unit) is None:
        raise HTTPException(status_code=404, detail=f"unit {unit} is not known")
    now = current_time()
    where = str(request.app.state.database_url)
    found = newest_model(session, unit, now)
    context: dict[str, Any] = {"unit": unit, "model": None, "message": message[:300],
                               "glossary": GLOSSARY,
                               "method_names": {"morrow": "Morrow",
                                                **model_track.BASELINE_NAMES}}
    if found is not None:
        model_id, trained_until, payload = found
        context.update(_cache.get_or_build((where, "model", model_id), lambda: _model_part(
            LosModel.from_payload(payload), model_id, trained_until, payload)))
    runs = backtest_jobs.views(session, unit)
    record_key = (where, "record", unit, *_record_key(session, unit, now, runs))
    context.update(_cache.get_or_build(record_key, lambda: _record_part(session, unit, now)))
    active = next((r for r in runs if r.active), None)
    start, end = backtest_span(now, get_settings().tz, DEFAULT_SPAN)
    context.update({"runs": runs, "active": active, "span_choices": SPAN_CHOICES,
                    "default_span": DEFAULT_SPAN, "span_end": end, "span_start": start})
    response = templates.TemplateResponse(request, "model.html", context)
    if active is not None:
        response.headers["Refresh"] = str(REFRESH_S)
    return response


REFRESH_S = 3
# Plain words for every statistical term the page shows (templates/model.html).
GLOSSARY: list[tuple[str, str]] = [
    ("80% band", "The range the forecast expects the census to fall inside 8 times in 10. "
     "If it is right, about 24 of 30 nights land inside; many fewer means the bands are "
     "too narrow, nearly all means they are too wide."),
    ("Median", "The middle of the forecast: the census is as likely to be above it as "
     "below it."),
    ("Backtest", "Replaying past mornings: each forecast is made only from what was known "
     "that morning and then compared with the census that followed."),
    ("CRPS", "Continuous ranked probability score: how far the whole forecast was from "
     "what happened, in patients. It rewards forecasts that are both close and honest "
     "about their spread. Lower is better."),
    ("Error of the median", "How many patients the median missed the census by, on "
     "average."),
    ("PIT", "Probability integral transform: where the census fell within the forecast, "
     "from 0 (below everything it expected) to 1 (above everything). A flat histogram "
     "means the forecast's spread is right; a U shape, too narrow; a hump, too wide."),
    ("Concordance", "Of two patients, how often the one the model gave the higher chance "
     "of leaving left first. 0.5 is guessing, 1 is perfect."),
    ("Integrated Brier score", "The squared gap between the predicted chance of still "
     "being in and what happened (0 or 1), averaged over days 1 to 14. Lower is better."),
    ("Variance explained", "How much of the spread in completed stays' lengths the "
     "model accounts for (0 none, 1 all)."),
    ("Kaplan-Meier", "The share of past patients still in after each number of days, "
     "counting patients still in as 'at least this long'."),
    ("Coxian phase-type", "A smooth stay curve built from a few stages a patient passes "
     "through, each ending in discharge or the next stage."),
    ("BIC", "Bayesian information criterion: how well a curve fits, with a penalty for "
     "each extra part; the lowest value is chosen."),
    ("Log score", "The logarithm of the chance the forecast gave to what actually "
     "happened; higher (closer to 0) is better."),
    ("Days at risk", "Patient-days in a group: each patient counts once for every day "
     "they were in the unit."),
]
