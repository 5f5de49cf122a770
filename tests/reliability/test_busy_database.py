"""A write that finds SQLite's write lock held past the busy timeout is answered 503 with
plain words (nothing was saved, send it again), never a 500; sent again, it is stored once.

Under load a booking post waited the whole busy timeout (30 s) and got a 500. Here another
connection holds the write lock (as a long import in another process would) and the busy
timeout is cut to a fifth of a second so the test does not wait 30 s. SQLite only: it is
the database with one writer at a time. Invented unit, stays and accounts.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import UTC, datetime, timedelta

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import func, select

from app.store import db
from app.store.models import Booking, Observation
from app.web.app import create_app
from tests.reliability.crash_server import PASSWORD, STAYS, UNIT, seed
from tests.security.fixtures import csrf, issue_token, signed_in_client

BUSY_TIMEOUT_MS = 200


@contextmanager
def write_lock_held(db_url: str) -> Iterator[None]:
    """Another connection holding the write lock (BEGIN IMMEDIATE) until the block ends."""
    other = sqlite3.connect(db_url.removeprefix("sqlite:///"), isolation_level=None)
    try:
        other.execute("BEGIN IMMEDIATE")
        yield
        other.execute("ROLLBACK")
    finally:
        other.close()


def counts(db_url: str) -> tuple[int, int]:
    with db.session_scope(db_url) as session:
        return (session.scalar(select(func.count()).select_from(Observation)) or 0,
                session.scalar(select(func.count()).select_from(Booking)
                               .where(Booking.unit == UNIT)) or 0)


@pytest.fixture
def client(db_url: str, monkeypatch: pytest.MonkeyPatch) -> Iterator[TestClient]:
    monkeypatch.setattr(db, "BUSY_TIMEOUT_MS", BUSY_TIMEOUT_MS)
    seed(db_url)
    db.release_engine(db_url)  # the next engine takes the short timeout
    with signed_in_client(create_app(db_url), "crash.manager", PASSWORD) as signed:
        yield signed
    db.release_engine(db_url)


def writes(client: TestClient, token: str, k: int) -> dict[str, tuple[str, dict[str, object]]]:
    planned = (datetime.now(UTC).date() + timedelta(days=3)).isoformat()
    return {
        "score form": (f"/units/{UNIT}/scores", {"data": {
            "csrf_token": csrf(client), "stay_id": f"S-K{k % STAYS:02d}", "name": "news2",
            "value": "4"}}),
        "booking form": (f"/units/{UNIT}/booking", {"data": {
            "csrf_token": csrf(client), "planned_date": planned, "age": "60",
            "specialty": "general-surgery", "procedure": f"busy{k}"}}),
        "score API": (f"/api/units/{UNIT}/observations", {
            "json": {"stay_id": f"S-K{(k + 1) % STAYS:02d}", "name": "news2", "value": 3},
            "headers": {"authorization": f"Bearer {token}"}}),
    }


@pytest.mark.parametrize("route", ["score form", "booking form", "score API"])
def test_a_write_against_a_held_lock_is_a_503_and_stored_once_when_sent_again(
        db_url: str, client: TestClient, route: str) -> None:
    token = issue_token(db_url, "crash.manager")
    path, request = writes(client, token, 1)[route]
    before = counts(db_url)
    with write_lock_held(db_url):
        refused = client.post(path, follow_redirects=False, **request)  # type: ignore[arg-type]
    assert refused.status_code == 503, (refused.status_code, refused.text[:300])
    assert "nothing was saved" in refused.text and "again" in refused.text
    assert "OperationalError" not in refused.text and "locked" not in refused.text
    assert refused.headers.get("retry-after")
    assert counts(db_url) == before
    again = client.post(path, follow_redirects=False, **request)  # type: ignore[arg-type]
    assert again.status_code in (201, 303), again.text[:300]
    stored = counts(db_url)
    assert stored[0] + stored[1] == before[0] + before[1] + 1
