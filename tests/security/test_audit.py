"""The audit trail: each kind of write keeps who, when, which record, before and after, and
the import batch or form it came from; the bed manager's page and CSV export show it.

The rows imported are small invented examples (fictional unit and ids).
"""

from __future__ import annotations

import csv
import io
import json
from typing import Any

import pytest
from sqlalchemy import select

from app.ingest import import_file
from app.store import db
from app.store.audit import AuditFilter, list_events, record_audit
from app.store.models import AuditEvent, Booking, ImportBatch, Observation, Stay
from tests.conftest import UTC_ZONE
from tests.ingest.csvtext import BOOKING_HEADER, CENSUS_HEADER, OBS_HEADER, STAY_HEADER, csv_bytes
from tests.security.conftest import PASSWORD, SecuredApp
from tests.security.fixtures import csrf, signed_in_client

pytestmark = pytest.mark.both_databases  # the audit trail on SQLite and PostgreSQL

ACTOR = "bm.test"


def run(url: str, kind: str, data: bytes, name: str) -> int:
    with db.session_scope(url) as session:
        return import_file(session, kind, data, name, tz=UTC_ZONE, actor=ACTOR).batch_id


def events(url: str, **where: Any) -> list[AuditEvent]:
    with db.session_scope(url) as session:
        query = select(AuditEvent).order_by(AuditEvent.id)
        for key, value in where.items():
            query = query.where(getattr(AuditEvent, key) == value)
        return list(session.scalars(query))


def one(url: str, **where: Any) -> AuditEvent:
    found = events(url, **where)
    assert len(found) == 1, (where, [(e.action, e.entity, e.entity_id) for e in found])
    return found[0]


def test_each_kind_of_import_write_is_audited(db_url: str) -> None:
    b1 = run(db_url, "units", b"unit,beds,census_time\nU-AUD,8,08:00\n", "units.csv")
    b2 = run(db_url, "units", b"unit,beds,census_time\nU-AUD,9,07:00\n", "units-2.csv")
    e = one(db_url, entity="unit_beds", action="insert")
    assert (e.before, e.after, e.batch_id, e.actor) == (None, {"beds": 8}, b1, ACTOR)
    e = one(db_url, entity="unit_beds", action="update")
    assert (e.before, e.after, e.batch_id) == ({"beds": 8}, {"beds": 9}, b2)
    e = one(db_url, entity="unit", action="update")
    assert (e.before, e.after) == ({"census_time": "08:00"}, {"census_time": "07:00"})

    b3 = run(db_url, "stays", csv_bytes(STAY_HEADER,
             "S-A1,U-AUD,2026-03-01T10:00,,emergency,,60,f,cardiology,ward"), "stays.csv")
    b4 = run(db_url, "stays", csv_bytes(STAY_HEADER,
             "S-A1,U-AUD,2026-03-01T10:00,2026-03-03T09:00,emergency,home,60,f,cardiology,ward"),
             "stays-2.csv")
    e = one(db_url, entity="stay", entity_id="S-A1", action="insert")
    assert (e.before, e.batch_id) == (None, b3)
    assert e.after is not None and e.after["admitted_at"] == "2026-03-01T10:00:00+00:00"
    assert (e.after["discharged_at"], e.after["specialty"]) == (None, "cardiology")
    e = one(db_url, entity="stay", entity_id="S-A1", action="update")
    assert e.batch_id == b4 and e.actor == ACTOR
    assert e.before == {"discharged_at": None, "outcome": None}
    assert e.after == {"discharged_at": "2026-03-03T09:00:00+00:00", "outcome": "home"}

    # A discharge inferred from census snapshots is an update of the stay, audited too.
    b5 = run(db_url, "census", csv_bytes(CENSUS_HEADER,
        "2026-03-05T07:00,U-AUD,B1,S-C1,2026-03-04T12:00,emergency,50,general",
        "2026-03-06T07:00,U-AUD,B2,S-C2,2026-03-05T12:00,emergency,51,general"), "census.csv")
    e = one(db_url, entity="stay", entity_id="S-C1", action="insert")  # a stay the census made
    assert e.before is None and e.batch_id == b5 and e.after is not None
    assert e.after["admitted_at"] == "2026-03-04T12:00:00+00:00"
    e = one(db_url, entity="stay", entity_id="S-C1", action="update")
    assert e.before == {"discharged_at": None, "discharge_source": None}
    assert e.after == {"discharged_at": "2026-03-06T07:00:00+00:00", "discharge_source": "census"}

    b6 = run(db_url, "bookings", csv_bytes(BOOKING_HEADER,
             "K-1,U-AUD,2026-03-01T09:00,2026-03-10,cardiac-surgery,cabg,"), "bookings.csv")
    e = one(db_url, entity="booking", entity_id="K-1", action="insert")
    assert e.before is None and e.batch_id == b6 and e.after is not None
    assert (e.after["planned_date"], e.after["cancelled_at"]) == ("2026-03-10", None)
    b7 = run(db_url, "bookings", csv_bytes(BOOKING_HEADER,
             "K-1,U-AUD,2026-03-01T09:00,2026-03-10,cardiac-surgery,cabg,2026-03-02T09:00"),
             "bookings-2.csv")
    e = one(db_url, entity="booking", entity_id="K-1", action="update")
    assert (e.before, e.after, e.batch_id) == (
        {"cancelled_at": None}, {"cancelled_at": "2026-03-02T09:00:00+00:00"}, b7)

    # Observations are append-only: every row carries the batch that brought it.
    b8 = run(db_url, "observations", csv_bytes(OBS_HEADER, "S-A1,2026-03-02T08:00,sofa,6,"),
             "obs.csv")
    with db.session_scope(db_url) as session:
        assert session.scalars(select(Observation.batch_id)).all() == [b8]
    # And every file leaves one summary event naming its batch.
    summaries = events(db_url, action="import")
    assert len(summaries) == 8 and all(s.batch_id is not None for s in summaries)
    assert summaries[-1].after == {"rows": 1, "inserted": 1, "updated": 0, "unchanged": 0}


def test_inserted_stays_and_bookings_name_their_batch(db_url: str) -> None:
    run(db_url, "units", b"unit,beds\nU-AUD,8\n", "units.csv")
    stays = run(db_url, "stays", csv_bytes(STAY_HEADER,
                "S-N1,U-AUD,2026-03-01T10:00,,emergency,,60,f,cardiology,ward"), "stays.csv")
    bookings = run(db_url, "bookings", csv_bytes(BOOKING_HEADER,
                   "K-N1,U-AUD,2026-03-01T09:00,2026-03-10,cardiac-surgery,cabg,"),
                   "bookings.csv")
    with db.session_scope(db_url) as session:
        for model, key, batch in ((Stay, "S-N1", stays), (Booking, "K-N1", bookings)):
            row = session.get(model, key)
            assert row is not None and row.batch_id == batch, model.__name__
            event = session.scalar(select(AuditEvent).where(AuditEvent.entity_id == key))
            assert event is not None and (event.action, event.batch_id) == ("insert", batch)


def test_each_kind_of_form_write_is_audited(secured: SecuredApp) -> None:
    client = signed_in_client(secured.app, "bm.test", PASSWORD)
    url = secured.db_url
    signin = events(url, action="signin", actor="bm.test")[-1]
    assert signin.after == {"role": "bed_manager"}

    def post(path: str, **data: str) -> None:
        assert client.post(path, data={**data, "csrf_token": csrf(client)}).status_code == 200

    post("/people/users", username="aud.user", role="viewer", password="0123456789abc")
    e = one(url, entity="user", entity_id="aud.user", action="insert")
    assert e.before is None
    assert e.after == {"username": "aud.user", "role": "viewer", "active": True}
    with db.session_scope(url) as session:
        batch = session.get(ImportBatch, e.batch_id)
        assert batch is not None and (batch.kind, batch.filename, batch.actor) == (
            "form", "POST /people/users", "bm.test")

    post("/people/users/aud.user/role", role="scheduler")
    post("/people/users/aud.user/password", password="another password 1")
    post("/people/users/aud.user/active", active="0")
    updates = events(url, entity="user", entity_id="aud.user", action="update")
    assert [(u.before, u.after) for u in updates] == [
        ({"username": "aud.user", "role": "viewer", "active": True},
         {"username": "aud.user", "role": "scheduler", "active": True}),
        ({"password": "(old)"}, {"password": "(changed)"}),
        ({"username": "aud.user", "role": "scheduler", "active": True},
         {"username": "aud.user", "role": "scheduler", "active": False}),
    ]
    assert all(u.actor == "bm.test" and u.batch_id is not None for u in updates)
    # No password or hash ever reaches the trail.
    trail = json.dumps([[x.before, x.after] for x in events(url)])
    assert "another password" not in trail and "scrypt$" not in trail

    made = client.post("/api/tokens", json={"username": "view.test", "label": "wall screen"},
                       headers={"X-CSRF-Token": csrf(client)}).json()
    client.delete(f"/api/tokens/{made['id']}", headers={"X-CSRF-Token": csrf(client)})
    issued = one(url, entity="api_token", action="insert")
    assert issued.after == {"label": "wall screen", "user": "view.test",
                            "prefix": made["prefix"]}
    assert made["token"] not in trail + json.dumps(issued.after)
    revoked = one(url, entity="api_token", action="update")
    assert revoked.before == {"revoked_at": None} and revoked.after["revoked_at"]


def test_record_audit_for_other_forms(db_url: str) -> None:
    with db.session_scope(db_url) as session:
        record_audit(session, "nic.test", "insert", "observation", "S-9/news2", None,
                     {"value": 5.0}, form="POST /units/{unit}/scores")
        record_audit(session, "nic.test", "update", "observation", "S-9/news2",
                     {"value": 5.0}, {"value": 6.0}, batch_id=None)
    with db.session_scope(db_url) as session:
        rows = list_events(session, AuditFilter(actor="nic.test"), limit=10)
        assert [r.origin for r in rows] == ["", "form POST /units/{unit}/scores"]
        assert rows[1].event.after == {"value": 5.0}


def test_audit_page_and_export(secured: SecuredApp) -> None:
    url = secured.db_url
    # A file whose name is a spreadsheet formula: the name lands in the trail's entity_id.
    formula = '=HYPERLINK("http://x.invalid","open").csv'
    with db.session_scope(url) as session:
        import_file(session, "units", b"unit,beds\n@U-X,3\n", formula, tz=UTC_ZONE,
                    actor="bm.test")
    client = signed_in_client(secured.app, "bm.test", PASSWORD)
    page = client.get("/audit")
    assert page.status_code == 200 and "@U-X" in page.text and "unit_beds" in page.text
    filtered = client.get("/audit", params={"entity": "unit_beds"})
    assert "@U-X@always" in filtered.text and "signin" not in filtered.text

    export = client.get("/audit.csv")
    assert export.status_code == 200 and export.headers["content-type"].startswith("text/csv")
    assert "attachment" in export.headers["content-disposition"]
    rows = list(csv.DictReader(io.StringIO(export.text)))
    assert len(rows) == len(events(url))
    for row in rows:
        for cell in row.values():
            assert cell[:1] not in ("=", "+", "-", "@"), cell
    imported = next(r for r in rows if r["action"] == "import")
    assert imported["entity_id"] == "'" + formula  # neutralised, and nothing lost
    beds = next(r for r in rows if r["entity"] == "unit_beds")
    assert beds["entity_id"] == "'@U-X@always"
    assert json.loads(beds["after"]) == {"beds": 3} and beds["before"] == ""
    assert beds["origin"].startswith("import units") and beds["at"].endswith("+00:00")
    only = list(csv.DictReader(io.StringIO(client.get("/audit.csv",
                                                      params={"action": "signin"}).text)))
    assert {r["action"] for r in only} == {"signin"}
