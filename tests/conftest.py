"""Shared fixtures: migrated throw-away databases and the demo hospital."""

from __future__ import annotations

import shutil
from collections.abc import Iterator
from pathlib import Path
from zoneinfo import ZoneInfo

import pytest

from app.config import PROJECT_ROOT
from app.store import db
from tests.databases import BACKENDS, PostgresDatabases, postgres_admin_url

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


def pytest_generate_tests(metafunc: pytest.Metafunc) -> None:
    """Tests of modules marked ``both_databases`` run on SQLite and on PostgreSQL."""
    if ("database" in metafunc.fixturenames
            and metafunc.definition.get_closest_marker("both_databases") is not None):
        metafunc.parametrize("database", BACKENDS, indirect=True)


@pytest.fixture
def database(request: pytest.FixtureRequest) -> str:
    """Which database ``db_url`` gives: SQLite unless the test is marked ``both_databases``."""
    return str(getattr(request, "param", "sqlite"))


@pytest.fixture(scope="session")
def postgres_databases() -> Iterator[PostgresDatabases]:
    """The PostgreSQL test server (tests/databases.py), with a template migrated to head."""
    server = PostgresDatabases(postgres_admin_url())
    server.migrate_template()
    yield server
    server.close()


@pytest.fixture
def db_url(database: str, request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    """A fresh, migrated, empty database for one test (SQLite, or PostgreSQL when marked)."""
    if database == "postgresql":
        with request.getfixturevalue("postgres_databases").fresh() as url:
            yield url
        return
    path = tmp_path / "morrow.db"
    shutil.copy(request.getfixturevalue("migrated_template"), path)
    url = f"sqlite:///{path}"
    yield url
    db.release_engine(url)


@pytest.fixture
def empty_db_url(database: str, request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    """A new database with no tables at all, for migration tests."""
    if database == "postgresql":
        with request.getfixturevalue("postgres_databases").fresh(migrated=False) as url:
            yield url
        return
    url = f"sqlite:///{tmp_path / 'empty.db'}"
    yield url
    db.release_engine(url)


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


@pytest.fixture
def utc_site(monkeypatch: pytest.MonkeyPatch) -> Iterator[None]:
    """The site's clock in UTC for the app's settings (read once and cached)."""
    from app.config import get_settings

    monkeypatch.setenv("MORROW_TIMEZONE", "UTC")
    get_settings.cache_clear()
    yield
    get_settings.cache_clear()
