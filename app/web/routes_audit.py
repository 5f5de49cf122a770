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
from app.store import db
from app.store.audit import AuditFilter, AuditRow, count_events, iter_events, list_events
from app.web.deps import SessionDep
from app.web.security import AdminActor, csv_safe
from app.web.templating import templates

router = APIRouter()

PAGE_SIZE = 100
EXPORT_COLUMNS = ("id", "at", "actor", "action", "entity", "entity_id", "origin", "batch_id",
                  "before", "after")


def _dumps(values: object) -> str:
    if values is None:
        return ""
    return json.dumps(values, sort_keys=True, ensure_ascii=False, separators=(", ", ": "))


def _filter(actor: str, entity: str, entity_id: str, action: str, batch: int | None,
            since: date | None, until: date | None) -> AuditFilter:
    try:
        for field, day in (("since", since), ("until", until)):
            if day is not None:
                bounds.check_filter_date(day, field)
    except bounds.OutOfBounds as exc:
        raise HTTPException(status_code=422, detail=str(exc)) from None
    tz = get_settings().tz
    # Days are the site's days: from local midnight of ``since`` to local midnight after ``until``.
    start = datetime.combine(since, time(0), tz) if since else None
    end = datetime.combine(until + timedelta(days=1), time(0), tz) if until else None
    return AuditFilter(actor=actor.strip(), entity=entity.strip(), entity_id=entity_id.strip(),
                       action=action.strip(), batch_id=batch, since=start, until=end)


Text = Annotated[str, Query(max_length=200, pattern=bounds.NO_CONTROL_CHARACTERS)]
BatchId = Annotated[int | None, Query(ge=1, le=2**63 - 1)]


@router.get("/audit", response_class=HTMLResponse, include_in_schema=False)
def audit_page(request: Request, session: SessionDep, actor: AdminActor,
               who: Text = "", entity: Text = "", entity_id: Text = "", action: Text = "",
               batch: BatchId = None, since: date | None = None, until: date | None = None,
               page: Annotated[int, Query(ge=1, le=1_000_000)] = 1) -> HTMLResponse:
    """Every write, newest first, with the values before and after."""
    where = _filter(who, entity, entity_id, action, batch, since, until)
    total = count_events(session, where)
    tz = get_settings().tz
    rows = [_row_view(r, tz) for r in list_events(session, where, limit=PAGE_SIZE,
                                                   offset=(page - 1) * PAGE_SIZE)]
    query = {k: v for k, v in {"who": who, "entity": entity, "entity_id": entity_id,
                               "action": action, "batch": batch, "since": since,
                               "until": until}.items() if v not in ("", None)}
    return templates.TemplateResponse(request, "audit.html", {
        "rows": rows, "total": total, "page": page,
        "pages": max(1, -(-total // PAGE_SIZE)), "query": query})


def _row_view(row: AuditRow, tz: Any) -> dict[str, Any]:
    event = row.event
    return {"id": event.id, "at": event.at.astimezone(tz).isoformat(timespec="seconds"),
            "actor": event.actor, "action": event.action, "entity": event.entity,
            "entity_id": event.entity_id, "origin": row.origin, "batch_id": event.batch_id,
            "before": _dumps(event.before), "after": _dumps(event.after)}


@router.get("/audit.csv", include_in_schema=False)
def audit_export(request: Request, actor: AdminActor,
                 who: Text = "", entity: Text = "", entity_id: Text = "", action: Text = "",
                 batch: BatchId = None, since: date | None = None,
                 until: date | None = None) -> StreamingResponse:
    """The selected events as CSV; text that a spreadsheet would run as a formula is quoted."""
    where = _filter(who, entity, entity_id, action, batch, since, until)
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
