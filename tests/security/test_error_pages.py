"""Errors as the site's own pages for a person and as JSON for the API (issue 14, item 7).

The status codes are HTTP's own (RFC 9110, sections 15.5.4 403, 15.5.5 404, 15.5.6 405,
15.5.21 422); what is checked here is that a page answer carries the menu and the caution
(the rule every new page keeps) while an /api/ answer keeps ``{"detail": ...}`` JSON.
"""

from __future__ import annotations

import html

from fastapi.testclient import TestClient

from tests.security.conftest import PASSWORD, ROLE_USERS, SecuredApp
from tests.security.fixtures import csrf, signed_in_client

CAUTION = "do not replace, clinical and managerial judgement"


def _is_site_page(answer, status: int) -> str:
    assert answer.status_code == status, (answer.status_code, answer.text[:300])
    assert answer.headers["content-type"].startswith("text/html")
    text = html.unescape(" ".join(answer.text.split()))
    assert CAUTION in text and 'class="main-nav"' in text
    assert '{"detail"' not in text
    return text


def test_page_errors_are_pages_with_menu_and_caution(secured: SecuredApp) -> None:
    manager = signed_in_client(secured.app, ROLE_USERS["bed_manager"], PASSWORD)
    text = _is_site_page(manager.get("/units/NOPE"), 404)
    assert "unit NOPE is not known" in text
    _is_site_page(manager.get("/no/such/page"), 404)
    text = _is_site_page(manager.get("/units/NOPE/scores"), 405)
    assert "cannot be used with GET" in text
    # A form without a required field: 422 as a page naming the field in the form's words.
    text = _is_site_page(manager.post("/units/NOPE/scores", data={
        "csrf_token": csrf(manager), "name": "sofa", "value": "3"}), 422)
    assert "patient is missing" in text
    text = _is_site_page(manager.get("/audit", params={"batch": "x"}), 422)
    assert "not a batch number" in text


def test_a_role_without_the_permission_gets_a_403_page(secured: SecuredApp) -> None:
    viewer = signed_in_client(secured.app, ROLE_USERS["viewer"], PASSWORD)
    text = _is_site_page(viewer.post("/units/NOPE/scores", data={
        "csrf_token": csrf(viewer), "stay_id": "S-1", "name": "sofa", "value": "3"}), 403)
    assert "Not allowed" in text and "'scores' permission" in text
    _is_site_page(viewer.get("/audit"), 403)


def test_the_api_keeps_json(secured: SecuredApp) -> None:
    from tests.security.fixtures import issue_token

    token = issue_token(secured.db_url, ROLE_USERS["viewer"])
    api = TestClient(secured.app, headers={"Authorization": f"Bearer {token}"})
    answer = api.get("/api/units/NOPE/forecast")
    assert answer.status_code == 404 and answer.json() == {"detail": "unit NOPE is not known"}
    answer = api.get("/api/units/NOPE/forecast", params={"days": "many"})
    assert answer.status_code == 422 and answer.json()["detail"][0]["loc"] == ["query", "days"]
    answer = api.post("/api/units/NOPE/observations",
                      json={"stay_id": "S-1", "name": "sofa", "value": 3})
    assert answer.status_code == 403 and "scores" in answer.json()["detail"]
