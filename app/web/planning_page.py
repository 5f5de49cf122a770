"""The planning page: beds against the chance of finding no bed, and what-if scenarios.

A GET form (nothing is written, so no CSRF token is needed and a result can be bookmarked)
chooses the target, how much to simulate and up to three scenarios. Simulation takes seconds,
so results are kept in-process per (database, unit, model, staffed beds, settings,
scenarios); a new model or bed plan changes the key. The page keeps requests bounded: at most
two years and 20 replications (``morrow plan`` runs anything larger).
"""

from __future__ import annotations

import json
import threading
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from fastapi import APIRouter, HTTPException, Request
from fastapi.responses import HTMLResponse, Response

from app import bounds
from app.bounded_cache import BoundedCache
from app.config import current_time, get_settings
from app.forecast.planning_inputs import UnitDemand, unit_planning_input
from app.forecast.planning_report import (
    PlanSettings,
    arrivals_scenario,
    electives_scenario,
    run_plan,
    share_scenario,
    stay_scenario,
)
from app.forecast.service import NoModel, model_for
from app.stats.planning import WEEKDAYS
from app.stats.planning_scenarios import Scenario
from app.store import repo
from app.web import figures
from app.web.deps import SessionDep
from app.web.security import ReadActor
from app.web.templating import templates

router = APIRouter()

YEARS_CHOICES = (1, 2)
REPLICATION_CHOICES = (10, 20)
DEFAULT_YEARS, DEFAULT_REPLICATIONS, DEFAULT_TARGET_PCT = 1, 10, 5.0
SLOTS = ("1", "2", "3")
SLOT_LETTERS = {"1": "A", "2": "B", "3": "C"}
CACHE_SIZE = 32

_cache: BoundedCache[dict[str, Any]] = BoundedCache(CACHE_SIZE)
_demands: BoundedCache[UnitDemand] = BoundedCache(CACHE_SIZE)
_compute_lock = threading.Lock()


@dataclass
class Slot:
    """One scenario slot of the form, with every field's value (shown again as entered)."""

    key: str
    kind: str
    values: dict[str, str]

    @property
    def letter(self) -> str:
        return SLOT_LETTERS[self.key]


def _defaults(demand: UnitDemand, key: str) -> Slot:
    groups = list(demand.group_rules)
    longest = demand.longest_group()
    other = next((g for g in groups if g != longest), longest)
    kind = {"1": "arrivals", "2": "stay"}.get(key, "none")
    return Slot(key, kind, {"type": "emergency" if "emergency" in
                            demand.baseline.admission_types() else "all",
                            "arrivals": "10", "group": longest, "stay": "-20",
                            "from": longest, "to": other, "share": "20",
                            "day_from": "Mon", "day_to": "Fri", "day_share": "50"})


def _slots(demand: UnitDemand, query: Mapping[str, str]) -> list[Slot]:
    out = []
    for key in SLOTS:
        slot = _defaults(demand, key)
        if "target" in query:  # the form was sent: an absent kind means no scenario
            slot.kind = query.get(f"s{key}", "none")
            for field in slot.values:
                if f"s{key}_{field}" in query:
                    slot.values[field] = query[f"s{key}_{field}"].strip()
        out.append(slot)
    return out


def _number(text: str, label: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise ValueError(f"{label}: {text!r} is not a number") from None
    if value != value or value in (float("inf"), float("-inf")):
        raise ValueError(f"{label}: {text!r} is not a number")
    return value


def _scenario(demand: UnitDemand, slot: Slot) -> Scenario | None:
    v = slot.values
    label = f"Scenario {slot.letter}"
    if slot.kind == "arrivals":
        return arrivals_scenario(demand, v["type"], 1 + _number(v["arrivals"], label) / 100)
    if slot.kind == "stay":
        return stay_scenario(demand, v["group"], 1 + _number(v["stay"], label) / 100)
    if slot.kind == "share":
        return share_scenario(demand, v["from"], v["to"], _number(v["share"], label) / 100)
    if slot.kind == "electives":
        days = {d: i for i, d in enumerate(WEEKDAYS)}
        if v["day_from"] not in days or v["day_to"] not in days:
            raise ValueError(f"{label}: choose weekdays from the list")
        return electives_scenario(demand, days[v["day_from"]], days[v["day_to"]],
                                  _number(v["day_share"], label) / 100)
    if slot.kind == "none":
        return None
    raise ValueError(f"{label}: unknown kind of change {slot.kind!r}")


def _settings(query: Mapping[str, str]) -> tuple[PlanSettings, dict[str, Any]]:
    """Settings from the form, bounded; also the values to show in it again."""
    shown = {"target": query.get("target", f"{DEFAULT_TARGET_PCT:g}"),
             "years": query.get("years", str(DEFAULT_YEARS)),
             "replications": query.get("replications", str(DEFAULT_REPLICATIONS)),
             "compare_at": query.get("compare_at", "").strip()}
    target = _number(shown["target"], "Target")
    if not 0.1 <= target <= 50:
        raise ValueError(f"Target: give a percentage between 0.1 and 50, got {target:g}")
    years = int(_number(shown["years"], "Years"))
    replications = int(_number(shown["replications"], "Replications"))
    if years not in YEARS_CHOICES or replications not in REPLICATION_CHOICES:
        raise ValueError("Choose the years and replications from the lists (larger runs: "
                         "morrow plan on the command line)")
    compare_at = None
    if shown["compare_at"]:
        compare_at = int(_number(shown["compare_at"], "Compare at"))
        if not 1 <= compare_at <= bounds.MAX_BEDS:
            raise ValueError(f"Compare at: give a bed count from 1 to {bounds.MAX_BEDS}, "
                             f"got {compare_at}")
    return PlanSettings(target=target / 100, days=365 * years, replications=replications,
                        compare_at=compare_at), shown


def _demand(session: SessionDep, url: str, unit: str) -> UnitDemand:
    """The unit's planning input, kept per model, data version and day (reading the history
    takes about a second; any import changes the data version)."""
    now = current_time()
    tz = get_settings().tz
    record = model_for(session, unit, now)
    key = (url, unit, record.id, repo.data_marker(session),
           now.astimezone(tz).date())
    return _demands.get_or_build(
        key, lambda: unit_planning_input(session, unit, now, tz, record=record))


def _report(url: str, demand: UnitDemand, settings: PlanSettings,
            scenarios: list[Scenario]) -> dict[str, Any]:
    key = (url, demand.unit, demand.model_id, demand.staffed_beds, settings,
           json.dumps([s.to_dict() for s in scenarios], sort_keys=True))
    found = _cache.get(key)
    if found is not None:
        return found
    # One simulation at a time: a second view of the same plan waits and then reads the cache.
    with _compute_lock:
        found = _cache.get(key)
        if found is not None:
            return found
        report = run_plan(demand, settings, scenarios)
        report["figures"] = {"curve": json.dumps(figures.capacity_curve(report)),
                             "scenarios": json.dumps(figures.scenario_points(report))}
        _cache.put(key, report)
    return report


# -- units together (app/forecast/network_plan.py) ----------------------------------------------

_network_cache: BoundedCache[dict[str, Any]] = BoundedCache(CACHE_SIZE)
NETWORK_EXTRA_CHOICES = (1, 2, 3, 4)


def _network(session: SessionDep, url: str, unit: str, query: Mapping[str, str]
             ) -> dict[str, Any]:
    """The section on planning ``unit`` with another unit: the form's choices and, when one
    was sent, the report (same settings as the page's plan: a year, 10 replications)."""
    from app.forecast.network_plan import (
        NetworkPlanError,
        NetworkSettings,
        network_demand,
        run_network_plan,
    )
    from app.web.network_figure import waiting_against_beds

    others = [u.code for u in repo.list_units(session) if u.code != unit]
    partner = query.get("with_unit", "").strip()
    section: dict[str, Any] = {"others": others, "partner": partner,
                               "more": query.get("more_beds", "2").strip(),
                               "more_in": query.get("more_in", "").strip(),
                               "choices": NETWORK_EXTRA_CHOICES, "report": None,
                               "problem": None}
    if not partner:
        return section
    try:
        if partner not in others:
            raise ValueError(f"Plan together with: choose a unit from the list, not {partner!r}")
        more = int(_number(section["more"], "Extra beds"))
        bounds.check_bed_change(more, "Extra beds")
        if more not in NETWORK_EXTRA_CHOICES:
            raise ValueError("Extra beds: choose from the list (more on the command line: "
                             "morrow plan --units)")
        more_in = section["more_in"] or partner
        if more_in not in (unit, partner):
            raise ValueError("Extra beds in: choose one of the two units")
        section["more_in"] = more_in
        now = current_time()
        pair = [unit, partner]
        records = [model_for(session, u, now).id for u in pair]
        key = (url, tuple(pair), tuple(records), repo.data_marker(session),
               now.astimezone(get_settings().tz).date(), more_in, more)
        cached = _network_cache.get(key)
        if cached is None:
            settings = NetworkSettings(days=365 * DEFAULT_YEARS,
                                       replications=DEFAULT_REPLICATIONS,
                                       changes=((more_in, more),), vary=more_in)
            demand = network_demand(session, pair, now, get_settings().tz,
                                    days=settings.days, replications=settings.replications)
            with _compute_lock:
                cached = run_network_plan(demand, settings)
            cached["figure"] = json.dumps(waiting_against_beds(cached))
            _network_cache.put(key, cached)
        section["report"] = cached
    except NoModel as exc:
        section["problem"] = f"{exc} Planning together needs a trained model for both units."
    except (NetworkPlanError, ValueError) as exc:
        section["problem"] = str(exc)
    return section


def _this_week(session: SessionDep, unit: str) -> dict[str, Any] | None:
    """The unit page's figure for this week (its cached forecast), for the page to set the
    long-run figure beside it; None when there is no forecast now."""
    from app.web import forecasts

    shown = forecasts.current(session, unit)
    if shown.forecast is None or "p_over_capacity_any_day" not in shown.forecast:
        return None
    days = shown.forecast["days"]
    return {"any_night": shown.forecast["p_over_capacity_any_day"], "beds": days[0]["beds"],
            "tonight": days[0].get("p_over_capacity")}


@router.get("/units/{unit}/planning", response_class=HTMLResponse)
def planning_page(request: Request, unit: str, session: SessionDep, actor: ReadActor
                  ) -> Response:
    """Beds needed for a target risk, the capacity curve and scenarios against today."""
    if repo.get_unit(session, unit) is None:
        raise HTTPException(status_code=404, detail=f"unit {unit} is not known")
    context: dict[str, Any] = {"unit": unit, "report": None, "problem": None,
                               "years_choices": YEARS_CHOICES,
                               "replication_choices": REPLICATION_CHOICES,
                               "weekdays": WEEKDAYS}
    url = str(request.app.state.database_url)
    try:
        demand = _demand(session, url, unit)
    except NoModel:
        context["problem"] = (f"No model has been trained for {unit} yet: a bed manager can "
                              "start one under Training runs on the model page. Planning uses "
                              "the trained model's admissions and stays.")
        return templates.TemplateResponse(request, "planning.html", context)
    query = dict(request.query_params)
    slots = _slots(demand, query)
    context.update({"demand": demand, "slots": slots, "groups": demand.groups_table(),
                    "admission_types": demand.baseline.admission_types(),
                    "has_electives": "elective" in demand.baseline.admission_types()})
    try:
        settings, shown = _settings(query)
        context["form"] = shown
        scenarios: list[Scenario] = []
        for slot in slots:
            scenario = _scenario(demand, slot)
            if scenario is not None and scenario.name not in [s.name for s in scenarios]:
                scenarios.append(scenario)
    except ValueError as exc:
        context.setdefault("form", {k: query.get(k, "") for k in
                                    ("target", "years", "replications", "compare_at")})
        context["problem"] = str(exc)
        return templates.TemplateResponse(request, "planning.html", context, status_code=422)
    try:
        context["report"] = _report(url, demand, settings, scenarios)
    except ValueError as exc:  # for example a scenario with no admissions left at all
        context["problem"] = str(exc)
        return templates.TemplateResponse(request, "planning.html", context, status_code=422)
    context["target_label"] = f"{settings.target * 100:g}%"
    context["this_week"] = _this_week(session, unit)
    context["network"] = _network(session, url, unit, query)
    status = 422 if context["network"]["problem"] else 200
    return templates.TemplateResponse(request, "planning.html", context, status_code=status)
