"""Census snapshots from the feed's state: what the feed had said by each census instant.

The rule checked (the data contract's "as of", DATA_CONTRACT.md): a snapshot at T lists the
stays in the unit at T (admitted by T, not discharged by T) as known at T, so a message sent
after T about an admission before T is not in it; and a snapshot is never taken twice.
Encounters adapted from hl7.org/fhir/R4 encounter-example-f002-lung.json (see
tests/feeds/fhir_examples.py); times invented.
"""

from __future__ import annotations

import copy
from datetime import UTC, datetime

from sqlalchemy import select

from app.feeds.census import record_due
from app.feeds.fhir_import import import_bundle_once
from app.store import db
from app.store.models import CensusRow, CensusSnapshot, ImportBatch, Stay
from tests.conftest import UTC_ZONE
from tests.feeds import fhir_examples as ex
from tests.feeds.hl7_setup import PSEUDONYMISER, add_units
from tests.feeds.test_fhir_bundles import MAPPING

RECEIVED = datetime(2026, 3, 10, 8, 0, tzinfo=UTC)


def encounter(visit: str, start: str) -> dict:  # type: ignore[type-arg]
    found = copy.deepcopy(ex.ENCOUNTER)
    found["id"] = visit
    found["identifier"][0]["value"] = visit
    found["status"] = "in-progress"
    found["period"] = {"start": start}
    found["location"][0]["status"] = "active"
    found["location"][0]["period"] = {"start": start}
    return found


def send(url: str, bundle: dict) -> int:  # type: ignore[type-arg]
    return import_bundle_once(url, ex.as_bytes(bundle), "b.json", mapping=MAPPING,
                              pseudonymiser=PSEUDONYMISER, tz=UTC_ZONE,
                              received_at=RECEIVED).census_snapshots


def snapshots(url: str) -> dict[datetime, int]:
    with db.session_scope(url) as session:
        return {snap.taken_at: len(session.scalars(select(CensusRow).where(
            CensusRow.snapshot_id == snap.id)).all())
            for snap in session.scalars(select(CensusSnapshot))}


def test_a_snapshot_holds_what_was_known_at_its_instant(db_url: str) -> None:
    add_units(db_url)  # census at 00:00 (the default), zone UTC
    assert send(db_url, ex.bundle(ex.LOCATION, ex.PATIENT, encounter("V1", "2015-01-17T06:00:00Z"),
                                  timestamp="2015-01-17T06:05:00Z")) == 0
    # Admitted at 22:00 on the 17th, but told at 03:00 on the 18th: after the 00:00 census.
    late = ex.bundle(ex.LOCATION, ex.PATIENT, encounter("V2", "2015-01-17T22:00:00Z"),
                     timestamp="2015-01-18T03:00:00Z")
    assert send(db_url, late) == 1  # the 18th's census, taken before the late message
    midnight = datetime(2015, 1, 18, 0, 0, tzinfo=UTC)
    assert snapshots(db_url) == {midnight: 1}  # V1 only
    # Later instants (the 19th, 20th) come from the command; the 18th is not taken again.
    with db.session_scope(db_url) as session:
        taken = record_due(session, datetime(2015, 1, 20, 12, 0, tzinfo=UTC), UTC_ZONE)
    assert [(t.taken_at.day, t.occupancy) for t in taken] == [(19, 2), (20, 2)]
    with db.session_scope(db_url) as session:
        assert record_due(session, datetime(2015, 1, 20, 12, 0, tzinfo=UTC), UTC_ZONE) == []
        kinds = {b.kind for b in session.scalars(select(ImportBatch))
                 if b.filename == "census taken from the feed"}
        assert kinds == {"census"}  # stored like an imported snapshot, with its source
        # No discharge is inferred from the feed's snapshots: both stays are still open.
        assert [s.discharged_at for s in session.scalars(select(Stay))] == [None, None]
    assert snapshots(db_url) == {midnight: 1, datetime(2015, 1, 19, tzinfo=UTC): 2,
                                 datetime(2015, 1, 20, tzinfo=UTC): 2}


def test_a_unit_no_feed_serves_gets_no_snapshot(db_url: str) -> None:
    add_units(db_url)
    with db.session_scope(db_url) as session:
        assert record_due(session, datetime(2026, 3, 1, tzinfo=UTC), UTC_ZONE) == []
