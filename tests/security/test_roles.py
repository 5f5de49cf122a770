"""Each role may do what its row of the role table allows and gets 403 for the rest.

Source of the table: issue 6 ("People, audit and hardening"): bed manager everything
(including users and units), scheduler bookings, nurse in charge scores and flags,
viewer read only; the permission names are those the other routes use.
"""

from __future__ import annotations

import pytest
from fastapi import Depends, FastAPI
from fastapi.testclient import TestClient

from app.web.security import PERMISSIONS, ROLE_PERMISSIONS, Actor, require
from tests.security.conftest import PASSWORD, ROLE_USERS, SecuredApp
from tests.security.fixtures import csrf, issue_token, signed_in_client

# Written out from the issue, not computed from the code under test.
EXPECTED_TABLE = {
    "bed_manager": {"read", "scores", "bookings", "data", "admin"},
    "scheduler": {"read", "bookings"},
    "nurse_in_charge": {"read", "scores"},
    "viewer": {"read"},
}


def add_probes(app: FastAPI) -> None:
    """One read and one write route per permission, on a page path and an API path."""
    for permission in PERMISSIONS:
        dep = Depends(require(permission))

        def answer(actor: Actor = dep) -> dict[str, str]:
            return {"username": actor.username, "via": actor.via}

        app.get(f"/probe/{permission}")(answer)
        app.post(f"/probe/{permission}")(answer)
        app.get(f"/api/probe/{permission}")(answer)
        app.post(f"/api/probe/{permission}")(answer)


def test_role_table_matches_the_issue() -> None:
    assert {role: set(perms) for role, perms in ROLE_PERMISSIONS.items()} == EXPECTED_TABLE


def test_unknown_permission_is_a_programming_error() -> None:
    with pytest.raises(ValueError, match="permission must be one of"):
        require("delete_everything")


@pytest.mark.parametrize("role", sorted(ROLE_USERS))
def test_session_role_allowed_and_refused(secured: SecuredApp, role: str) -> None:
    add_probes(secured.app)
    client = signed_in_client(secured.app, ROLE_USERS[role], PASSWORD)
    token = csrf(client)
    for permission in PERMISSIONS:
        allowed = permission in EXPECTED_TABLE[role]
        want = 200 if allowed else 403
        for path in (f"/probe/{permission}", f"/api/probe/{permission}"):
            got = client.get(path)
            assert got.status_code == want, (role, permission, path, got.text)
            posted = client.post(path, headers={"X-CSRF-Token": token})
            assert posted.status_code == want, (role, permission, path, posted.text)
            if allowed:
                assert got.json() == {"username": ROLE_USERS[role], "via": "session"}
            else:
                assert permission in got.text and "your role does not have" in got.text


@pytest.mark.parametrize("role", sorted(ROLE_USERS))
def test_token_role_allowed_and_refused(secured: SecuredApp, role: str) -> None:
    add_probes(secured.app)
    raw = issue_token(secured.db_url, ROLE_USERS[role])
    client = TestClient(secured.app, headers={"Authorization": f"Bearer {raw}"})
    for permission in PERMISSIONS:
        want = 200 if permission in EXPECTED_TABLE[role] else 403
        # A bearer call needs no CSRF token: a browser cannot send this header across sites.
        got = client.post(f"/api/probe/{permission}")
        assert got.status_code == want, (role, permission, got.text)
        if want == 200:
            assert got.json() == {"username": ROLE_USERS[role], "via": "token"}


@pytest.mark.parametrize("role", sorted(ROLE_USERS))
def test_real_admin_routes_follow_the_table(secured: SecuredApp, role: str) -> None:
    client = signed_in_client(secured.app, ROLE_USERS[role], PASSWORD)
    is_manager = "admin" in EXPECTED_TABLE[role]
    assert client.get("/").status_code == 200  # every role reads
    for path in ("/people", "/audit", "/audit.csv", "/api/tokens"):
        assert client.get(path).status_code == (200 if is_manager else 403), (role, path)
    issued = client.post("/api/tokens", json={"username": "view.test", "label": "probe"},
                         headers={"X-CSRF-Token": csrf(client)})
    assert issued.status_code == (201 if is_manager else 403), issued.text
    added = client.post("/people/users", data={"username": f"new.{role.replace('_', '')}",
                                               "role": "viewer", "password": "0123456789ab",
                                               "csrf_token": csrf(client)})
    assert added.status_code == (200 if is_manager else 403), added.text


def test_unauthenticated_requests(secured: SecuredApp) -> None:
    add_probes(secured.app)
    client = TestClient(secured.app)
    # Pages send the browser to the sign-in form and remember where it was going.
    page = client.get("/probe/read?x=1", follow_redirects=False)
    assert page.status_code == 303
    assert page.headers["location"] == "/signin?next=%2Fprobe%2Fread%3Fx%3D1"
    # API writes and reads get 401 with the scheme to use.
    for method in ("GET", "POST"):
        answer = client.request(method, "/api/probe/read")
        assert answer.status_code == 401
        assert answer.headers["www-authenticate"] == "Bearer"
    assert client.post("/api/tokens", json={"username": "view.test", "label": "x"}
                       ).status_code == 401
    assert client.delete("/api/tokens/1").status_code == 401
    # Wrong or revoked credentials are no better than none.
    bogus = TestClient(secured.app, headers={"Authorization": "Bearer mrw_not-a-token"})
    assert bogus.post("/api/tokens", json={"username": "view.test", "label": "x"}
                      ).status_code == 401
    assert client.get("/health").status_code == 200  # the health check stays public
    assert client.get("/static/morrow.css").status_code == 200


def test_revoked_token_and_disabled_user_lose_access(secured: SecuredApp) -> None:
    manager = signed_in_client(secured.app, "bm.test", PASSWORD)
    issued = manager.post("/api/tokens", json={"username": "nic.test", "label": "ward pc"},
                          headers={"X-CSRF-Token": csrf(manager)})
    assert issued.status_code == 201
    body = issued.json()
    api = TestClient(secured.app, headers={"Authorization": f"Bearer {body['token']}"})
    assert api.get("/api/whoami").json()["role"] == "nurse_in_charge"
    listed = manager.get("/api/tokens").json()
    assert [t["prefix"] for t in listed] == [body["prefix"]] and "token" not in listed[0]
    revoked = manager.delete(f"/api/tokens/{body['id']}", headers={"X-CSRF-Token": csrf(manager)})
    assert revoked.status_code == 200 and revoked.json()["revoked_at"] is not None
    assert api.get("/api/whoami").status_code == 401
    # A disabled account's sessions and tokens stop at once.
    nurse = signed_in_client(secured.app, "nic.test", PASSWORD)
    second = issue_token(secured.db_url, "nic.test")
    api2 = TestClient(secured.app, headers={"Authorization": f"Bearer {second}"})
    assert nurse.get("/").status_code == 200 and api2.get("/api/whoami").status_code == 200
    off = manager.post("/people/users/nic.test/active",
                       data={"active": "0", "csrf_token": csrf(manager)})
    assert off.status_code == 200 and "nic.test is disabled" in off.text
    assert nurse.get("/", follow_redirects=False).status_code == 303
    assert api2.get("/api/whoami").status_code == 401


def test_role_change_takes_effect_on_the_next_request(secured: SecuredApp) -> None:
    viewer = signed_in_client(secured.app, "view.test", PASSWORD)
    add_probes(secured.app)
    assert viewer.get("/probe/scores").status_code == 403
    manager = signed_in_client(secured.app, "bm.test", PASSWORD)
    changed = manager.post("/people/users/view.test/role",
                           data={"role": "nurse_in_charge", "csrf_token": csrf(manager)})
    assert changed.status_code == 200
    assert viewer.get("/probe/scores").status_code == 200


def test_last_bed_manager_cannot_be_demoted(secured: SecuredApp) -> None:
    manager = signed_in_client(secured.app, "bm.test", PASSWORD)
    answer = manager.post("/people/users/bm.test/role",
                          data={"role": "viewer", "csrf_token": csrf(manager)})
    assert answer.status_code == 400 and "last active bed manager" in answer.text
    assert manager.get("/people").status_code == 200


def test_acting_as_follows_the_role_table(secured: SecuredApp) -> None:
    from tests.security.fixtures import acting_as

    add_probes(secured.app)
    acting_as(secured.app, "scheduler")
    client = TestClient(secured.app)
    for permission in PERMISSIONS:
        want = 200 if permission in EXPECTED_TABLE["scheduler"] else 403
        assert client.get(f"/api/probe/{permission}").status_code == want, permission
    assert client.get("/api/whoami").json()["username"] == "test.user"
