"""The booking check for the surgical scheduler: a verdict against the unit's alert levels,
the best days near the requested one, the booked list with cancel, and booking after a
confirmation step.

GET /units/{unit}/booking checks (and with ``confirm=1`` asks to confirm); POST books (the
same checks as a bookings file, ``import_file``); POST .../bookings/{id}/cancel sets the
booking's ``cancelled_at`` through the same importer, so it is audited with the values
before and after and committed before the answer (``SessionDep``).
"""

from __future__ import annotations

import json
import secrets
from datetime import date, timedelta
from typing import Annotated, Any
from urllib.parse import quote, urlencode

from fastapi import APIRouter, Form, HTTPException, Query, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response

from app import bounds
from app.config import current_time, get_settings
from app.forecast.booking_check import STRIP_DAYS, Candidate, booking_base, booking_check
from app.forecast.booking_verdict import NEAR_DAYS, admission_weekdays, day_label
from app.forecast.service import model_for
from app.ingest import ImportRefused, import_file
from app.store import repo
from app.store.booking_queries import booked_list, elective_weekday_counts, known_specialties
from app.store.models import Booking
from app.store.unit_levels import unit_levels
from app.web import booking_figures
from app.web.deps import SessionDep
from app.web.forecasts import Shown, current
from app.web.pages import _one_row_csv
from app.web.security import BookingsActor, ReadActor
from app.web.templating import templates

router = APIRouter()

WEEKDAYS = ("Monday", "Tuesday", "Wednesday", "Thursday", "Friday", "Saturday", "Sunday")
BOOKING_HEADER = ["booking_id", "unit", "booked_at", "planned_date", "age", "sex", "specialty",
                  "source", "procedure", "cancelled_at"]


def _unit_or_404(session: SessionDep, unit: str) -> None:
    if repo.get_unit(session, unit) is None:
        raise HTTPException(status_code=404, detail=f"unit {unit} is not known")


def _admits_on(session: SessionDep, shown: Shown) -> frozenset[int]:
    """Weekdays the unit admits electives on, learnt from its history (kept per forecast)."""
    state = shown.state
    return shown.view("admits-on", lambda: admission_weekdays(elective_weekday_counts(
        session, state.unit, state.tz, state.as_of.to_pydatetime())))


def _render(request: Request, session: SessionDep, unit: str, form: dict[str, Any], *,
            message: str | None = None, error: str | None = None, confirm: bool = False,
            status: int = 200) -> Response:
    shown = current(session, unit)
    today = shown.state.as_of.tz_convert(shown.state.tz).date()
    levels = unit_levels(session, unit)
    specialties = shown.view("specialties", lambda: known_specialties(session, unit))
    typed = (form.get("specialty") or "").strip().lower()
    admits_on = _admits_on(session, shown)
    context: dict[str, Any] = {
        "unit": unit, "message": message, "error": error, "problem": shown.problem,
        "result": None, "specialties": specialties, "form": form, "today": today,
        "levels": levels, "confirm": False, "strip_days": STRIP_DAYS,
        "unknown_specialty": bool(typed) and typed not in specialties,
        "admits_on": [WEEKDAYS[w] for w in sorted(admits_on)]}
    planned: date | None = form.get("planned_date")
    last = today + timedelta(days=STRIP_DAYS)
    if planned is not None and error is None and shown.forecast is not None:
        try:
            bounds.check_booking_date(planned, today)
        except bounds.OutOfBounds as exc:
            context["error"] = f"Not checked: {exc}"
            status = 422
        else:
            record = model_for(session, unit, shown.state.as_of.to_pydatetime())
            result = booking_check(shown.state, record, Candidate(
                planned, form.get("age"), typed or None,
                (form.get("procedure") or "").strip().lower() or None),
                levels=levels, admits_on=admits_on,
                # The occupancy without the candidate, kept with the page's forecast.
                base_for=lambda days: shown.view(f"booking-base-{record.id}-{days}",
                                                 lambda: booking_base(shown.state, record,
                                                                      days)))
            context["result"] = result
            context["planned_label"] = day_label(planned)
            context["confirm"] = confirm
            context["strip_json"] = json.dumps(booking_figures.booking_strip(
                result["strip"], result["check"]["date"], levels.warning, levels.alarm))
            last = max(last, min(planned + timedelta(days=NEAR_DAYS),
                                 today + timedelta(days=bounds.BOOKING_HORIZON_DAYS)))
    booked = booked_list(session, unit, today, last)
    by_day: dict[str, int] = {}
    for b in booked:
        by_day[b["planned_date"].isoformat()] = by_day.get(b["planned_date"].isoformat(), 0) + 1
    context.update({"booked": booked, "booked_by_day": by_day, "booked_until": last,
                    "day_label": day_label})
    return templates.TemplateResponse(request, "booking.html", context, status_code=status)


@router.get("/units/{unit}/booking", response_class=HTMLResponse)
def booking_page(request: Request, unit: str, session: SessionDep, actor: ReadActor,
                 planned_date: date | None = None,
                 age: Annotated[int | None, Query(ge=0, le=120)] = None,
                 specialty: Annotated[str | None, Query(max_length=100)] = None,
                 procedure: Annotated[str | None, Query(max_length=100)] = None,
                 message: str | None = None, error: str | None = None,
                 confirm: bool = False) -> Response:
    """Booking check for the surgical scheduler, with the next 14 days to choose from."""
    _unit_or_404(session, unit)
    form = {"planned_date": planned_date, "age": age, "specialty": specialty,
            "procedure": procedure}
    return _render(request, session, unit, form, message=message, error=error,
                   confirm=confirm and actor.can("bookings"))


@router.post("/units/{unit}/booking", response_class=HTMLResponse)
def book(request: Request, unit: str, session: SessionDep, actor: BookingsActor,
         planned_date: Annotated[date, Form()], age: Annotated[str, Form()] = "",
         specialty: Annotated[str, Form()] = "",
         procedure: Annotated[str, Form()] = "") -> Response:
    """Store a booking so later forecasts include it (the page asks to confirm first)."""
    _unit_or_404(session, unit)
    booking_id = f"B-{secrets.token_hex(4)}"
    now = current_time().replace(microsecond=0)
    try:
        bounds.check_booking_date(planned_date, now.astimezone(get_settings().tz).date())
    except bounds.OutOfBounds as exc:
        return _render(request, session, unit, {"planned_date": None, "age": None,
                                                "specialty": specialty, "procedure": procedure},
                       error=f"Not booked: {exc}", status=422)
    data = _one_row_csv(["booking_id", "unit", "booked_at", "planned_date", "age", "specialty",
                         "procedure"],
                        [booking_id, unit, now.isoformat(), planned_date.isoformat(), age.strip(),
                         specialty.strip(), procedure.strip()])
    try:
        import_file(session, "bookings", data, "booking form", tz=get_settings().tz,
                    actor=actor.username)
    except ImportRefused as refused:
        why = "; ".join(f"{p.column}: {p.why}" for p in refused.problems)
        return _booking_redirect(unit, {"error": f"Not booked: {why}",
                                        "age": age.strip(), "specialty": specialty.strip(),
                                        "procedure": procedure.strip()})
    return _booking_redirect(unit, {
        "message": f"booked {booking_id} for {planned_date.isoformat()}",
        "planned_date": planned_date.isoformat(), "age": age.strip(),
        "specialty": specialty.strip(), "procedure": procedure.strip()})


@router.post("/units/{unit}/bookings/{booking_id}/cancel", response_class=HTMLResponse)
def cancel_booking(unit: str, booking_id: str, session: SessionDep,
                   actor: BookingsActor) -> Response:
    """Cancel a booking: its ``cancelled_at`` is set (audited), committed before the answer."""
    _unit_or_404(session, unit)
    found = session.get(Booking, booking_id)
    if found is None or found.unit != unit:
        return _booking_redirect(unit, {"error": f"Not cancelled: no booking {booking_id} "
                                                 f"in {unit}"}, anchor="booked")
    if found.cancelled_at is not None:
        return _booking_redirect(unit, {"error": f"Not cancelled: {booking_id} was cancelled "
                                                 "already"}, anchor="booked")
    now = current_time().replace(microsecond=0)
    data = _one_row_csv(BOOKING_HEADER, [
        found.booking_id, unit, found.booked_at.isoformat(), found.planned_date.isoformat(),
        found.age, found.sex, found.specialty, found.source, found.procedure, now.isoformat()])
    try:
        import_file(session, "bookings", data, "booking cancel form", tz=get_settings().tz,
                    actor=actor.username)
    except ImportRefused as refused:
        why = "; ".join(f"{p.column}: {p.why}" for p in refused.problems)
        return _booking_redirect(unit, {"error": f"Not cancelled: {why}"}, anchor="booked")
    what = ", ".join(x for x in (found.specialty, found.procedure) if x)
    return _booking_redirect(unit, {
        "message": f"Cancelled {booking_id} (planned {day_label(found.planned_date)}"
                   f"{', ' + what if what else ''})"}, anchor="booked")


def _booking_redirect(unit: str, fields: dict[str, str], anchor: str = "") -> RedirectResponse:
    """Back to the booking form; each value is encoded, so '&', '=' or '#' typed into a field
    stays inside that field instead of adding or overriding other parameters."""
    query = urlencode({name: value for name, value in fields.items() if value})
    fragment = f"#{anchor}" if anchor else ""
    return RedirectResponse(f"/units/{quote(unit, safe='')}/booking?{query}{fragment}",
                            status_code=303)
