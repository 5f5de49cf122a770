"""Dead letters: messages kept until the mapping or the stay they need exists, and replayed."""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from datetime import UTC, datetime

from sqlalchemy import (
    delete,
    select,
)
from sqlalchemy.orm import Session

from app.feeds.events import (
    FeedEvent,
    FeedMessage,
    events_from_json,
)
from app.feeds.feed_rows import _PENDING_OF_VISITS, MAX_RETRY_ROUNDS, Status, _DeadLetter, _Refused
from app.feeds.mapping import FeedMapping
from app.feeds.stay_events import _Work
from app.store.models import (
    FeedDeadLetter,
)
from app.store.models import FeedMessage as FeedMessageRow


@dataclass(frozen=True)
class Replayed:
    dead_letter_id: int
    message_id: int
    status: Status
    reason: str | None


def replay_dead_letters(session: Session, mapping: FeedMapping, *, now: datetime,
                        actor: str = "feed replay", ids: Iterable[int] | None = None
                        ) -> list[Replayed]:
    """Try every pending dead letter (or those in ``ids``) again, oldest first; flush only.

    A dead letter past its ``expires_at`` is deleted instead (its ``feed_message`` row stays).
    """
    now = now.astimezone(UTC)
    purge_expired(session, now)
    query = select(FeedDeadLetter.id).where(FeedDeadLetter.resolved_at.is_(None))
    if ids is not None:
        query = query.where(FeedDeadLetter.id.in_(list(ids)))
    results: list[Replayed] = []  # each one tried, in order, and those its success let in
    for dead_id in session.scalars(query.order_by(FeedDeadLetter.id)).all():
        _try_dead_letter(session, mapping, actor, dead_id, now, results)
    last = {r.dead_letter_id: r for r in results}  # tried twice: its last answer counts
    return sorted(last.values(), key=lambda r: r.dead_letter_id)


def purge_expired(session: Session, now: datetime) -> int:
    """Delete dead letters past their keeping time; how many."""
    result = session.execute(delete(FeedDeadLetter).where(
        FeedDeadLetter.resolved_at.is_(None), FeedDeadLetter.expires_at < now.astimezone(UTC)))
    return int(getattr(result, "rowcount", 0) or 0)


def _try_dead_letter(session: Session, mapping: FeedMapping, actor: str, dead_id: int,
                     now: datetime, log: list[Replayed] | None = None) -> Replayed | None:
    dead = session.get(FeedDeadLetter, dead_id)
    if dead is None or dead.resolved_at is not None or dead.events is None:
        return None
    row = session.get(FeedMessageRow, dead.message_id)
    assert row is not None
    message = FeedMessage(kind=dead.events.get("kind", row.kind), source=row.source,
                          control_id=row.control_id, message_type=row.message_type,
                          digest=row.digest, events=events_from_json(dead.events["events"]),
                          sent_at=row.sent_at)
    work = _Work(session, mapping, actor, now=now, message_id=row.id)
    dead.attempts += 1
    try:
        with session.begin_nested():
            status = work.apply_all(message, message.known_at(row.received_at))
    except (_Refused, _DeadLetter) as exc:
        dead.reason = exc.reason[:500]
        row.unmapped = work.unmapped_json()
        session.flush()
        failed = Replayed(dead.id, row.id, "dead_letter", exc.reason)
        if log is not None:
            log.append(failed)
        return failed
    dead.resolved_at = now
    dead.events, dead.text = None, None  # applied: nothing of it needs keeping any more
    row.outcome = status
    row.reason = f"applied from the dead letters on {now:%Y-%m-%d %H:%M} UTC"
    row.unmapped = work.unmapped_json()
    row.batch_id = work.batch
    session.flush()
    done = Replayed(dead.id, row.id, status, row.reason)
    if log is not None:
        log.append(done)
    _retry_visits(session, mapping, actor, work.changed_visits, now=now, log=log)
    return done


def _retry_visits(session: Session, mapping: FeedMapping, actor: str, visits: set[str], *,
                  now: datetime, log: list[Replayed] | None = None) -> None:
    """Try again the dead letters of visits a message has just changed (late arrivals)."""
    pending = set(visits)
    for _ in range(MAX_RETRY_ROUNDS):
        if not pending:
            return
        session.flush()
        ids = session.connection().execute(
            _PENDING_OF_VISITS, {"visits": sorted(pending)}).scalars().all()
        pending = set()
        for dead_id in ids:
            dead = session.get(FeedDeadLetter, dead_id)
            visit = dead.visit if dead is not None else None
            result = _try_dead_letter(session, mapping, actor, dead_id, now, log)
            if result is not None and result.status != "dead_letter" and visit:
                pending.add(visit)


def _first_visit(events: tuple[FeedEvent, ...]) -> str | None:
    return next((e.visit for e in events), None)
