"""Shared set-up of the HL7 v2 tests: a database with the Kestrel Vale units, a fixed site
secret, a mapping, and ``send`` (one message through ``receive_hl7``, as the listener does)."""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

from sqlalchemy import func, select

from app.feeds.mapping import FeedMapping, mapping_from_dict
from app.feeds.pseudonym import Pseudonymiser
from app.feeds.receive import Receipt, receive_hl7
from app.store import db
from app.store.models import Base, Unit
from tests.conftest import UTC_ZONE

PSEUDONYMISER = Pseudonymiser(b"0123456789abcdef0123456789abcdef-test-secret")
# The example's point of care 2000 is the critical care unit; 3000 the surgical unit;
# WARD-4 a ward Morrow does not serve.
MAPPING = mapping_from_dict({"units": {"2000": "KV-CRIT", "3000": "KV-SURG"},
                             "locations": {"ignore": ["WARD-4"]},
                             "outcomes": {"01": "home", "20": "died"}})
RECEIVED = datetime(2026, 3, 10, 8, 0, tzinfo=UTC)


def add_units(url: str, *codes: str) -> None:
    with db.session_scope(url) as session:
        for code in codes or ("KV-CRIT", "KV-SURG"):
            session.add(Unit(code=code))


def send(url: str, text: str, *, mapping: FeedMapping = MAPPING,
         received_at: datetime = RECEIVED) -> Receipt:
    return receive_hl7(url, text, mapping=mapping, pseudonymiser=PSEUDONYMISER, tz=UTC_ZONE,
                       received_at=received_at)


def count(url: str, model: Any) -> int:
    with db.session_scope(url) as session:
        return int(session.scalar(select(func.count()).select_from(model)) or 0)


def dump_database(url: str) -> str:
    """Every value of every table as text (what a copy of the database would reveal)."""
    parts = []
    engine = db.get_engine(url)
    with engine.connect() as conn:
        for table in Base.metadata.sorted_tables:
            for row in conn.execute(table.select()):
                parts.append(" ".join(str(v) for v in row))
    return "\n".join(parts)
