"""Helpers for tests of signed-in pages and API calls (invented users, fictional names).

    from tests.security.fixtures import csrf, make_user, signed_in_client

    make_user(db_url, "nurse.a", "nurse_in_charge", "a long password")
    client = signed_in_client(create_app(db_url), "nurse.a", "a long password")
    client.post("/some/form", data={"csrf_token": csrf(client), ...})

For a database that must stay read-only (the shared ``demo_db``), skip signing in:

    app = create_app(demo_db)
    acting_as(app, "viewer")           # every require(...) answers as a viewer would
    TestClient(app).get("/units/KV-CRIT")
"""

from __future__ import annotations

import re
import sqlite3
from pathlib import Path
from typing import Any

from fastapi import FastAPI
from fastapi.testclient import TestClient

from app.store import db
from app.store import users as accounts
from app.web.security import (
    PERMISSIONS,
    ROLE_PERMISSIONS,
    SESSION_COOKIE,
    Actor,
    PermissionDenied,
    _token,
    require,
)

# Tests hash with a cheaper scrypt cost than the service (2**17) so sign-ins stay fast;
# the cost is stored in the hash, so verification follows it.
TEST_LOG2_N = 12
_CSRF_INPUT = re.compile(r'name="csrf_token" value="([^"]*)"')


def make_user(db_url: str, username: str, role: str, password: str) -> None:
    """Store an account (through the same function as `morrow users add`)."""
    with db.session_scope(db_url) as session:
        accounts.create_user(session, username, role, password, actor="test-fixture",
                             password_hash=accounts.hash_password(password, log2_n=TEST_LOG2_N))


def issue_token(db_url: str, username: str, label: str = "test client") -> str:
    """A bearer token acting as ``username``."""
    with db.session_scope(db_url) as session:
        _, raw = accounts.issue_token(session, username, label, actor="test-fixture")
    return raw


def form_csrf(html: str) -> str:
    """The CSRF token of the first form on a rendered page."""
    found = _CSRF_INPUT.search(html)
    assert found is not None and found.group(1), "the page has no form with a CSRF token"
    return found.group(1)


def sign_in_form(client: Any, username: str, password: str) -> Any:
    """Sign in through the form as a browser does, with any httpx-style client (it keeps the
    session cookie); the form's answer, a 303 on success."""
    page = client.get("/signin")
    assert page.status_code == 200, page.text[:300]
    return client.post("/signin", data={"username": username, "password": password,
                                        "csrf_token": form_csrf(page.text), "next": "/"},
                       follow_redirects=False)


def signed_in_client(app: FastAPI, username: str, password: str) -> TestClient:
    """A TestClient that signed in through the sign-in form and keeps its cookies."""
    client = TestClient(app)
    answer = sign_in_form(client, username, password)
    assert answer.status_code == 303, f"sign-in failed ({answer.status_code}): {answer.text}"
    assert client.cookies.get(SESSION_COOKIE)
    return client


def csrf(client: TestClient) -> str:
    """The CSRF token a page would render for this client's session."""
    app = client.app
    assert isinstance(app, FastAPI)
    cookie = client.cookies.get(SESSION_COOKIE)
    assert cookie, "the client is not signed in"
    return _token(app.state.csrf_key, "session", cookie)


def acting_as(app: FastAPI, role: str, username: str = "test.user") -> Actor:
    """Answer every ``require(permission)`` of ``app`` as a signed-in ``role`` would.

    Permissions of the role yield the Actor; the others raise the same 403 as the real
    check. No account or session is written, so it suits read-only databases. Forms still
    need a CSRF token only when a session cookie is sent, which this client does not do.
    """
    actor = Actor(username, role, "session")

    def answer_for(permission: str) -> object:
        def answer() -> Actor:
            if permission not in ROLE_PERMISSIONS[role]:
                raise PermissionDenied(actor, permission)
            return actor

        return answer

    for permission in PERMISSIONS:
        app.dependency_overrides[require(permission)] = answer_for(permission)
    return actor


def dump_sqlite(path: Path) -> dict[str, list[tuple[object, ...]]]:
    """Every table's rows of an SQLite file, sorted: what a backup, a restore or a refused
    restore must preserve."""
    with sqlite3.connect(path) as conn:
        tables = [r[0] for r in conn.execute(
            "SELECT name FROM sqlite_master WHERE type = 'table' AND name NOT LIKE 'sqlite_%'")]
        return {t: sorted(conn.execute(f'SELECT * FROM "{t}"').fetchall(), key=repr)
                for t in tables}
