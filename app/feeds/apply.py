"""Apply one translated feed message (app.feeds.events) to the store: stays and scores.

``apply_message`` is the one entry point for every feed (HL7 v2 file or listener, FHIR file or
endpoint). It only adds and flushes; the caller commits (and acknowledges only after the
commit). What it does, in order:

1. A (source, control id) already received and not refused is a **duplicate**: nothing
   changes (its repeat count goes up) and the caller acknowledges it as before.
2. The message is recorded in ``feed_message`` (no text: type, times, SHA-256, outcome).
3. Its events are applied inside a savepoint, all or nothing:
   - a point of care the mapping names (or equal to a unit code) is that unit; one listed as
     ignored is skipped; any other makes the message a **dead letter** (kept pseudonymised
     in ``feed_dead_letter`` for ``morrow feeds replay``), as does a message that refers to a
     stay not known yet (a discharge before its admission arrived): such a dead letter is
     tried again automatically whenever a later message changes the same visit;
   - a value outside its bounds (times from 1900 to a day after receipt, app/bounds.py; age
     0..120; published score ranges, app/score_names.py), a discharge before its admission,
     a missing admission type: the message is **refused** and nothing of it is stored
     (its ``feed_message`` row says why; the same control id may be sent again, corrected).
4. Stays follow the rules of stays.csv (DATA_CONTRACT.md): one stay per visit and unit
   entered (id from ``events.stay_id_for``), a transfer closes one (outcome from the mapping,
   else ``transfer``; ``to_unit``) and opens the next (``from_unit``); an exact discharge
   time is kept as from a stays file (``discharge_source`` "stays"). Every insert, update
   and delete of a stay writes an audit event naming the message's import batch (one
   ``import_batch`` per message that changed something: kind ``observations`` for scores
   only, else the feed kind, so the page's caches see the change). Scores are appended as
   observations (recorded at the message's known-at time, never before their observed
   time; a correction gets the next revision; a withdrawal is an entry with ``withdrawn``).
5. Updates of a stay (A08, discharge corrections) apply only when the message is known at
   or after the stay's last change (``feed_stay.known_at``): an older message that arrives
   late changes nothing.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from typing import Any

from sqlalchemy import (
    select,
)
from sqlalchemy.orm import Session

from app import bounds
from app.feeds.dead_letters import (
    _first_visit,
    _retry_visits,
    purge_expired,
    replay_dead_letters,
)
from app.feeds.events import (
    FeedMessage,
    events_to_json,
)
from app.feeds.feed_rows import (
    _COUNT_REPEAT,
    _FIND_MESSAGE,
    _INSERT_MESSAGE,
    _UPDATE_MESSAGE,
    STORED_OUTCOMES,
    ApplyOutcome,
    Status,
    _DeadLetter,
    _Refused,
    new_id,
)
from app.feeds.mapping import FeedMapping
from app.feeds.stay_events import _Work
from app.store.models import (
    FeedDeadLetter,
)
from app.store.models import FeedMessage as FeedMessageRow


def apply_message(session: Session, message: FeedMessage, *, received_at: datetime,
                  mapping: FeedMapping, actor: str = "feed") -> ApplyOutcome:
    """Apply ``message``; flush only (the caller commits, then acknowledges)."""
    received_at = received_at.astimezone(UTC)
    source, control_id = message.source[:100], message.control_id[:200]
    # Statements here are built once (``_FIND_MESSAGE``, ...) and written without the ORM's
    # unit of work where nothing reads the rows back as objects: a message is a dozen
    # statements, and building and flushing them was most of its time.
    session.flush()  # (nothing, mostly) the statements below go round the unit of work
    conn = session.connection()
    found = conn.execute(_FIND_MESSAGE, {"source": source, "control_id": control_id}).first()
    if found is not None and found.outcome in STORED_OUTCOMES:
        return _repeat(session, found)
    values = {"message_type": message.message_type[:20], "digest": message.digest,
              "sent_at": message.sent_at, "received_at": received_at, "outcome": "refused",
              "reason": None, "unmapped": None}
    # A write before the savepoint: SQLite's transaction is open from here.
    if found is None:
        message_id = new_id(conn.execute(_INSERT_MESSAGE, {
            "kind": message.kind, "source": source, "control_id": control_id, **values}))
    else:  # refused before: taken again, corrected
        message_id = int(found.id)
        conn.execute(_UPDATE_MESSAGE, {"message_id": message_id, **values})

    work = _Work(session, mapping, actor, now=received_at, message_id=message_id)
    known_at = message.known_at(received_at)
    try:
        if known_at > bounds.latest_event(received_at):
            raise _Refused(f"sent time {known_at:%Y-%m-%d %H:%M} UTC is more than a day after "
                           "it was received")
        with session.begin_nested():
            status = work.apply_all(message, known_at)
    except _Refused as refused:
        conn.execute(_UPDATE_MESSAGE, {
            "message_id": message_id, "reason": refused.reason[:500],
            "unmapped": work.unmapped_json()})
        return ApplyOutcome("refused", refused.reason, message_id)
    except _DeadLetter as dead:
        conn.execute(_UPDATE_MESSAGE, {
            "message_id": message_id, "outcome": "dead_letter", "reason": dead.reason[:500],
            "unmapped": work.unmapped_json()})
        session.add(FeedDeadLetter(
            message_id=message_id, visit=_first_visit(message.events),
            reason=dead.reason[:500],
            events={"events": events_to_json(message.events), "kind": message.kind},
            text=message.kept_text(), created_at=received_at,
            expires_at=received_at + timedelta(days=mapping.keep_days)))
        session.flush()
        return ApplyOutcome("dead_letter", dead.reason, message_id)
    conn.execute(_UPDATE_MESSAGE, {
        "message_id": message_id, "outcome": status, "reason": work.note,
        "unmapped": work.unmapped_json(), "batch_id": work.batch})
    _retry_visits(session, mapping, actor, work.changed_visits, now=received_at)
    return ApplyOutcome(status, work.note, message_id)


def repeat_of(session: Session, source: str, control_id: str) -> ApplyOutcome | None:
    """The answer to a (source, control id) already received and not refused, counting the
    repeat; None when it is new (or was refused, so it may come again corrected)."""
    found = session.execute(_FIND_MESSAGE, {"source": source[:100],
                                            "control_id": control_id[:200]}).first()
    if found is None or found.outcome not in STORED_OUTCOMES:
        return None
    return _repeat(session, found)


def _repeat(session: Session, found: Any) -> ApplyOutcome:
    """Count a repeat of the message ``found`` (a ``_FIND_MESSAGE`` row)."""
    session.connection().execute(_COUNT_REPEAT, {"message_id": found.id})
    return ApplyOutcome("duplicate", f"already received on {found.received_at:%Y-%m-%d %H:%M}"
                        f" UTC ({found.outcome.replace('_', ' ')})", found.id,
                        original=found.outcome)


def record_refusal(session: Session, *, kind: str, source: str, control_id: str,
                   message_type: str, digest: str, sent_at: datetime | None,
                   received_at: datetime, reason: str) -> ApplyOutcome:
    """Note a message refused before it could be translated (no text, no identifiers)."""
    row = session.scalar(select(FeedMessageRow).where(
        FeedMessageRow.source == source[:100], FeedMessageRow.control_id == control_id[:200]))
    if row is None:
        row = FeedMessageRow(kind=kind, source=source[:100], control_id=control_id[:200])
        session.add(row)
    row.message_type, row.digest, row.sent_at = message_type[:20], digest, sent_at
    row.received_at, row.outcome, row.reason = received_at.astimezone(UTC), "refused", reason[:500]
    session.flush()
    return ApplyOutcome("refused", reason, row.id)


__all__ = ["ApplyOutcome", "Status", "apply_message", "new_id", "purge_expired", "record_refusal",
           "repeat_of", "replay_dead_letters"]
