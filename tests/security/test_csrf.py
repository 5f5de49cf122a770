"""Every state-changing browser request must carry the session's CSRF token."""

from __future__ import annotations

from fastapi.testclient import TestClient
from sqlalchemy import func, select

from app.store import db
from app.store.models import AuditEvent, Unit, UserAccount
from app.web.security import PRESESSION_COOKIE
from tests.security.conftest import PASSWORD, SecuredApp
from tests.security.fixtures import csrf, form_csrf, issue_token, signed_in_client

NEW_USER = {"username": "added.test", "role": "viewer", "password": "0123456789abc"}


def stored_users(url: str) -> int:
    with db.session_scope(url) as session:
        return session.scalar(select(func.count()).select_from(UserAccount)) or 0


def audit_count(url: str) -> int:
    with db.session_scope(url) as session:
        return session.scalar(select(func.count()).select_from(AuditEvent)) or 0


def test_form_without_or_with_a_wrong_token_is_refused(secured: SecuredApp) -> None:
    client = signed_in_client(secured.app, "bm.test", PASSWORD)
    other = signed_in_client(secured.app, "bm.test", PASSWORD)
    users_before, events_before = stored_users(secured.db_url), audit_count(secured.db_url)
    for token in (None, "", "forged", csrf(other)):  # another session's token is no good
        data = dict(NEW_USER) if token is None else {**NEW_USER, "csrf_token": token}
        answer = client.post("/people/users", data=data)
        assert answer.status_code == 403, token
        assert "security token (CSRF)" in answer.text
    assert stored_users(secured.db_url) == users_before
    assert audit_count(secured.db_url) == events_before  # nothing at all was written
    ok = client.post("/people/users", data={**NEW_USER, "csrf_token": csrf(client)})
    assert ok.status_code == 200 and stored_users(secured.db_url) == users_before + 1


def test_token_in_a_header_or_a_multipart_form(secured: SecuredApp) -> None:
    client = signed_in_client(secured.app, "bm.test", PASSWORD)
    by_header = client.post("/people/users", data={**NEW_USER, "username": "h.test"},
                            headers={"X-CSRF-Token": csrf(client)})
    assert by_header.status_code == 200
    # A file upload form is multipart: the token is read from its fields.
    multipart = client.post("/people/users",
                            data={**NEW_USER, "username": "m.test", "csrf_token": csrf(client)},
                            files={"ignored": ("note.csv", b"a,b\n1,2\n", "text/csv")})
    assert multipart.status_code == 200
    refused = client.post("/people/users", data={**NEW_USER, "username": "n.test"},
                          files={"ignored": ("note.csv", b"a,b\n1,2\n", "text/csv")})
    assert refused.status_code == 403


def test_json_and_delete_calls_from_a_browser_session(secured: SecuredApp) -> None:
    client = signed_in_client(secured.app, "bm.test", PASSWORD)
    body = {"username": "view.test", "label": "x"}
    assert client.post("/api/tokens", json=body).status_code == 403
    made = client.post("/api/tokens", json=body, headers={"X-CSRF-Token": csrf(client)})
    assert made.status_code == 201
    assert client.delete(f"/api/tokens/{made.json()['id']}").status_code == 403
    assert client.delete(f"/api/tokens/{made.json()['id']}",
                         headers={"X-CSRF-Token": csrf(client)}).status_code == 200


def test_bearer_calls_need_no_token_and_cannot_borrow_a_cookie(secured: SecuredApp) -> None:
    raw = issue_token(secured.db_url, "bm.test")
    api = TestClient(secured.app, headers={"Authorization": f"Bearer {raw}"})
    assert api.post("/api/tokens", json={"username": "view.test", "label": "y"}
                    ).status_code == 201
    # A bad bearer token with a good session cookie is refused: the header alone counts.
    browser = signed_in_client(secured.app, "bm.test", PASSWORD)
    mixed = browser.post("/api/tokens", json={"username": "view.test", "label": "z"},
                         headers={"Authorization": "Bearer mrw_wrong"})
    assert mixed.status_code == 401


def test_signin_form_is_protected_too(secured: SecuredApp) -> None:
    client = TestClient(secured.app)
    form = client.get("/signin")
    assert client.cookies.get(PRESESSION_COOKIE)
    missing = client.post("/signin", data={"username": "view.test", "password": PASSWORD},
                          follow_redirects=False)
    assert missing.status_code == 403
    # A token from someone else's sign-in page does not fit this browser's pre-session.
    stranger = TestClient(secured.app)
    foreign = form_csrf(stranger.get("/signin").text)
    assert client.post("/signin", data={"username": "view.test", "password": PASSWORD,
                                        "csrf_token": foreign},
                       follow_redirects=False).status_code == 403
    good = client.post("/signin", data={"username": "view.test", "password": PASSWORD,
                                        "csrf_token": form_csrf(form.text)},
                       follow_redirects=False)
    assert good.status_code == 303


def test_no_cookie_write_gets_401_not_a_csrf_refusal(secured: SecuredApp) -> None:
    answer = TestClient(secured.app).post("/api/tokens", json={"username": "x", "label": "y"})
    assert answer.status_code == 401


def test_a_token_in_other_characters_is_refused_not_a_server_error(secured: SecuredApp) -> None:
    # Found by tests/reliability/test_fuzz_routes.py: hmac.compare_digest raises TypeError
    # on non-ASCII text (Python's hmac documentation), which came back as a 500.
    client = signed_in_client(secured.app, "bm.test", PASSWORD)
    users_before = stored_users(secured.db_url)
    for token in ("?\u00c2", "\u0665\u0660", "\u00e9" * 43):
        answer = client.post("/people/users", data={**NEW_USER, "csrf_token": token})
        assert answer.status_code == 403, token
        fresh = TestClient(secured.app, raise_server_exceptions=False)
        fresh.get("/signin")
        answer = fresh.post("/signin", data={"username": "bm.test", "password": PASSWORD,
                                             "csrf_token": token}, follow_redirects=False)
        assert answer.status_code == 403, token
    # A header travels as Latin-1 text: U+00C2 is one it can carry.
    answer = client.post("/people/users", data=NEW_USER,
                         headers={b"x-csrf-token": "?\u00c2".encode("latin-1")})
    assert answer.status_code == 403
    assert stored_users(secured.db_url) == users_before


def test_a_row_answer_signed_in_other_characters_is_ignored(secured: SecuredApp) -> None:
    # The unit page's signed row answer (routes_scores.row_result) compares a ``sig`` from
    # the address: one in other characters is a forgery to ignore, not a 500.
    with db.session_scope(secured.db_url) as session:
        session.add(Unit(code="KV-TEST"))
    client = signed_in_client(secured.app, "view.test", PASSWORD)
    for sig in ("\u00e9", "\u0665" * 32):
        answer = client.get("/units/KV-TEST", params={
            "entered": "S-1", "outcome": "recorded", "message": "forged", "sig": sig})
        assert answer.status_code == 200, sig  # a 500 before the comparison took bytes
