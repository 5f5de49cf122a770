"""The server answers its health check and lists units on the placeholder page."""

from __future__ import annotations

from fastapi.testclient import TestClient

from app.store import db
from app.web.app import create_app
from tests.security.fixtures import acting_as


def test_health_and_home(demo_db: str) -> None:
    app = create_app(demo_db)
    acting_as(app, "viewer")
    client = TestClient(app)
    health = client.get("/health")
    assert health.status_code == 200
    assert health.json()["status"] == "ok" and health.json()["revision"] == db.head_revision()
    page = client.get("/")
    assert page.status_code == 200
    assert "KV-CRIT" in page.text and "do not replace" in page.text


def test_empty_database_explains_first_step(db_url: str) -> None:
    app = create_app(db_url)
    acting_as(app, "viewer")
    page = TestClient(app).get("/")
    assert "Import <code>units.csv</code> first" in page.text
