"""The model page: the tree, each patient group's stay curve, test metrics, backtests and how
past forecasts compared with what happened."""

from __future__ import annotations

import json
import math
from typing import Any

import numpy as np
import pandas as pd
from fastapi import APIRouter, HTTPException, Request
from fastapi.responses import HTMLResponse, Response
from sqlalchemy import select

from app.config import current_time, get_settings
from app.forecast.los import LosModel
from app.forecast.models import newest_model
from app.state import load_state
from app.store import repo
from app.store.models import BacktestRun, StoredForecast
from app.web import figures
from app.web.deps import SessionDep
from app.web.security import ReadActor
from app.web.templating import templates

router = APIRouter()
PAST_FORECASTS = 30


def _tree_nodes(los: LosModel) -> list[dict[str, Any]]:
    """The hazard tree, depth first, each node with its rule, size and implied median stay."""
    tree = los.hazard.tree
    out: list[dict[str, Any]] = []

    def visit(node: int, depth: int) -> None:
        rate = float(tree.value[node])
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


def _past_forecasts(session: SessionDep, unit: str) -> list[dict[str, Any]]:
    """Stored forecasts whose census nights have passed, beside the census that followed."""
    rows = session.scalars(select(StoredForecast).where(StoredForecast.unit == unit)
                           .order_by(StoredForecast.as_of.desc()).limit(PAST_FORECASTS)).all()
    if not rows:
        return []
    now = current_time()
    state = load_state(session, unit, now, get_settings().tz, with_history=True)
    out = []
    for row in rows:
        forecast = json.loads(row.payload)
        for day in forecast["days"][:1]:
            census = pd.Timestamp(day["census_at"]).tz_convert("UTC")
            if census > state.as_of:
                continue
            actual = state.occupancy_at(census)
            q = day["quantiles"]
            out.append({"as_of": forecast["as_of"], "census_at": day["census_at"],
                        "median": q["0.5"], "band80": (q["0.1"], q["0.9"]), "actual": actual,
                        "inside": q["0.1"] <= actual <= q["0.9"]})
    return out


@router.get("/units/{unit}/model", response_class=HTMLResponse)
def model_page(request: Request, unit: str, session: SessionDep, actor: ReadActor) -> Response:
    """How the unit's model works and how good it has been."""
    if repo.get_unit(session, unit) is None:
        raise HTTPException(status_code=404, detail=f"unit {unit} is not known")
    found = newest_model(session, unit, current_time())
    context: dict[str, Any] = {"unit": unit, "model": None}
    if found is not None:
        model_id, trained_until, payload = found
        los = LosModel.from_payload(payload)
        context.update({
            "model": {"id": model_id, "trained_until": trained_until,
                      "window": payload.get("window"), "uses": payload["los"].get("uses", {})},
            "metrics": payload.get("metrics", {}), "nodes": _tree_nodes(los),
            "groups": _groups(los),
            "arrivals": payload.get("arrivals", {}),
        })
    run = session.scalars(select(BacktestRun).where(BacktestRun.unit == unit)
                          .order_by(BacktestRun.created_at.desc()).limit(1)).first()
    if run is not None:
        result = json.loads(run.result)
        context["backtest"] = result
        pit = result.get("pit", {}).get("morrow", [])
        context["pit_json"] = json.dumps(figures.pit_histogram(pit))
    context["past"] = _past_forecasts(session, unit)
    return templates.TemplateResponse(request, "model.html", context)
