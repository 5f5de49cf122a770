"""A write the server confirms is already committed when the confirmation arrives.

The real app runs under uvicorn on loopback; every commit is made slow (0.3 s), and right
as each write route answers, the test reads the database from a connection of its own:
the row, its import batch and its audit event must be there. Then a commit that fails
must come back as an error, never as a success. Invented unit, stays and accounts.
"""

from __future__ import annotations

import re
import sqlite3
import time
from collections.abc import Callable, Iterator
from datetime import UTC, datetime, timedelta
from typing import Any
from urllib.parse import unquote

import httpx2 as httpx
import pytest
from sqlalchemy import Engine, event, text
from sqlalchemy.exc import OperationalError
from sqlalchemy.orm import Session

from app.store.models import ImportBatch
from app.web import routes_training
from tests.reliability.conftest import PASSWORD, ROLE_USERS, SecuredApp
from tests.reliability.live import UNIT, csrf_for, own_engine, seed_unit, serving, sign_in
from tests.security.fixtures import issue_token

pytestmark = pytest.mark.both_databases

COMMIT_DELAY_S = 0.3
NEW_USER = "new.nurse.rw"


@pytest.fixture
def reader(secured: SecuredApp) -> Iterator[Engine]:
    engine = own_engine(secured.db_url)
    yield engine
    engine.dispose()


def scalar(engine: Engine, sql: str, **params: Any) -> Any:
    with engine.connect() as connection:
        return connection.execute(text(sql), params).scalar()


def slow_commits(monkeypatch: pytest.MonkeyPatch) -> None:
    real_commit = Session.commit

    def slow_commit(self: Session) -> None:
        time.sleep(COMMIT_DELAY_S)
        real_commit(self)

    monkeypatch.setattr(Session, "commit", slow_commit)


def client(base: str) -> httpx.Client:
    return httpx.Client(base_url=base, follow_redirects=False, timeout=60)


def test_every_write_route_has_committed_when_its_answer_arrives(
        secured: SecuredApp, reader: Engine, monkeypatch: pytest.MonkeyPatch) -> None:
    url, app = secured.db_url, secured.app
    seed_unit(url)
    nurse_token = issue_token(url, ROLE_USERS["nurse_in_charge"])
    admin_token = issue_token(url, ROLE_USERS["bed_manager"])
    # Training itself runs in a process of its own; recording the run is what is checked.
    monkeypatch.setattr(routes_training, "start_process", lambda url, run_id: None)
    lost: list[str] = []

    def check(route: str, response: httpx.Response, status: int, sql: str,
              expected: Callable[[Any], bool], **params: Any) -> None:
        # Read first: the point is what is stored the instant the answer is in.
        stored = scalar(reader, sql, **params)
        if response.status_code != status:
            lost.append(f"{route}: answered {response.status_code}, not {status}")
        elif not expected(stored):
            lost.append(f"{route}: confirmed, but the database then held {stored!r}")

    with (serving(app) as base, client(base) as manager, client(base) as nurse,
          client(base) as scheduler, client(base) as viewer, client(base) as api):
        for person, role in ((manager, "bed_manager"), (nurse, "nurse_in_charge"),
                             (scheduler, "scheduler")):
            assert sign_in(person, ROLE_USERS[role], PASSWORD).status_code == 303
        slow_commits(monkeypatch)

        answer = nurse.post(f"/units/{UNIT}/scores", data={
            "csrf_token": csrf_for(app, nurse), "stay_id": "S-000", "name": "news2",
            "value": "5"})
        check("POST score form", answer, 303,
              "SELECT count(*) FROM observation o JOIN import_batch b ON b.id = o.batch_id "
              "JOIN audit_event a ON a.batch_id = b.id AND a.action = 'import' "
              "WHERE o.stay_id = 'S-000' AND o.name = 'news2'", lambda n: n == 1)

        answer = api.post(f"/api/units/{UNIT}/observations",
                          headers={"Authorization": f"Bearer {nurse_token}"},
                          json={"stay_id": "S-001", "name": "sofa", "value": 4})
        check("POST score API", answer, 201,
              "SELECT count(*) FROM observation o JOIN import_batch b ON b.id = o.batch_id "
              "JOIN audit_event a ON a.batch_id = b.id AND a.action = 'import' "
              "WHERE o.stay_id = 'S-001' AND o.name = 'sofa'", lambda n: n == 1)

        planned = (datetime.now(UTC) + timedelta(days=3)).date().isoformat()
        answer = scheduler.post(f"/units/{UNIT}/booking", data={
            "csrf_token": csrf_for(app, scheduler), "planned_date": planned, "age": "64",
            "specialty": "orthopaedics", "procedure": "hip"})
        found = re.search(r"B-[0-9a-f]{8}", unquote(answer.headers.get("location", "")))
        check("POST booking form", answer, 303,
              "SELECT count(*) FROM booking k JOIN import_batch b ON b.id = k.batch_id "
              "JOIN audit_event a ON a.batch_id = b.id AND a.action = 'import' "
              "WHERE k.booking_id = :booking", lambda n: n == 1,
              booking=found.group(0) if found else "(no booking id in the answer)")

        admitted = datetime.now(UTC) - timedelta(hours=5)
        stays = "".join(f"S-1{i:02d},{UNIT},{admitted:%Y-%m-%dT%H:00},elective\n"
                        for i in range(20))
        answer = manager.post("/data/upload", data={
            "csrf_token": csrf_for(app, manager), "kind": "stays"}, files={"file": (
                "rw-stays.csv", f"stay_id,unit,admitted_at,admission_type\n{stays}".encode(),
                "text/csv")})
        check("POST upload", answer, 200,
              "SELECT count(*) FROM stay s JOIN import_batch b ON b.id = s.batch_id "
              "JOIN audit_event a ON a.batch_id = b.id AND a.action = 'import' "
              "WHERE b.filename = 'rw-stays.csv'", lambda n: n == 20)

        answer = manager.post(f"/units/{UNIT}/training",
                              data={"csrf_token": csrf_for(app, manager)})
        check("POST training start", answer, 303,
              "SELECT count(*) FROM training_run r JOIN audit_event a "
              "ON a.entity = 'training_run' AND a.entity_id = CAST(r.id AS VARCHAR(20)) "
              "WHERE r.unit = :unit", lambda n: n == 1, unit=UNIT)

        admin_form = {"csrf_token": csrf_for(app, manager)}
        answer = manager.post("/people/users", data={
            **admin_form, "username": NEW_USER, "role": "nurse_in_charge",
            "password": "a fresh long password"})
        check("POST add account", answer, 200,
              "SELECT count(*) FROM user_account WHERE username = :name", lambda n: n == 1,
              name=NEW_USER)

        answer = manager.post(f"/people/users/{NEW_USER}/role",
                              data={**admin_form, "role": "scheduler"})
        check("POST change role", answer, 200,
              "SELECT role FROM user_account WHERE username = :name",
              lambda role: role == "scheduler", name=NEW_USER)

        before = scalar(reader, "SELECT password_hash FROM user_account WHERE username = :name",
                        name=NEW_USER)
        answer = manager.post(f"/people/users/{NEW_USER}/password",
                              data={**admin_form, "password": "another long password"})
        check("POST reset password", answer, 200,
              "SELECT password_hash FROM user_account WHERE username = :name",
              lambda stored: stored is not None and stored != before, name=NEW_USER)

        answer = manager.post(f"/people/users/{NEW_USER}/active",
                              data={**admin_form, "active": "0"})
        check("POST disable account", answer, 200,
              "SELECT count(*) FROM user_account WHERE username = :name AND NOT active",
              lambda n: n == 1, name=NEW_USER)

        answer = manager.post("/people/tokens", data={
            **admin_form, "username": ROLE_USERS["viewer"], "label": "rw ward tablet"})
        check("POST issue token form", answer, 200,
              "SELECT count(*) FROM api_token WHERE label = 'rw ward tablet'", lambda n: n == 1)

        tablet = scalar(reader, "SELECT id FROM api_token WHERE label = 'rw ward tablet'") or 0
        answer = manager.post(f"/people/tokens/{tablet}/revoke", data=admin_form)
        check("POST revoke token form", answer, 200,
              "SELECT count(*) FROM api_token WHERE id = :id AND revoked_at IS NOT NULL",
              lambda n: n == 1, id=tablet)

        bearer = {"Authorization": f"Bearer {admin_token}"}
        answer = api.post("/api/tokens", headers=bearer,
                          json={"username": ROLE_USERS["viewer"], "label": "rw wall screen"})
        issued = answer.json().get("id", 0) if answer.status_code == 201 else 0
        check("POST /api/tokens", answer, 201,
              "SELECT count(*) FROM api_token WHERE id = :id", lambda n: n == 1, id=issued)

        answer = api.delete(f"/api/tokens/{issued}", headers=bearer)
        check("DELETE /api/tokens/{id}", answer, 200,
              "SELECT count(*) FROM api_token WHERE id = :id AND revoked_at IS NOT NULL",
              lambda n: n == 1, id=issued)

        sessions_of_viewer = (
            "SELECT count(*) FROM web_session w JOIN user_account u ON u.id = w.user_id "
            "WHERE u.username = :name")
        answer = sign_in(viewer, ROLE_USERS["viewer"], PASSWORD)
        check("POST sign-in", answer, 303,
              sessions_of_viewer + " AND EXISTS (SELECT 1 FROM audit_event a "
              "WHERE a.action = 'signin' AND a.actor = :name)",
              lambda n: n == 1, name=ROLE_USERS["viewer"])

        token = csrf_for(app, viewer) if viewer.cookies.get("morrow_session") else ""
        answer = viewer.post("/signout", data={"csrf_token": token})
        check("POST sign-out", answer, 303,
              "SELECT count(*) FROM audit_event a WHERE a.action = 'signout' "
              "AND a.actor = :name AND NOT EXISTS (" + sessions_of_viewer.replace(
                  "count(*)", "1") + ")", lambda n: n == 1, name=ROLE_USERS["viewer"])

    assert not lost, "writes confirmed before they were committed:\n" + "\n".join(lost)


def test_a_commit_that_fails_is_answered_as_an_error(
        secured: SecuredApp, reader: Engine, monkeypatch: pytest.MonkeyPatch) -> None:
    url, app = secured.db_url, secured.app
    seed_unit(url)
    nurse_token = issue_token(url, ROLE_USERS["nurse_in_charge"])
    real_commit = Session.commit

    def note_imports(session: Session, _context: Any) -> None:
        if any(isinstance(row, ImportBatch) for row in session.new):
            session.info["imported"] = True

    def failing_commit(self: Session) -> None:
        if self.info.get("imported"):
            # What SQLite says when another writer held the lock past the busy timeout.
            raise OperationalError("COMMIT", {}, sqlite3.OperationalError("database is locked"))
        real_commit(self)  # sign-in bookkeeping still commits

    answers = []
    event.listen(Session, "after_flush", note_imports)
    try:
        with serving(app) as base, client(base) as api, client(base) as nurse:
            assert sign_in(nurse, ROLE_USERS["nurse_in_charge"], PASSWORD).status_code == 303
            monkeypatch.setattr(Session, "commit", failing_commit)
            answers.append(nurse.post(f"/units/{UNIT}/scores", data={
                "csrf_token": csrf_for(app, nurse), "stay_id": "S-003", "name": "news2",
                "value": "7"}))
            answers.append(api.post(f"/api/units/{UNIT}/observations",
                                    headers={"Authorization": f"Bearer {nurse_token}"},
                                    json={"stay_id": "S-002", "name": "sofa", "value": 6}))
            stored = scalar(reader, "SELECT count(*) FROM observation "
                                    "WHERE stay_id IN ('S-002', 'S-003')")
    finally:
        event.remove(Session, "after_flush", note_imports)
    assert stored == 0
    for answer in answers:
        assert answer.status_code == 503, (answer.request.url, answer.status_code, answer.text)
        assert "nothing was saved" in answer.text
        assert "Error" not in answer.text and "COMMIT" not in answer.text
