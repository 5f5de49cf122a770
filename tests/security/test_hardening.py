"""Security headers, the upload limit, error logging, CSV cells, the bind address."""

from __future__ import annotations

import logging
import re
from collections.abc import Iterator
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from app.config import PROJECT_ROOT
from app.web.security import csv_safe
from tests.security.conftest import PASSWORD, SecuredApp
from tests.security.fixtures import csrf, issue_token, signed_in_client


def directives(policy: str) -> dict[str, str]:
    out = {}
    for part in policy.split(";"):
        name, _, value = part.strip().partition(" ")
        out[name] = value
    return out


def test_security_headers_on_every_kind_of_answer(secured: SecuredApp) -> None:
    client = TestClient(secured.app)
    signed = signed_in_client(secured.app, "view.test", PASSWORD)
    answers = [client.get("/health"), client.get("/signin"), client.get("/static/morrow.css"),
               client.get("/no/such/page"), client.get("/api/whoami"), signed.get("/"),
               signed.post("/people/users", data={})]  # 403 (no CSRF token)
    for answer in answers:
        h = answer.headers
        csp = directives(h["content-security-policy"])
        assert csp["script-src"] == "'self'", answer.url  # no inline script, no eval
        assert csp["frame-ancestors"] == "'none'" and csp["object-src"] == "'none'"
        assert h["x-content-type-options"] == "nosniff"
        assert h["referrer-policy"] == "no-referrer"
        assert h["x-frame-options"] == "DENY"
    assert signed.get("/").headers["cache-control"] == "no-store"  # pages hold patient data


def test_templates_hold_no_inline_script() -> None:
    """The policy forbids inline script, so no template may depend on it (all templates)."""
    for path in sorted(Path(PROJECT_ROOT / "templates").glob("*.html")):
        text = path.read_text("utf-8")
        for tag in re.findall(r"<script\b[^>]*>", text, flags=re.I):
            assert "src=" in tag or 'type="application/json"' in tag, (path.name, tag)
        assert not re.search(r"\son[a-z]+\s*=", text, flags=re.I), path.name  # onclick=...
        assert "javascript:" not in text.lower(), path.name


def test_upload_over_the_limit_is_refused_with_a_message(secured: SecuredApp) -> None:
    secured.app.state.max_upload_bytes = 1000
    client = signed_in_client(secured.app, "bm.test", PASSWORD)
    big = {"csrf_token": csrf(client), "username": "x" * 2000}
    page = client.post("/people/users", data=big)
    assert page.status_code == 413
    assert "larger than the limit of 0.001 MB" in page.text and "nothing was read" in page.text
    raw = issue_token(secured.db_url, "bm.test")
    api = TestClient(secured.app, headers={"Authorization": f"Bearer {raw}"})
    answer = api.post("/api/tokens", content=b"{" + b" " * 5000 + b"}",
                      headers={"content-type": "application/json"})
    assert answer.status_code == 413 and "larger than the limit" in answer.json()["detail"]

    def chunks() -> Iterator[bytes]:  # no Content-Length: counted as it arrives
        for _ in range(10):
            yield b" " * 200

    streamed = api.post("/api/tokens", content=chunks(),
                        headers={"content-type": "application/json"})
    assert streamed.status_code == 413
    small = api.post("/api/tokens", json={"username": "view.test", "label": "fits"})
    assert small.status_code == 201


def test_errors_are_logged_without_the_data(secured: SecuredApp,
                                            caplog: pytest.LogCaptureFixture) -> None:
    @secured.app.get("/api/broken/{stay_id}")
    def broken(stay_id: str) -> None:
        raise ValueError(f"stay {stay_id} with sofa 11 could not be read")

    client = TestClient(secured.app, raise_server_exceptions=False)
    with caplog.at_level(logging.DEBUG):
        answer = client.get("/api/broken/S-PRIVATE-4242")
    assert answer.status_code == 500
    assert "S-PRIVATE-4242" not in answer.text
    # The test's own HTTP client logs the URL it asked for; that is not the server's log.
    server = [r for r in caplog.records if not r.name.startswith("httpx")]
    logged = "\n".join(r.getMessage() + (r.exc_text or "") for r in server)
    assert "ValueError" in logged and "/api/broken/{stay_id}" in logged
    assert "S-PRIVATE-4242" not in logged and "sofa 11" not in logged
    assert all(r.exc_info is None for r in server)  # no traceback with locals


def test_csv_cells_that_start_a_formula_are_neutralised() -> None:
    # OWASP "CSV Injection": cells starting = + - @ (and tab, carriage return) (from memory).
    for cell in ("=1+1", "+1", "-2+3", "@SUM(A1)", "\t=1", "\r=1",
                 '=HYPERLINK("http://x.invalid","click")'):
        assert csv_safe(cell) == "'" + cell
    for value in ("S-12", "cardiac-surgery", "", 3, -3, 2.5, None):
        assert csv_safe(value) == value


def test_serve_binds_loopback_and_warns_elsewhere(monkeypatch: pytest.MonkeyPatch,
                                                  capsys: pytest.CaptureFixture[str],
                                                  db_url: str) -> None:
    import uvicorn

    from app.cli.main import build_parser, main

    calls: list[dict[str, object]] = []
    monkeypatch.setattr(uvicorn, "run", lambda app, **kw: calls.append(kw))
    assert build_parser().parse_args(["serve"]).host == "127.0.0.1"
    assert main(["--db", db_url, "serve"]) == 0
    assert calls[-1]["host"] == "127.0.0.1" and "warning" not in capsys.readouterr().err
    assert main(["--db", db_url, "serve", "--host", "0.0.0.0"]) == 0
    assert calls[-1]["host"] == "0.0.0.0" and "TLS" in capsys.readouterr().err
    assert all(kw["log_level"] == "warning" for kw in calls)  # no access log of paths
