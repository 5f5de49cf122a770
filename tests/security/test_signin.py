"""Passwords, sessions and the limit on failed sign-ins."""

from __future__ import annotations

import re
from datetime import UTC, datetime, timedelta

import pytest
from fastapi.testclient import TestClient

from app.store import db
from app.store import users as accounts
from app.store.models import UserAccount, WebSession
from app.web.security import SESSION_COOKIE
from tests.security.conftest import PASSWORD, SecuredApp
from tests.security.fixtures import csrf, form_csrf, make_user, signed_in_client

T0 = datetime(2026, 3, 2, 8, 0, tzinfo=UTC)


def test_scrypt_matches_rfc_7914_vector() -> None:
    # RFC 7914, section 12: scrypt(P="password", S="NaCl", N=1024, r=8, p=16, dkLen=64)
    # begins fd ba be 1c 9d 34 72 00 ...; our 32-byte key is the first half (PBKDF2 blocks).
    expected = bytes.fromhex("fdbabe1c9d3472007856e7190d01e9fe7c6ad7cbc8237830e77376634b373162")
    assert accounts._scrypt("password", b"NaCl", 10, 8, 16) == expected


def test_password_hash_format_and_verification() -> None:
    first = accounts.hash_password("correct horse", log2_n=10)
    second = accounts.hash_password("correct horse", log2_n=10)
    scheme, log2_n, r, p, salt, key = first.split("$")
    assert (scheme, log2_n, r, p) == ("scrypt", "10", "8", "1")
    assert first != second  # a fresh salt each time
    assert accounts.verify_password("correct horse", first)
    assert not accounts.verify_password("correct horsf", first)
    assert not accounts.verify_password("correct horse", "not a hash")
    # The service's own cost: OWASP's scrypt minimum N = 2**17, r = 8, p = 1 (from memory).
    assert accounts.SCRYPT_LOG2_N >= 17 and accounts.SCRYPT_R >= 8


def test_account_rules() -> None:
    with pytest.raises(accounts.AccountError, match="at least 10 characters"):
        accounts.check_password_rules("short")
    with pytest.raises(accounts.AccountError, match="user name is 1 to 64"):
        accounts.normalise_username("Bad Name!")
    with pytest.raises(accounts.AccountError, match="role must be one of"):
        accounts.check_role("superuser")
    assert accounts.normalise_username("  Nurse.A ") == "nurse.a"


def test_signin_sets_a_strict_httponly_cookie(secured: SecuredApp) -> None:
    client = TestClient(secured.app)
    form = client.get("/signin?next=/audit")
    assert form.status_code == 200 and 'name="next" value="/audit"' in form.text
    answer = client.post("/signin", data={"username": "view.test", "password": PASSWORD,
                                          "next": "/audit", "csrf_token": form_csrf(form.text)},
                         follow_redirects=False)
    assert answer.status_code == 303 and answer.headers["location"] == "/audit"
    cookie = next(c for c in answer.headers.get_list("set-cookie")
                  if c.startswith(SESSION_COOKIE + "="))
    attrs = {part.strip().split("=")[0].lower() for part in cookie.split(";")}
    assert {"httponly", "samesite", "path", "max-age"} <= attrs
    assert re.search(r"samesite=strict", cookie, re.I)
    # Only a hash of the cookie's secret is stored.
    raw = cookie.split(";")[0].split("=", 1)[1]
    with db.session_scope(secured.db_url) as session:
        hashes = [s.token_hash for s in session.query(WebSession)]
    assert raw not in hashes and len(hashes) == 1


def test_next_never_leaves_the_site(secured: SecuredApp) -> None:
    client = TestClient(secured.app)
    for target in ("https://elsewhere.example/", "//elsewhere.example/", "/\\elsewhere"):
        form = client.get("/signin", params={"next": target})
        answer = client.post("/signin", data={"username": "view.test", "password": PASSWORD,
                                              "next": target, "csrf_token": form_csrf(form.text)},
                             follow_redirects=False)
        assert answer.headers["location"] == "/", target


def test_wrong_password_then_lockout(secured: SecuredApp, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("MORROW_MAX_FAILED_SIGNINS", "3")
    from app.config import get_settings

    get_settings.cache_clear()
    client = TestClient(secured.app)
    token = form_csrf(client.get("/signin").text)

    def attempt(name: str, password: str) -> int:
        answer = client.post("/signin", data={"username": name, "password": password,
                                              "csrf_token": token}, follow_redirects=False)
        return answer.status_code

    assert attempt("sched.test", "wrong password 1") == 401
    assert attempt("sched.test", "wrong password 2") == 401
    assert attempt("sched.test", "wrong password 3") == 429  # the third failure locks
    assert attempt("sched.test", PASSWORD) == 429  # locked: even the right password waits
    assert SESSION_COOKIE not in client.cookies
    # Other names are not affected; unknown names are limited the same way.
    assert attempt("view.test", PASSWORD) == 303
    client.cookies.clear()
    token = form_csrf(client.get("/signin").text)
    assert [attempt("nobody.here", "x" * 12) for _ in range(3)] == [401, 401, 429]
    # A bed manager's new password lifts the lock.
    with db.session_scope(secured.db_url) as session:
        accounts.set_password(session, "sched.test", "a brand new password", actor="test")
    assert attempt("sched.test", "a brand new password") == 303


def test_lock_window_expires(db_url: str) -> None:
    make_user(db_url, "clock.test", "viewer", PASSWORD)
    window = timedelta(minutes=15)

    def attempt(password: str, at: datetime) -> accounts.SigninOutcome:
        with db.session_scope(db_url) as session:
            return accounts.attempt_signin(session, "clock.test", password, now=at,
                                           max_failures=2, window=window)

    assert attempt("nope nope nope", T0).locked_until is None
    locked = attempt("nope nope nope", T0 + timedelta(minutes=1)).locked_until
    assert locked == T0 + timedelta(minutes=16)
    assert attempt(PASSWORD, T0 + timedelta(minutes=10)).user is None
    assert attempt(PASSWORD, T0 + timedelta(minutes=16)).user is not None
    # Failures spread wider than the window never lock.
    for k in range(4):
        assert attempt("nope nope nope", T0 + timedelta(hours=1 + k)).locked_until is None


def test_session_ends_when_idle_or_old(db_url: str) -> None:
    make_user(db_url, "idle.test", "viewer", PASSWORD)
    with db.session_scope(db_url) as session:
        user = session.query(UserAccount).one()
        raw = accounts.create_session(session, user, now=T0, lifetime=timedelta(hours=12))
    idle = timedelta(minutes=120)

    def who(at: datetime) -> str | None:
        with db.session_scope(db_url) as session:
            found = accounts.session_user(session, raw, now=at, idle=idle)
            return None if found is None else found.username

    assert who(T0 + timedelta(minutes=119)) == "idle.test"  # and this use resets idleness
    assert who(T0 + timedelta(minutes=230)) == "idle.test"
    assert who(T0 + timedelta(minutes=230 + 121)) is None  # idle too long
    with db.session_scope(db_url) as session:
        raw2 = accounts.create_session(session, session.query(UserAccount).one(), now=T0,
                                       lifetime=timedelta(hours=1))
        assert accounts.session_user(session, raw2, now=T0 + timedelta(minutes=61),
                                     idle=idle) is None  # past its lifetime


def test_signout_ends_the_session(secured: SecuredApp) -> None:
    client = signed_in_client(secured.app, "nic.test", PASSWORD)
    old_cookie = client.cookies.get(SESSION_COOKIE)
    assert client.get("/").status_code == 200
    out = client.post("/signout", data={"csrf_token": csrf(client)}, follow_redirects=False)
    assert out.status_code == 303 and out.headers["location"] == "/signin"
    replay = TestClient(secured.app, cookies={SESSION_COOKIE: old_cookie})
    assert replay.get("/", follow_redirects=False).status_code == 303


def test_signed_in_page_shows_who_and_sign_out(secured: SecuredApp) -> None:
    client = signed_in_client(secured.app, "bm.test", PASSWORD)
    page = client.get("/")
    assert "bm.test (bed manager)" in page.text and 'action="/signout"' in page.text
    assert form_csrf(page.text) == csrf(client)
    viewer = signed_in_client(secured.app, "view.test", PASSWORD).get("/")
    assert "view.test (viewer)" in viewer.text and 'href="/audit"' not in viewer.text
