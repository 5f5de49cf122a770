"""The audit trail page and its CSV export (bed manager only)."""

from __future__ import annotations

import csv
import io
import json
from collections.abc import Iterator
from datetime import date, datetime, time, timedelta
from typing import Annotated, Any

from fastapi import APIRouter, HTTPException, Query, Request
from fastapi.responses import HTMLResponse, StreamingResponse

from app import bounds
from app.config import get_settings
from app.ingest.score_entries import WITHDRAWAL_BATCH
from app.store import db
from app.store.audit import (
    AuditFilter,
    AuditRow,
    count_events,
    entity_kinds,
    iter_events,
    list_events,
)
from app.web.audit_words import describe, kind_label
from app.web.deps import SessionDep
from app.web.security import AdminActor, csv_safe
from app.web.templating import templates

router = APIRouter()

PAGE_SIZE = 100
EXPORT_COLUMNS = ("id", "at", "actor", "action", "entity", "entity_id", "origin", "batch_id",
                  "before", "after", "change")


def _dumps(values: object) -> str:
    if values is None:
        return ""
    return json.dumps(values, sort_keys=True, ensure_ascii=False, separators=(", ", ": "))


class BadFilter(ValueError):
    """A filter field that cannot be used; the message names the field in the form's words."""


def _parse_filters(batch: str, since: str, until: str) -> tuple[int | None, date | None,
                                                                 date | None]:
    """The form's batch and dates; an empty field is no filter."""
    batch_id: int | None = None
    if batch.strip():
        if not batch.strip().isascii() or not batch.strip().isdigit():
            raise BadFilter(f"Batch: {batch.strip()!r} is not a batch number (digits only)")
        batch_id = int(batch.strip())
        if not 1 <= batch_id <= 2**63 - 1:
            raise BadFilter(f"Batch: {batch_id} is not a batch number")
    days: list[date | None] = []
    for label, text in (("From", since), ("To", until)):
        if not text.strip():
            days.append(None)
            continue
        try:
            day = date.fromisoformat(text.strip())
            bounds.check_filter_date(day, label)
        except bounds.OutOfBounds as exc:
            raise BadFilter(str(exc)) from None
        except ValueError:
            raise BadFilter(f"{label}: {text.strip()!r} is not a date (YYYY-MM-DD)") from None
        days.append(day)
    return batch_id, days[0], days[1]


def _filter(actor: str, entity: str, entity_id: str, action: str, batch: str,
            since: str, until: str) -> AuditFilter:
    batch_id, since_day, until_day = _parse_filters(batch, since, until)
    tz = get_settings().tz
    # Days are the site's days: from local midnight of ``since`` to local midnight after ``until``.
    start = datetime.combine(since_day, time(0), tz) if since_day else None
    end = datetime.combine(until_day + timedelta(days=1), time(0), tz) if until_day else None
    return AuditFilter(actor=actor.strip(), entity=entity.strip(), entity_id=entity_id.strip(),
                       action=action.strip(), batch_id=batch_id, since=start, until=end)


# The batches score entry writes (app/web/routes_scores.py, app/ingest/score_entries.py).
SCORE_FORMS = ("score entry form", WITHDRAWAL_BATCH)
Text = Annotated[str, Query(max_length=200, pattern=bounds.NO_CONTROL_CHARACTERS)]


@router.get("/audit", response_class=HTMLResponse, include_in_schema=False)
def audit_page(request: Request, session: SessionDep, actor: AdminActor,
               who: Text = "", entity: Text = "", entity_id: Text = "", action: Text = "",
               batch: Text = "", since: Text = "", until: Text = "",
               page: Annotated[int, Query(ge=1, le=1_000_000)] = 1) -> HTMLResponse:
    """Every write, newest first, in words, with the values before and after on demand.
    Each filter works alone or with the others; an empty field is no filter."""
    query = {k: v.strip() for k, v in {"who": who, "entity": entity, "entity_id": entity_id,
                                       "action": action, "batch": batch, "since": since,
                                       "until": until}.items() if v.strip()}
    kinds = [(kind, kind_label(kind)) for kind in entity_kinds(session)]
    try:
        where = _filter(who, entity, entity_id, action, batch, since, until)
    except BadFilter as exc:
        return templates.TemplateResponse(request, "audit.html", {
            "rows": [], "total": 0, "page": 1, "pages": 1, "query": query, "kinds": kinds,
            "problem": f"{exc}. Nothing was selected: correct it or leave the field empty."},
            status_code=422)
    total = count_events(session, where)
    tz = get_settings().tz
    rows = [_row_view(r, tz) for r in list_events(session, where, limit=PAGE_SIZE,
                                                   offset=(page - 1) * PAGE_SIZE)]
    return templates.TemplateResponse(request, "audit.html", {
        "rows": rows, "total": total, "page": page, "kinds": kinds, "problem": None,
        "pages": max(1, -(-total // PAGE_SIZE)), "query": query,
        "zone": getattr(tz, "key", str(tz))})


def _row_view(row: AuditRow, tz: Any) -> dict[str, Any]:
    event = row.event
    return {"id": event.id, "at": event.at.astimezone(tz).isoformat(timespec="seconds"),
            "at_local": event.at.astimezone(tz).strftime("%a %d %b %Y %H:%M:%S"),
            "actor": event.actor, "action": event.action, "entity": event.entity,
            "entity_id": event.entity_id, "batch_id": event.batch_id,
            "origin": (f"score form (batch {event.batch_id})" if row.batch_name in SCORE_FORMS
                       else row.origin),
            "before": _dumps(event.before), "after": _dumps(event.after),
            "change": describe(event.action, event.entity, event.entity_id, event.before,
                               event.after, tz)}


@router.get("/audit.csv", include_in_schema=False)
def audit_export(request: Request, actor: AdminActor,
                 who: Text = "", entity: Text = "", entity_id: Text = "", action: Text = "",
                 batch: Text = "", since: Text = "", until: Text = "") -> StreamingResponse:
    """The selected events as CSV; text that a spreadsheet would run as a formula is quoted."""
    try:
        where = _filter(who, entity, entity_id, action, batch, since, until)
    except BadFilter as exc:
        raise HTTPException(status_code=422, detail=str(exc)) from None
    url = request.app.state.database_url
    tz = get_settings().tz

    def lines() -> Iterator[str]:
        buffer = io.StringIO()
        writer = csv.writer(buffer, lineterminator="\n")
        writer.writerow(EXPORT_COLUMNS)
        # Its own read session: the response streams after the request's session has closed.
        with db.session_scope(url) as session:
            for row in iter_events(session, where):
                view = _row_view(row, tz)
                writer.writerow([csv_safe(view[c]) if view[c] is not None else ""
                                 for c in EXPORT_COLUMNS])
                if buffer.tell() > 64_000:
                    yield buffer.getvalue()
                    buffer.seek(0)
                    buffer.truncate()
        yield buffer.getvalue()

    stamp = datetime.now(tz).strftime("%Y%m%d-%H%M")
    return StreamingResponse(lines(), media_type="text/csv; charset=utf-8", headers={
        "content-disposition": f'attachment; filename="morrow-audit-{stamp}.csv"'})
