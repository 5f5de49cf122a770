"""Engine, sessions and migrations. SQLite gets WAL, a busy timeout and foreign keys.

PostgreSQL goes through psycopg 3 (``postgresql+psycopg://``; a plain ``postgresql://``
URL is taken to mean that driver too). Everything else is the same SQL on both: a
statement only one of them understands belongs in a branch on ``dialect.name``.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from functools import lru_cache
from typing import Any

from sqlalchemy import Engine, create_engine, event
from sqlalchemy.engine import make_url
from sqlalchemy.orm import Session, sessionmaker

from app.config import PROJECT_ROOT

BUSY_TIMEOUT_MS = 30_000


def _sqlite_pragmas(dbapi_connection: Any, _record: Any) -> None:
    cursor = dbapi_connection.cursor()
    cursor.execute("PRAGMA journal_mode=WAL")
    cursor.execute(f"PRAGMA busy_timeout={BUSY_TIMEOUT_MS}")
    cursor.execute("PRAGMA foreign_keys=ON")
    cursor.execute("PRAGMA synchronous=NORMAL")
    cursor.close()


@lru_cache(maxsize=16)
def get_engine(url: str) -> Engine:
    """One engine per database URL for the life of the process."""
    if url.startswith("sqlite"):
        engine = create_engine(url, connect_args={"timeout": BUSY_TIMEOUT_MS / 1000})
        event.listen(engine, "connect", _sqlite_pragmas)
        return engine
    parsed = make_url(url)
    if parsed.drivername == "postgresql":
        # SQLAlchemy's default PostgreSQL driver is psycopg2; Morrow installs psycopg 3.
        parsed = parsed.set(drivername="postgresql+psycopg")
    return create_engine(parsed, pool_pre_ping=True)


@lru_cache(maxsize=16)
def _session_factory(url: str) -> sessionmaker[Session]:
    return sessionmaker(get_engine(url), expire_on_commit=False)


@contextmanager
def session_scope(url: str) -> Iterator[Session]:
    """The one place that commits: on success; rolls back on any error."""
    session = _session_factory(url)()
    try:
        yield session
        session.commit()
    except BaseException:
        session.rollback()
        raise
    finally:
        session.close()


def alembic_config(url: str) -> Any:
    from alembic.config import Config

    cfg = Config()
    cfg.set_main_option("script_location", str(PROJECT_ROOT / "migrations"))
    cfg.set_main_option("sqlalchemy.url", url.replace("%", "%%"))
    return cfg


def upgrade(url: str, revision: str = "head") -> None:
    """Apply pending Alembic migrations (never ``create_all`` on an existing database)."""
    from alembic import command

    command.upgrade(alembic_config(url), revision)


def current_revision(url: str) -> str | None:
    from alembic.runtime.migration import MigrationContext

    with get_engine(url).connect() as conn:
        return MigrationContext.configure(conn).get_current_revision()


def head_revision() -> str | None:
    """The newest migration in migrations/versions."""
    from alembic.script import ScriptDirectory

    return ScriptDirectory.from_config(alembic_config("sqlite://")).get_current_head()
