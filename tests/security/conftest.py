"""Fixtures for the security tests: an app with one account per role (invented names)."""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import pytest
from fastapi import FastAPI

from app.config import get_settings
from app.web.app import create_app
from tests.security.fixtures import make_user

PASSWORD = "a long test password"
ROLE_USERS = {"bed_manager": "bm.test", "scheduler": "sched.test",
              "nurse_in_charge": "nic.test", "viewer": "view.test"}


@pytest.fixture(autouse=True)
def utc_site(monkeypatch: pytest.MonkeyPatch) -> Iterator[None]:
    monkeypatch.setenv("MORROW_TIMEZONE", "UTC")
    get_settings.cache_clear()
    yield
    get_settings.cache_clear()


@dataclass
class SecuredApp:
    app: FastAPI
    db_url: str


@pytest.fixture
def secured(db_url: str) -> SecuredApp:
    """The real app on a fresh database holding one account per role, all with PASSWORD."""
    for role, name in ROLE_USERS.items():
        make_user(db_url, name, role, PASSWORD)
    return SecuredApp(create_app(db_url), db_url)
