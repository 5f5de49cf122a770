"""One HL7 v2 message in, one acknowledgement out, with the change committed in between.

``receive_hl7`` is what the file import (``morrow import hl7``) and the MLLP listener
(``morrow listen``) do with each message: in one transaction (run again if the database
was busy, ``app.store.retry``) it recognises a repeated control id, translates the message
(``app.feeds.hl7_v2``), applies it (``app.feeds.apply``) and commits; only then is the
acknowledgement built. A message that cannot be read is answered AR or AE and changes
nothing but its ``feed_message`` row (type, times, reason; no text). An unexpected error
rolls everything back and is answered AE (HL7 error 207), so the sender sends it again.
"""

from __future__ import annotations

import hashlib
import logging
from dataclasses import dataclass
from datetime import UTC, datetime
from zoneinfo import ZoneInfo

import hl7
from sqlalchemy.orm import Session

from app.feeds import hl7_v2
from app.feeds.apply import ApplyOutcome, apply_message, record_refusal, repeat_of
from app.feeds.census import CensusClock
from app.feeds.known import UNITS
from app.feeds.mapping import FeedMapping
from app.feeds.pseudonym import Pseudonymiser
from app.store.retry import run_transaction

log = logging.getLogger("morrow.feeds")


@dataclass(frozen=True)
class Receipt:
    """What became of one message: ``status`` (applied, duplicate, ignored, dead_letter,
    refused, failed), the ACK text to send back, and the reason (never patient data)."""

    status: str
    ack: str
    ack_code: str
    control_id: str
    reason: str | None = None


def receive_hl7(url: str, text: str, *, mapping: FeedMapping, pseudonymiser: Pseudonymiser,
                tz: ZoneInfo, received_at: datetime | None = None,
                actor: str = "hl7 feed", census: CensusClock | None = None) -> Receipt:
    """Translate, apply and acknowledge one message in a transaction of its own. With
    ``census`` (one clock for the whole stream), the census instants the message's known-at
    time has passed are recorded first, in the same transaction (``app.feeds.census``)."""
    moment = (received_at or datetime.now(UTC)).astimezone(UTC)
    parsed = hl7_v2.read_header(text)
    header = parsed[1]
    problem: list[hl7_v2.Hl7Problem] = []
    attempts = [0]

    def work(session: Session) -> ApplyOutcome | None:
        problem.clear()
        attempts[0] += 1
        if census is not None and attempts[0] > 1:
            census.forget()  # the attempt before was rolled back with what it took
        try:
            message = hl7_v2.translate(text, pseudonymiser=pseudonymiser, tz=tz,
                                       received_at=moment, parsed=parsed)
        except hl7_v2.Hl7Problem as exc:
            # A control id already taken is acknowledged as before, whatever it holds now;
            # a taken message is recognised by apply_message below.
            repeat = repeat_of(session, header.source, header.control_id) \
                if header.control_id else None
            if repeat is not None:
                return repeat
            problem.append(exc)
            if header.control_id and len(header.control_id) <= 200:
                record_refusal(session, kind="hl7v2", source=header.source,
                               control_id=header.control_id,
                               message_type=_message_type(parsed[0]),
                               digest=hashlib.sha256(text.encode("utf-8")).hexdigest(),
                               sent_at=None, received_at=moment, reason=exc.reason)
            return None
        if census is not None:
            # Never a census instant after the receipt (a sent time may be a little ahead).
            census.before(session, min(message.known_at(moment), moment))
        return apply_message(session, message, received_at=moment, mapping=mapping,
                             actor=actor)

    try:
        outcome = run_transaction(url, work, retry_conflicts=True)
    except Exception as exc:
        if census is not None:
            census.forget()  # the sender must get an answer; the message is not stored
        UNITS.forget()  # read again what the next message relies on
        log.exception("HL7 message %s could not be stored", header.control_id[:40])
        reason = f"Morrow could not store the message ({type(exc).__name__}); send it again"
        return Receipt("failed", hl7_v2.build_ack(header, "AE", text=reason,
                                                  error_code=hl7_v2.ERR_INTERNAL),
                       "AE", header.control_id, reason)
    if outcome is None:
        found = problem[0]
        log.info("HL7 message %s refused: %s", header.control_id[:40], found.reason)
        return Receipt("refused", hl7_v2.build_ack(header, found.ack_code, text=found.reason,
                                                   where=found.where, error_code=found.code),
                       found.ack_code, header.control_id, found.reason)
    code = outcome.ack_code
    error_code = "" if code == "AA" else (
        hl7_v2.ERR_TABLE_VALUE if outcome.status == "dead_letter" else hl7_v2.ERR_DATA_TYPE)
    if outcome.status == "duplicate" and code != "AA":
        error_code = hl7_v2.ERR_TABLE_VALUE
    log.info("HL7 message %s: %s", header.control_id[:40], outcome.status)
    return Receipt(outcome.status, hl7_v2.build_ack(header, code, text=outcome.reason or "",
                                                    error_code=error_code),
                   code, header.control_id, outcome.reason)


def _message_type(message: hl7.Message | None) -> str:
    if message is None:
        return "?"
    msh = message.segment("MSH")
    return f"{hl7_v2._field(msh, 9, 1)}^{hl7_v2._field(msh, 9, 2)}"[:20]
