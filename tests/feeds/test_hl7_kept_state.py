"""What the feed keeps between and within messages must never outlive the truth in the store.

The apply path writes a message's changes with statements of its own and keeps copies of the
stays it read, and a process keeps the unit codes it has seen (app/feeds/known.py). These
checks hold that to the rules the feed promises (issue 15; DATA_CONTRACT.md): a message is
all or nothing, even when it fails after changing a stay; a unit imported while the feed
runs is found by the next message that names it. Messages: tests/feeds/hl7_messages.py (the
HL7 v2.5.1 ADT^A01 example with the fields given); expected values are worked out by hand
from the messages beside each check.
"""

from __future__ import annotations

from datetime import UTC, datetime

import pytest
from sqlalchemy import select

from app.store import db
from app.store.models import AuditEvent, FeedDeadLetter, FeedStay, Stay
from tests.feeds.hl7_messages import adt
from tests.feeds.hl7_setup import add_units, count, send

pytestmark = pytest.mark.both_databases


def _utc(text: str) -> datetime:
    return datetime.fromisoformat(text).replace(tzinfo=UTC)


def test_a_message_failing_after_it_closed_a_stay_leaves_the_stay_open(db_url: str) -> None:
    add_units(db_url)
    admit = send(db_url, adt("A01", "K1", occurred="202603010900", location="2000"))
    assert admit.status == "applied", admit.reason
    with db.session_scope(db_url) as session:
        known_before = session.scalar(select(FeedStay.known_at))
    # A transfer from 2000 (KV-CRIT) to 3000 (KV-SURG) closes the KV-CRIT stay first, then
    # reads the admission type for the new stay: "X" is not in HL7 table 0007 nor mapped,
    # so the message becomes a dead letter, and the closing must go with it.
    move = send(db_url, adt("A02", "K2", occurred="202603011300", location="3000",
                            prior="2000", kind="X"))
    assert move.status == "dead_letter" and move.ack_code == "AE", move.reason
    assert "admission type 'X'" in (move.reason or "")
    with db.session_scope(db_url) as session:
        [stay] = session.scalars(select(Stay)).all()
        assert (stay.unit, stay.discharged_at, stay.outcome, stay.to_unit) == (
            "KV-CRIT", None, None, None)
        assert session.scalar(select(FeedStay.known_at)) == known_before
        assert list(session.scalars(select(AuditEvent.action).where(
            AuditEvent.entity == "stay"))) == ["insert"]
    # The same process goes on from the stored state, not from its copy of the closed stay:
    # a discharge at 15:00 closes the stay still open (and the dead transfer stays dead: at
    # 13:00 the stay it would leave is no longer open then).
    leave = send(db_url, adt("A03", "K3", occurred="202603011500", location="2000",
                             disposition="01"))
    assert leave.status == "applied", leave.reason
    with db.session_scope(db_url) as session:
        [stay] = session.scalars(select(Stay)).all()
        assert (stay.discharged_at, stay.outcome, stay.to_unit) == (
            _utc("2026-03-01T15:00"), "home", None)
        assert session.scalar(select(FeedDeadLetter.resolved_at)) is None
    assert count(db_url, Stay) == 1


def test_a_unit_imported_while_the_feed_runs_is_found_by_the_next_message(db_url: str) -> None:
    add_units(db_url, "KV-CRIT")
    first = send(db_url, adt("A01", "U1", occurred="202603010900", location="2000",
                             visit="V1"))
    assert first.status == "applied", first.reason  # the process now knows KV-CRIT only
    # 3000 maps to KV-SURG (tests/feeds/hl7_setup.py), which Morrow does not have yet.
    early = send(db_url, adt("A01", "U2", occurred="202603010930", location="3000",
                             visit="V2"))
    assert early.status == "dead_letter" and "KV-SURG" in (early.reason or "")
    add_units(db_url, "KV-SURG")  # units.csv imported while the feed runs
    later = send(db_url, adt("A01", "U3", occurred="202603011000", location="3000",
                             visit="V3"))
    assert later.status == "applied", later.reason
    with db.session_scope(db_url) as session:
        units = sorted(session.scalars(select(Stay.unit)))
    assert units == ["KV-CRIT", "KV-SURG"]
