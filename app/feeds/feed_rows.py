"""What applying a feed message reads and writes: outcomes, prepared statements, row ids."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from types import SimpleNamespace
from typing import Any, Literal, cast

from sqlalchemy import (
    CursorResult,
    Table,
    bindparam,
    insert,
    select,
    update,
)

from app.store.models import (
    AuditEvent,
    FeedDeadLetter,
    FeedStay,
    ImportBatch,
    Stay,
)
from app.store.models import FeedMessage as FeedMessageRow

Status = Literal["applied", "duplicate", "ignored", "dead_letter", "refused"]


STORED_OUTCOMES = ("applied", "ignored", "dead_letter")


# How often dead letters of a visit are tried again after one message (a chain of late
# messages of one visit resolves in a few rounds; the cap only stops a pathological loop).
MAX_RETRY_ROUNDS = 20


COVARIATES = ("admission_type", "age", "sex", "specialty", "source")


@dataclass(frozen=True)
class ApplyOutcome:
    """What became of a message. ``original`` is the first outcome of a duplicate."""

    status: Status
    reason: str | None = None
    message_id: int | None = None
    original: Status | None = None

    @property
    def ack_code(self) -> str:
        """HL7 table 0008: AA accepted; AE application error (refused, or kept unapplied)."""
        status = self.original if self.status == "duplicate" and self.original else self.status
        return "AA" if status in ("applied", "ignored", "duplicate") else "AE"


_STAYS = cast(Table, Stay.__table__)


_FEED_STAYS = cast(Table, FeedStay.__table__)


# A visit's stays, each with its feed row's known-at time, read as plain rows: a message
# changes them with statements of its own and keeps its copies (``_StayRow``) in step.
_VISIT_STAYS = (select(*_STAYS.c, _FEED_STAYS.c.known_at.label("feed_known_at"))
                .join_from(_STAYS, _FEED_STAYS, _FEED_STAYS.c.stay_id == _STAYS.c.stay_id)
                .where(_FEED_STAYS.c.visit == bindparam("visit"))
                .order_by(_STAYS.c.admitted_at))


# Set the columns named in their parameters (besides ``b_stay_id``).
_UPDATE_STAY = update(_STAYS).where(_STAYS.c.stay_id == bindparam("b_stay_id"))


_UPDATE_FEED_STAY = update(_FEED_STAYS).where(_FEED_STAYS.c.stay_id == bindparam("b_stay_id"))


_PENDING_OF_VISITS = (select(FeedDeadLetter.id)
                      .where(FeedDeadLetter.resolved_at.is_(None),
                             FeedDeadLetter.visit.in_(bindparam("visits", expanding=True)))
                      .order_by(FeedDeadLetter.id))


_MESSAGES = cast(Table, FeedMessageRow.__table__)


_INSERT_MESSAGE = insert(_MESSAGES)


_INSERT_BATCH = insert(cast(Table, ImportBatch.__table__))


_INSERT_AUDIT = insert(cast(Table, AuditEvent.__table__))


_INSERT_STAY = insert(_STAYS)


_INSERT_FEED_STAY = insert(_FEED_STAYS)


_FIND_MESSAGE = select(FeedMessageRow.id, FeedMessageRow.outcome, FeedMessageRow.received_at
                       ).where(FeedMessageRow.source == bindparam("source"),
                               FeedMessageRow.control_id == bindparam("control_id"))


# Sets the columns named in its parameters (besides ``message_id``).
_UPDATE_MESSAGE = update(_MESSAGES).where(_MESSAGES.c.id == bindparam("message_id"))


_COUNT_REPEAT = update(_MESSAGES).where(_MESSAGES.c.id == bindparam("message_id")).values(
    repeats=_MESSAGES.c.repeats + 1)


def new_id(result: CursorResult[Any]) -> int:
    """The key of the row a single-row INSERT made."""
    key = result.inserted_primary_key
    assert key is not None
    return int(key[0])


class _StayRow(SimpleNamespace):
    """A stay as read by ``_VISIT_STAYS`` (every column of ``stay``, and ``feed_known_at``)."""

    stay_id: str
    unit: str
    admitted_at: datetime
    discharged_at: datetime | None
    to_unit: str | None
    feed_known_at: datetime


class _Refused(Exception):
    def __init__(self, reason: str):
        super().__init__(reason)
        self.reason = reason


class _DeadLetter(Exception):
    def __init__(self, reason: str):
        super().__init__(reason)
        self.reason = reason
