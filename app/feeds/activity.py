"""What each feed has sent lately, for the data page: last message, today's count, refusals
and dead letters waiting for the mapping."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, datetime, time
from zoneinfo import ZoneInfo

from sqlalchemy import case, func, select
from sqlalchemy.orm import Session

from app.store.models import FeedDeadLetter, FeedMessage
from app.timeutil import as_utc, localize


@dataclass(frozen=True)
class FeedActivity:
    kind: str  # "hl7v2" or "fhir"
    source: str
    last_received_at: datetime | None
    messages_today: int
    refused_today: int
    refused_total: int
    dead_letters: int  # waiting to be applied

    @property
    def label(self) -> str:
        return {"hl7v2": "HL7 v2", "fhir": "FHIR R4"}.get(self.kind, self.kind)


def feed_activity(session: Session, now: datetime, tz: ZoneInfo) -> list[FeedActivity]:
    """One row per (kind, source) that ever sent a message, newest first."""
    today = localize(datetime.combine(now.astimezone(tz).date(), time(0, 0)), tz)
    rows = session.execute(
        select(FeedMessage.kind, FeedMessage.source, func.max(FeedMessage.received_at),
               func.count(case((FeedMessage.received_at >= today, FeedMessage.id))),
               func.count(case(((FeedMessage.received_at >= today)
                                & (FeedMessage.outcome == "refused"), FeedMessage.id))),
               func.count(case((FeedMessage.outcome == "refused", FeedMessage.id))))
        .group_by(FeedMessage.kind, FeedMessage.source)).all()
    waiting = dict(((kind, source), int(count)) for kind, source, count in session.execute(
        select(FeedMessage.kind, FeedMessage.source, func.count(FeedDeadLetter.id))
        .join(FeedDeadLetter, FeedDeadLetter.message_id == FeedMessage.id)
        .where(FeedDeadLetter.resolved_at.is_(None))
        .group_by(FeedMessage.kind, FeedMessage.source)).all())
    out = [FeedActivity(kind, source, None if last is None else as_utc(last), int(today_n),
                        int(refused_today), int(refused), waiting.get((kind, source), 0))
           for kind, source, last, today_n, refused_today, refused in rows]
    never = datetime.min.replace(tzinfo=UTC)
    return sorted(out, key=lambda a: a.last_received_at or never, reverse=True)
