"""The audit trail: who changed which record, when, from which import batch or form.

Imports write their events themselves (app/ingest/importer.py). Form and API handlers call
``record_audit`` in the same transaction as the change, so the event and the change are
stored together or not at all. A form submission is kept as an ``ImportBatch`` of kind
"form" (its ``filename`` is the form's route), so every event points at a batch or a form
through the one ``batch_id`` column.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import date, datetime
from typing import Any, TypeVar

from sqlalchemy import Select, func, select
from sqlalchemy.orm import Session

from app.store.models import AuditEvent, ImportBatch

FORM_KIND = "form"
Query = TypeVar("Query", bound=Select)


def jsonable(values: dict[str, Any] | None) -> dict[str, Any] | None:
    """Values as JSON can hold them: dates and times as ISO 8601 text."""
    if values is None:
        return None
    return {k: v.isoformat() if isinstance(v, datetime | date) else v for k, v in values.items()}


def form_batch(session: Session, actor: str, form: str,
               payload: dict[str, Any] | None = None) -> ImportBatch:
    """Record one form submission (e.g. ``"POST /units/{unit}/scores"``) as a batch of kind form.

    ``payload`` (the submitted values) only feeds the batch's SHA-256, so two identical
    submissions can be told apart from two different ones; it is not stored.
    """
    digest = hashlib.sha256(json.dumps(jsonable(payload) or {}, sort_keys=True,
                                       default=str).encode("utf-8")).hexdigest()
    batch = ImportBatch(kind=FORM_KIND, filename=form[:255], sha256=digest, rows=1, inserted=0,
                        updated=0, unchanged=0, actor=actor[:100])
    session.add(batch)
    session.flush()
    return batch


def record_audit(session: Session, actor: str, action: str, entity: str, entity_id: str,
                 before: dict[str, Any] | None, after: dict[str, Any] | None, *,
                 batch_id: int | None = None, form: str | None = None) -> AuditEvent:
    """Add one audit event in the caller's transaction.

    ``action`` is "insert" (``before`` None), "update" (both) or "delete" (``after`` None),
    or a named event such as "signin". Give ``batch_id`` for a change from an import, or
    ``form`` (the route, e.g. ``"POST /units/{unit}/scores"``) for one from a form or an
    API call: a form batch is then made for it. Dates and times in the values are stored
    as ISO 8601 text.
    """
    if batch_id is None and form is not None:
        batch_id = form_batch(session, actor, form, after or before).id
    event = AuditEvent(actor=actor[:100], action=action[:20], entity=entity[:30],
                       entity_id=str(entity_id)[:200], before=jsonable(before),
                       after=jsonable(after), batch_id=batch_id)
    session.add(event)
    session.flush()
    return event


@dataclass(frozen=True)
class AuditFilter:
    """What the audit page and export select; empty fields select everything."""

    actor: str = ""
    entity: str = ""
    entity_id: str = ""
    action: str = ""
    batch_id: int | None = None
    since: datetime | None = None
    until: datetime | None = None

    def apply(self, query: Query) -> Query:
        if self.actor:
            query = query.where(AuditEvent.actor == self.actor)
        if self.entity:
            query = query.where(AuditEvent.entity == self.entity)
        if self.entity_id:
            query = query.where(AuditEvent.entity_id == self.entity_id)
        if self.action:
            query = query.where(AuditEvent.action == self.action)
        if self.batch_id is not None:
            query = query.where(AuditEvent.batch_id == self.batch_id)
        if self.since is not None:
            query = query.where(AuditEvent.at >= self.since)
        if self.until is not None:
            query = query.where(AuditEvent.at < self.until)
        return query


@dataclass(frozen=True)
class AuditRow:
    event: AuditEvent
    batch_kind: str | None
    batch_name: str | None

    @property
    def origin(self) -> str:
        """Where the change came from: the import file, the form, or nothing recorded."""
        if self.event.batch_id is None:
            return ""
        if self.batch_kind == FORM_KIND:
            return f"form {self.batch_name}"
        return f"import {self.batch_kind} {self.batch_name} (batch {self.event.batch_id})"


def _rows_query(where: AuditFilter) -> Select[AuditEvent, str, str]:
    query = (select(AuditEvent, ImportBatch.kind, ImportBatch.filename)
             .outerjoin(ImportBatch, AuditEvent.batch_id == ImportBatch.id))
    return where.apply(query).order_by(AuditEvent.id.desc())


def count_events(session: Session, where: AuditFilter) -> int:
    return session.scalar(where.apply(select(func.count()).select_from(AuditEvent))) or 0


def list_events(session: Session, where: AuditFilter, *, limit: int,
                offset: int = 0) -> list[AuditRow]:
    """Newest first, one page of ``limit``."""
    rows = session.execute(_rows_query(where).limit(limit).offset(offset))
    return [AuditRow(event, kind, name) for event, kind, name in rows]


def iter_events(session: Session, where: AuditFilter, *, chunk: int = 1000) -> Iterator[AuditRow]:
    """Every selected event, newest first, fetched ``chunk`` at a time (for the export)."""
    last_id: int | None = None
    while True:
        query = _rows_query(where)
        if last_id is not None:
            query = query.where(AuditEvent.id < last_id)
        rows = session.execute(query.limit(chunk)).all()
        if not rows:
            return
        for event, kind, name in rows:
            yield AuditRow(event, kind, name)
        last_id = rows[-1][0].id


def entity_kinds(session: Session) -> list[str]:
    """The record kinds the trail holds (what the page's filter offers), sorted."""
    return sorted(k for k in session.scalars(select(AuditEvent.entity).distinct()) if k)
