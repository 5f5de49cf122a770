"""Score entry on the unit page: record, correct and withdraw, answered at the patient's row.

A nurse types a value (and, if not now, when it was observed) in the patient's row. The
answer comes back to that row: the page is sent again with the outcome in the address
(``entered``, ``outcome``, ``message`` and, for a refusal, the value and time typed, so they
stay in the boxes), signed with the server's key so a link made elsewhere cannot show a false
"recorded". Without JavaScript this is the whole mechanism; ``static/scores.js`` only moves
the focus to the answer so a screen reader reads it at once.

Every entry goes through ``import_file`` (the checks of an imported file) and writes an
audit event naming the patient, the bed, the score and the values before and after. A
correction is a new row (DEVELOPERS.md, "Corrections"); a withdrawal is a new row with
``withdrawn`` set (``app.ingest.score_entries``); nothing is deleted.
"""

from __future__ import annotations

import hashlib
import hmac
import json
from datetime import datetime
from typing import Annotated, Any
from urllib.parse import quote, urlencode

from fastapi import APIRouter, Form, HTTPException, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response

from app import bounds, score_names
from app.config import current_time, get_settings
from app.ingest import ImportRefused, import_file
from app.ingest import parse as p
from app.ingest.score_entries import NothingToWithdraw, latest, measurements, withdraw
from app.store import repo
from app.store.audit import record_audit
from app.timeutil import parse_timestamp
from app.web.deps import SessionDep
from app.web.security import ReadActor, ScoresActor
from app.web.templating import templates

router = APIRouter()

# Offered in every row; a site-defined score already recorded on the unit is added to them.
SCORE_CHOICES = ("sofa", "news2", "apache_ii", "fit_for_discharge")
# The datetime-local box's format: the site's wall clock to the minute.
INPUT_MINUTE = "%Y-%m-%dT%H:%M"
RESULT_FIELDS = ("entered", "outcome", "message", "name", "value", "observed_at")
Text = Annotated[str, Form(max_length=200)]


# -- the answer at the row ---------------------------------------------------------------------

def _signature(request: Request, fields: dict[str, str]) -> str:
    payload = json.dumps({k: fields.get(k, "") for k in RESULT_FIELDS}, sort_keys=True)
    key: bytes = request.app.state.csrf_key
    return hmac.new(key, f"row-result:{payload}".encode(), hashlib.sha256).hexdigest()[:32]


def _to_row(request: Request, unit: str, stay_id: str, outcome: str, message: str,
            **kept: str) -> RedirectResponse:
    """Back to the unit page at the patient's row, with the outcome for that row."""
    fields = {"entered": stay_id, "outcome": outcome, "message": message,
              **{k: v for k, v in kept.items() if v}}
    fields["sig"] = _signature(request, fields)
    # The fragment is the answer itself (focusable): the browser scrolls to it and moves the
    # focus there, so a screen reader reads it even without JavaScript.
    return RedirectResponse(f"/units/{quote(unit, safe='')}?{urlencode(fields)}"
                            f"#result-{quote(stay_id, safe='')}", status_code=303)


def row_result(request: Request) -> dict[str, str] | None:
    """The outcome for one row from the page's address, when the server signed it."""
    fields = {k: request.query_params.get(k, "") for k in RESULT_FIELDS}
    if not fields["entered"] or fields["outcome"] not in ("recorded", "refused"):
        return None
    # As bytes: compare_digest raises TypeError on a non-ASCII ``sig`` (a 500).
    given = request.query_params.get("sig", "").encode("utf-8", "replace")
    expected = _signature(request, {k: v for k, v in fields.items() if v}).encode("utf-8")
    if not hmac.compare_digest(given, expected):
        return None
    return fields


def page_context(request: Request, names: list[str], now: datetime) -> dict[str, Any]:
    """What the unit page's score cells need (added to its context by ``pages.unit_page``)."""
    choices = list(SCORE_CHOICES) + sorted(n for n in names if n not in SCORE_CHOICES)
    local = now.astimezone(get_settings().tz)
    return {"row_result": row_result(request),
            "score_options": [(n, score_names.label_with_range(n)) for n in choices],
            "now_input": local.strftime(INPUT_MINUTE)}


def _where(session: SessionDep, unit: str, stay_id: str) -> str:
    """How messages name the patient: their bed, or the stay when no bed is known."""
    bed = repo.latest_beds(session, unit, [stay_id]).get(stay_id)
    return f"bed {bed}" if bed else f"stay {stay_id}"


def _when(moment: datetime) -> str:
    return moment.astimezone(get_settings().tz).strftime("%a %d %b %H:%M")


def _value_text(value: float) -> str:
    return f"{value:g}"


def _unit_or_404(session: SessionDep, unit: str) -> None:
    if repo.get_unit(session, unit) is None:
        raise HTTPException(status_code=404, detail=f"There is no unit {unit}.")


# -- record or correct -------------------------------------------------------------------------

@router.post("/units/{unit}/scores")
def enter_score(request: Request, unit: str, session: SessionDep, actor: ScoresActor,
                stay_id: Text, name: Text, value: Text = "", observed_at: Text = "") -> Response:
    """A score or flag from the nurse in charge, through the same checks as an import; a value
    for a time that already has one is a correction."""
    _unit_or_404(session, unit)
    tz = get_settings().tz
    now = current_time().replace(microsecond=0)
    name = name.strip().lower()
    where = _where(session, unit, stay_id)
    kept = {"name": name, "value": value.strip()[:50], "observed_at": observed_at.strip()[:40]}

    def refused(why: str) -> RedirectResponse:
        return _to_row(request, unit, stay_id, "refused",
                       f"Not recorded for {where}: {why}.", **kept)

    if not repo.stay_in_unit(session, unit, stay_id, now):
        return refused(f"this patient is not in {unit} now")
    try:
        name = p.identifier(name)
        if not name or not all(ch.isalnum() or ch == "_" for ch in name) or not name.isascii():
            raise ValueError
    except ValueError:
        return refused("choose a score from the list")
    try:
        number: float | None = p.number(value)
    except ValueError:
        number = None
    why = score_names.problem(name, number)
    if why is not None:
        return refused(why)
    assert number is not None
    try:
        observed = parse_timestamp(observed_at, tz) if observed_at.strip() else now
        bounds.check_observed_at(observed, now, tz)
    except bounds.OutOfBounds as exc:
        return refused(str(exc))
    except ValueError:
        return refused("the observation time is not a date and time")
    before = latest(session, stay_id, name, observed)
    data = _one_row(stay_id, observed, name, value.strip(), now)
    try:
        result = import_file(session, "observations", data, "score entry form", tz=tz,
                             actor=actor.username)
    except ImportRefused as problem:
        return refused("; ".join(_plain(x.column, x.why) for x in problem.problems))
    label = score_names.label(name)
    shown = f"{label} {_value_text(number)}"
    if result.inserted == 0:
        return _to_row(request, unit, stay_id, "recorded",
                       f"{shown} was already recorded for {where}, observed {_when(observed)}; "
                       "nothing changed.")
    corrects = before is not None and not before.withdrawn
    record_audit(session, actor.username, "correct" if corrects else "insert", "observation",
                 f"{stay_id} {name} {observed.isoformat()}",
                 {"value": before.value} if corrects and before else None,
                 {"stay_id": stay_id, "unit": unit, "bed": where.removeprefix("bed ")
                  if where.startswith("bed ") else None, "name": name, "value": number,
                  "observed_at": observed.isoformat()}, batch_id=result.batch_id)
    tail = f" (corrects {_value_text(before.value)})" if corrects and before else ""
    return _to_row(request, unit, stay_id, "recorded",
                   f"{shown} recorded for {where}, observed {_when(observed)}{tail}.")


def _one_row(stay_id: str, observed: datetime, name: str, value: str, now: datetime) -> bytes:
    from app.web.pages import _one_row_csv

    return _one_row_csv(["stay_id", "observed_at", "name", "value", "recorded_at"],
                        [stay_id, observed.isoformat(), name, value, now.isoformat()])


def _plain(column: str | None, why: str) -> str:
    """An importer's problem in the words of the form."""
    if column == "observed_at" and "before the stay's admission" in why:
        return "the observation time is before this patient's admission"
    if column == "observed_at":
        return f"observation time: {why}"
    return why


# -- withdraw ------------------------------------------------------------------------------------

@router.post("/units/{unit}/scores/withdraw")
def withdraw_score(request: Request, unit: str, session: SessionDep, actor: ScoresActor,
                   stay_id: Text, name: Text, observed_at: Text) -> Response:
    """Withdraw one measurement's value (entered for the wrong patient, say): kept on record."""
    _unit_or_404(session, unit)
    now = current_time().replace(microsecond=0)
    where = _where(session, unit, stay_id)
    label = score_names.label(name)
    try:
        observed = bounds.check_instant(parse_timestamp(observed_at, get_settings().tz),
                                        "observation time", latest=bounds.latest_event(now))
    except ValueError as exc:  # not a timestamp, or outside what can be stored
        why = (str(exc) if isinstance(exc, bounds.OutOfBounds)
               else "observation time: not a date and time")
        raise HTTPException(status_code=422, detail=why) from None
    if not repo.stay_in_unit(session, unit, stay_id, now):
        return _to_row(request, unit, stay_id, "refused",
                       f"Not withdrawn for {where}: this patient is not in {unit} now.")
    try:
        entry = withdraw(session, stay_id, name, observed, recorded_at=now,
                         actor=actor.username,
                         details={"unit": unit, "bed": where.removeprefix("bed ")
                                  if where.startswith("bed ") else None})
    except NothingToWithdraw:
        return _to_row(request, unit, stay_id, "refused",
                       f"Not withdrawn for {where}: no {label} observed {_when(observed)} "
                       "is stored.")
    return _to_row(request, unit, stay_id, "recorded",
                   f"{label} {_value_text(entry.value)} observed {_when(observed)} withdrawn "
                   f"for {where}; it no longer counts.")


# -- history ---------------------------------------------------------------------------------------

@router.get("/units/{unit}/stays/{stay_id}/scores", response_class=HTMLResponse)
def score_history(request: Request, unit: str, stay_id: str, session: SessionDep,
                  actor: ReadActor) -> Response:
    """Every score of one patient: each measurement's current value and the entries behind
    it (corrections and withdrawals included), with correct and withdraw for nurses."""
    _unit_or_404(session, unit)
    now = current_time().replace(microsecond=0)
    if not repo.stay_in_unit(session, unit, stay_id, now):
        raise HTTPException(status_code=404, detail=f"No patient {stay_id} is in {unit} now.")
    where = _where(session, unit, stay_id)
    rows = measurements(session, stay_id)
    tz = get_settings().tz
    for row in rows:
        row["label"] = score_names.label_with_range(row["name"])
        row["iso"] = row["observed_at"].isoformat()
        row["local"] = row["observed_at"].astimezone(tz)
    return templates.TemplateResponse(request, "scores.html", {
        "unit": unit, "stay_id": stay_id, "where": where, "measurements": rows})
