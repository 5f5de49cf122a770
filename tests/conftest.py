"""Shared fixtures: migrated throw-away databases and the demo hospital."""

from __future__ import annotations

import shutil
from collections.abc import Iterator
from pathlib import Path
from zoneinfo import ZoneInfo

import pytest

from app.config import PROJECT_ROOT
from app.store import db

UTC_ZONE = ZoneInfo("UTC")
DEMO_DIR = PROJECT_ROOT / "demo_data"


@pytest.fixture(scope="session")
def migrated_template(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """One database migrated from empty to head per test run; tests get copies of it."""
    path = tmp_path_factory.mktemp("template") / "template.db"
    url = f"sqlite:///{path}"
    db.upgrade(url)
    _settle(url)
    return path


def _settle(url: str) -> None:
    """Fold the WAL into the main file and close, so copying the file copies everything."""
    engine = db.get_engine(url)
    with engine.connect() as conn:
        conn.exec_driver_sql("PRAGMA wal_checkpoint(TRUNCATE)")
    engine.dispose()


@pytest.fixture
def db_url(migrated_template: Path, tmp_path: Path) -> Iterator[str]:
    """A fresh, migrated, empty SQLite database for one test."""
    path = tmp_path / "morrow.db"
    shutil.copy(migrated_template, path)
    url = f"sqlite:///{path}"
    yield url
    db.get_engine(url).dispose()


@pytest.fixture(scope="session")
def demo_db(migrated_template: Path, tmp_path_factory: pytest.TempPathFactory) -> str:
    """A database holding the whole demo hospital, dates as generated, site zone UTC.

    Session-scoped and shared: tests must only read it.
    """
    from app.demo.load import load_demo

    path = tmp_path_factory.mktemp("demo") / "demo.db"
    shutil.copy(migrated_template, path)
    url = f"sqlite:///{path}"
    with db.session_scope(url) as session:
        load_demo(session, DEMO_DIR, tz=UTC_ZONE, shift=False)
    _settle(url)
    return url
