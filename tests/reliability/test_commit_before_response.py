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
from pathlib import Path
from typing import Any
from urllib.parse import unquote

import httpx2 as httpx
import pytest
from fastapi import FastAPI
from fastapi.routing import APIRoute
from sqlalchemy import Engine, event, select, text
from sqlalchemy.exc import OperationalError
from sqlalchemy.orm import Session

from app.forecast import backtest_jobs
from app.store.models import ImportBatch, Observation
from app.timeutil import as_utc
from app.web import routes_training
from tests.feeds import fhir_examples
from tests.reliability.conftest import PASSWORD, ROLE_USERS, SecuredApp
from tests.reliability.live import (
    UNIT,
    csrf_for,
    feed_setup,
    own_engine,
    seed_unit,
    serving,
    sign_in,
)
from tests.security.fixtures import issue_token

pytestmark = pytest.mark.both_databases

COMMIT_DELAY_S = 0.3
NEW_USER = "new.nurse.rw"
WRITE_METHODS = {"POST", "PUT", "PATCH", "DELETE"}


def api_routes(app: FastAPI) -> list[APIRoute]:
    """Every endpoint of ``app``, routers included (walked, so a router added later counts)."""
    found: list[APIRoute] = []

    def walk(routes: list[Any]) -> None:
        for route in routes:
            if isinstance(route, APIRoute):
                found.append(route)
            elif hasattr(route, "original_router"):  # an included router, as FastAPI keeps it
                walk(route.original_router.routes)
            elif hasattr(route, "routes"):
                walk(route.routes)

    walk(list(app.routes))
    return found


def write_routes(app: FastAPI) -> dict[str, APIRoute]:
    """``"METHOD /path/{param}"`` of every route that can change what is stored."""
    return {f"{method} {route.path}": route for route in api_routes(app)
            for method in sorted((route.methods or set()) & WRITE_METHODS)}


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
        secured: SecuredApp, reader: Engine, monkeypatch: pytest.MonkeyPatch,
        tmp_path: Path) -> None:
    url, app = secured.db_url, secured.app
    seed_unit(url)
    feed_setup(tmp_path, monkeypatch, UNIT)
    nurse_token = issue_token(url, ROLE_USERS["nurse_in_charge"])
    admin_token = issue_token(url, ROLE_USERS["bed_manager"])
    # Training and backtests run in processes of their own; recording the run (and the
    # request to stop it) is what is checked.
    monkeypatch.setattr(routes_training, "start_process", lambda url, run_id: None)
    monkeypatch.setattr(backtest_jobs, "start_process", lambda url, run_id: None)
    lost: list[str] = []
    routes = write_routes(app)
    # The walk finds the routers' routes (23 write routes when this was written).
    assert {"POST /signin", "POST /units/{unit}/bookings/{booking_id}/cancel",
            "PUT /api/units/{unit}/levels", "POST /api/feeds/fhir"} <= set(routes)
    checked: set[str] = set()  # write routes whose answer was checked against the database

    def check(route: str, response: httpx.Response, status: int, sql: str,
              expected: Callable[[Any], bool], **params: Any) -> None:
        # Read first: the point is what is stored the instant the answer is in.
        stored = scalar(reader, sql, **params)
        if response.status_code != status:
            lost.append(f"{route}: answered {response.status_code}, not {status}")
        elif not expected(stored):
            lost.append(f"{route}: confirmed, but the database then held {stored!r}")
        checked.update(label for label, found in routes.items()
                       if label.startswith(f"{response.request.method} ")
                       and found.path_regex.match(response.request.url.path))

    def stored_observed_at(stay_id: str, name: str) -> str:
        with Session(reader) as session:
            found = session.scalars(select(Observation.observed_at).where(
                Observation.stay_id == stay_id, Observation.name == name)).first()
        return as_utc(found).isoformat() if found else "(no score stored)"

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

        # The same time again is a correction (a new row, audited as such).
        observed = stored_observed_at("S-000", "news2")
        answer = nurse.post(f"/units/{UNIT}/scores", data={
            "csrf_token": csrf_for(app, nurse), "stay_id": "S-000", "name": "news2",
            "value": "6", "observed_at": observed})
        check("POST score form, a correction", answer, 303,
              "SELECT count(*) FROM observation o JOIN audit_event a "
              "ON a.batch_id = o.batch_id AND a.action = 'correct' "
              "WHERE o.stay_id = 'S-000' AND o.name = 'news2' AND o.value = 6", lambda n: n == 1)

        answer = nurse.post(f"/units/{UNIT}/scores/withdraw", data={
            "csrf_token": csrf_for(app, nurse), "stay_id": "S-000", "name": "news2",
            "observed_at": observed})
        check("POST score withdraw", answer, 303,
              "SELECT count(*) FROM observation WHERE stay_id = 'S-000' AND name = 'news2' "
              "AND withdrawn", lambda n: n == 1)

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

        booked = found.group(0) if found else "B-none"
        answer = scheduler.post(f"/units/{UNIT}/bookings/{booked}/cancel",
                                data={"csrf_token": csrf_for(app, scheduler)})
        check("POST booking cancel", answer, 303,
              "SELECT count(*) FROM booking WHERE booking_id = :booking "
              "AND cancelled_at IS NOT NULL", lambda n: n == 1, booking=booked)

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

        run = scalar(reader, "SELECT max(id) FROM training_run WHERE unit = :unit",
                     unit=UNIT) or 0
        answer = manager.post(f"/units/{UNIT}/training/{run}/cancel",
                              data={"csrf_token": csrf_for(app, manager)})
        check("POST training cancel", answer, 303,
              "SELECT count(*) FROM training_run r JOIN audit_event a "
              "ON a.entity = 'training_run' AND a.entity_id = CAST(r.id AS VARCHAR(20)) "
              "AND a.action = 'update' WHERE r.id = :id AND r.status = 'cancelled'",
              lambda n: n == 1, id=run)

        answer = manager.post(f"/units/{UNIT}/backtests", data={
            "csrf_token": csrf_for(app, manager), "mornings": str(backtest_jobs.DEFAULT_SPAN)})
        check("POST backtest start", answer, 303,
              "SELECT count(*) FROM backtest_run r JOIN audit_event a "
              "ON a.entity = 'backtest_run' AND a.entity_id = CAST(r.id AS VARCHAR(20)) "
              "WHERE r.unit = :unit", lambda n: n == 1, unit=UNIT)

        run = scalar(reader, "SELECT max(id) FROM backtest_run WHERE unit = :unit",
                     unit=UNIT) or 0
        answer = manager.post(f"/units/{UNIT}/backtests/{run}/cancel",
                              data={"csrf_token": csrf_for(app, manager)})
        check("POST backtest cancel", answer, 303,
              "SELECT result FROM backtest_run WHERE id = :id",
              lambda result: '"state": "cancelled"' in (result or ""), id=run)

        answer = manager.post(f"/units/{UNIT}/levels", data={
            "csrf_token": csrf_for(app, manager), "warning": "15", "alarm": "30"})
        check("POST alert levels form", answer, 303,
              "SELECT count(*) FROM unit u JOIN audit_event a ON a.entity = 'unit' "
              "AND a.entity_id = u.code AND a.actor = :manager WHERE u.code = :unit "
              "AND abs(u.warning_level - 0.15) < 1e-9 AND abs(u.alarm_level - 0.3) < 1e-9",
              lambda n: n == 1, unit=UNIT, manager=ROLE_USERS["bed_manager"])

        answer = api.put(f"/api/units/{UNIT}/levels",
                         headers={"Authorization": f"Bearer {admin_token}"},
                         json={"warning": 0.2, "alarm": 0.4})
        check("PUT /api/units/{unit}/levels", answer, 200,
              "SELECT count(*) FROM unit u JOIN audit_event a ON a.entity = 'unit' "
              "AND a.entity_id = u.code AND a.actor = :manager WHERE u.code = :unit "
              "AND abs(u.warning_level - 0.2) < 1e-9 AND abs(u.alarm_level - 0.4) < 1e-9",
              lambda n: n == 2, unit=UNIT, manager=ROLE_USERS["bed_manager"])

        # The standard's example Encounter and Glasgow score (tests/feeds/fhir_examples.py).
        answer = api.post("/api/feeds/fhir", content=fhir_examples.as_bytes(
            fhir_examples.standard_bundle()), headers={
                "Authorization": f"Bearer {admin_token}",
                "Content-Type": "application/fhir+json"})
        check("POST /api/feeds/fhir", answer, 200,
              "SELECT count(*) FROM observation o JOIN stay s ON s.stay_id = o.stay_id "
              "WHERE s.unit = :unit AND o.name = 'gcs' AND o.value = 13", lambda n: n == 1,
              unit=UNIT)

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
    # Every write route of the app was checked (a route added later fails here until it is).
    assert sorted(set(routes) - checked) == []


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
