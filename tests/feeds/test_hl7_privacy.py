"""No name, address, date of birth or identifier from a message reaches the database or the
logs: identifiers are replaced by their keyed hash on reading, the rest is never read.

The messages are the HL7 v2.5.1 ADT^A01 example and messages derived from it
(tests/feeds/hl7_messages.py); ``IDENTIFYING`` lists every identifying value they carry.
"""

from __future__ import annotations

import logging
from pathlib import Path

import pytest
from sqlalchemy import select
from sqlalchemy.engine import make_url

from app.store import db
from app.store.models import FeedDeadLetter
from tests.databases import is_postgres
from tests.feeds.hl7_messages import A01_EXAMPLE, IDENTIFYING, adt, oru
from tests.feeds.hl7_setup import add_units, dump_database, send

pytestmark = pytest.mark.both_databases

MESSAGES = [
    A01_EXAMPLE,
    A01_EXAMPLE,  # a duplicate
    adt("A08", "P2", occurred="202603011000", service="CAR"),
    adt("A02", "P3", occurred="202603021000", location="3000", prior="2000^2012^01"),
    adt("A12", "P4", occurred="202603021000", location="2000^2012^01", prior="3000"),
    oru("P5", [("news2", "4", "202603011100"), ("GLU", "5.5", "202603011100")]),
    adt("A03", "P6", occurred="202603041200", disposition="01"),
    adt("A13", "P7", occurred="202603041200"),
    adt("A01", "P8", occurred="202603050900", location="ICU-EAST", visit="V0002"),  # dead
    adt("A01", "P9", occurred="202603050900", birth="1961-06-15"),  # refused: PID-7
    adt("A01", "P10", occurred="2026-03-05"),  # refused: EVN-6
    adt("A04", "P11"),  # rejected: event not taken
    adt("A11", "P12", occurred="202603050900", visit="V0003"),  # dead: nothing to cancel
]


def test_nothing_identifying_reaches_the_database_or_the_logs(
        db_url: str, caplog: pytest.LogCaptureFixture) -> None:
    add_units(db_url)
    caplog.set_level(logging.DEBUG)
    acks = []
    with caplog.at_level(logging.DEBUG):
        for message in MESSAGES:
            acks.append(send(db_url, message))
    statuses = [r.status for r in acks]
    assert statuses.count("applied") == 7 and statuses.count("duplicate") == 1
    assert statuses.count("dead_letter") == 2 and statuses.count("refused") == 3
    with db.session_scope(db_url) as session:
        kept = session.scalars(select(FeedDeadLetter.text)).all()
    assert all(kept) and len(kept) == 2  # the dead letters keep their (reduced) text
    stored = dump_database(db_url)
    logs = caplog.text
    answers = "\n".join(r.ack + (r.reason or "") for r in acks)
    # The searches can find something: what is not personal is there to be found.
    assert "GOOD HEALTH HOSPITAL" in stored and "KV-SURG" in stored  # facility, unit
    assert "MSG00001" in logs and "P9" in logs  # control ids are logged
    for value in IDENTIFYING:
        assert value not in stored, value
        assert value not in logs, value
        assert value not in answers, value
    if not is_postgres(db_url):  # the file itself, free pages and write-ahead log included
        path = Path(make_url(db_url).database or "")
        raw = b"".join(p.read_bytes() for p in (path, Path(f"{path}-wal")) if p.exists())
        for value in IDENTIFYING:
            assert value.encode() not in raw, value
