"""The unit page's alert levels and leaving list: what the colours mean, the plain sentence
for tonight and the week's riskiest night, the learnt ceiling that explains the bands above
the staffed beds, and each patient's chance of leaving by tonight and by the third night.

Everything here is derived from the page's forecast (``app.web.forecasts.Shown``) and the
unit's stored levels; nothing is computed twice per forecast (``Shown.view``).
"""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlalchemy.orm import Session

from app.alert_levels import LIKELY_TO_LEAVE, RISK_TERM, AlertLevels, risk_sentence
from app.forecast.arrivals import excess_beds, passed_on_excess_beds
from app.forecast.service import NoModel, model_for
from app.nights import night_of
from app.store.unit_levels import unit_levels
from app.web.forecasts import Shown

# The leaving list's second column counts the third census night (tonight is the first).
THIRD_NIGHT = 2


def _night_name(census_at: str, shown: Shown) -> str:
    today = shown.state.as_of.tz_convert(shown.state.tz).date()
    return night_of(datetime.fromisoformat(census_at), shown.state.tz).relative_name(today)


def risk_lines(shown: Shown, levels: AlertLevels) -> dict[str, Any]:
    """Tonight's sentence and, when another night is riskier, that night's sentence."""
    forecast = shown.forecast
    if forecast is None or not forecast.get("days"):
        return {}
    days = [d for d in forecast["days"] if d.get("p_over_capacity") is not None]
    if not days:
        return {}
    tonight = forecast["days"][0]
    lines = []
    if tonight.get("p_over_capacity") is not None:
        lines.append(risk_sentence(_night_name(tonight["census_at"], shown),
                                   tonight["p_over_capacity"], tonight["beds"], levels))
    worst = max(days, key=lambda d: d["p_over_capacity"])
    if worst is not tonight and worst["p_over_capacity"] > (tonight.get("p_over_capacity") or 0):
        lines.append("The riskiest night this week is " + risk_sentence(
            _night_name(worst["census_at"], shown), worst["p_over_capacity"], worst["beds"],
            levels))
    return {"risk_lines": lines, "worst_level": levels.level(worst["p_over_capacity"])}


def ceiling(session: Session, shown: Shown, beds_now: int | None) -> dict[str, Any] | None:
    """The learnt ceiling: staffed beds plus the most escalation beds the unit has used."""
    try:
        record = model_for(session, shown.state.unit, shown.state.as_of.to_pydatetime())
    except NoModel:
        return None
    arrivals = record.payload.get("arrivals", {})
    extra = excess_beds(arrivals)
    if extra is None:
        return None
    passed_on = passed_on_excess_beds(arrivals)
    return {"extra": extra, "total": None if beds_now is None else beds_now + extra,
            # Patients passed on by other units, where they come in below another ceiling.
            "passed_on_extra": None if passed_on == extra else passed_on}


def leaving(shown: Shown, patients: list[dict[str, Any]]) -> dict[str, Any]:
    """Each patient's chance of leaving by tonight and by the third night, the group labels,
    and the expected number of leavers among the patients in now (the sum of their chances)."""
    forecast = shown.forecast or {}
    days = forecast.get("days", [])
    # Mid-sentence and in headings: "by tonight", "by Wed night".
    names = [_night_name(d["census_at"], shown).replace("Tonight", "tonight")
             for d in days[:THIRD_NIGHT + 1]]
    rules = sorted({p["group"] for p in patients if p.get("group")})
    label = {rule: f"G{i + 1}" for i, rule in enumerate(rules)}
    rows = []
    for p in patients:
        leave_tonight = None if p["p_tonight"] is None else 1.0 - p["p_tonight"]
        leave_third = None if p["p_day3"] is None else 1.0 - p["p_day3"]
        rows.append({**p, "p_leave_tonight": leave_tonight, "p_leave_third": leave_third,
                     "likely_tonight": leave_tonight is not None
                     and leave_tonight >= LIKELY_TO_LEAVE,
                     "likely_third": leave_third is not None and leave_third >= LIKELY_TO_LEAVE,
                     "group_label": label.get(p.get("group", ""), "")})
    rows.sort(key=lambda r: (-(r["p_leave_tonight"] if r["p_leave_tonight"] is not None
                               else -1.0), -(r["p_leave_third"] or 0.0)))
    known = [r for r in rows if r["p_leave_tonight"] is not None]
    return {
        "leaving_rows": rows,
        "leave_night_names": (names[0] if names else "tonight",
                              names[THIRD_NIGHT] if len(names) > THIRD_NIGHT else "3rd night"),
        "likely_to_leave": LIKELY_TO_LEAVE,
        "likely_leavers": (sum(1 for r in known if r["likely_tonight"]),
                           sum(1 for r in known if r["likely_third"])),
        "expected_leavers": (sum(r["p_leave_tonight"] for r in known),
                             sum(r["p_leave_third"] for r in known
                                 if r["p_leave_third"] is not None)),
        "group_rules": [(label[rule], rule) for rule in rules],
    }


def context(session: Session, unit: str, shown: Shown, patients: list[dict[str, Any]],
            beds_now: int | None) -> dict[str, Any]:
    """What unit.html needs for its legend, sentences, ceiling note and leaving list."""
    levels = unit_levels(session, unit)
    out: dict[str, Any] = {"levels": levels, "risk_term": RISK_TERM}
    out.update(shown.view(f"risk-{levels.warning}-{levels.alarm}",
                          lambda: risk_lines(shown, levels)))
    out["ceiling"] = shown.view(f"ceiling-{beds_now}",
                                lambda: ceiling(session, shown, beds_now))
    out.update(shown.view("leaving", lambda: leaving(shown, patients)))
    return out
