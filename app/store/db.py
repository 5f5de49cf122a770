"""Engine, sessions and migrations. SQLite gets WAL, a busy timeout and foreign keys.

PostgreSQL goes through psycopg 3 (``postgresql+psycopg://``; a plain ``postgresql://``
URL is taken to mean that driver too). Everything else is the same SQL on both: a
statement only one of them understands belongs in a branch on ``dialect.name``.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from collections.abc import Iterator
from contextlib import contextmanager
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


# Engines are kept per database URL (a server uses one; tests and restores use several). The
# oldest is disposed when more than this many are open, so no pool is dropped with its
# connections still open.
MAX_ENGINES = 16
_engines: OrderedDict[str, tuple[Engine, sessionmaker[Session]]] = OrderedDict()
_engines_lock = threading.Lock()


def _create_engine(url: str) -> Engine:
    if url.startswith("sqlite"):
        engine = create_engine(url, connect_args={"timeout": BUSY_TIMEOUT_MS / 1000})
        event.listen(engine, "connect", _sqlite_pragmas)
        return engine
    parsed = make_url(url)
    if parsed.drivername == "postgresql":
        # SQLAlchemy's default PostgreSQL driver is psycopg2; Morrow installs psycopg 3.
        parsed = parsed.set(drivername="postgresql+psycopg")
    return create_engine(parsed, pool_pre_ping=True)


def _entry(url: str) -> tuple[Engine, sessionmaker[Session]]:
    with _engines_lock:
        entry = _engines.get(url)
        if entry is not None:
            _engines.move_to_end(url)
            return entry
        engine = _create_engine(url)
        entry = (engine, sessionmaker(engine, expire_on_commit=False))
        _engines[url] = entry
        while len(_engines) > MAX_ENGINES:
            _, (oldest, _) = _engines.popitem(last=False)
            oldest.dispose()
        return entry


def get_engine(url: str) -> Engine:
    """One engine per database URL, kept until released (or until it is the oldest of many)."""
    return _entry(url)[0]


def session_factory(url: str) -> sessionmaker[Session]:
    """The sessionmaker of ``url``'s engine, for code that must hold two sessions at once."""
    return _entry(url)[1]


def release_engine(url: str) -> None:
    """Close this process's idle connections to ``url`` and forget its engine.

    The next use makes a new engine (taking the current settings, such as the busy timeout).
    Connections still checked out finish their work and are closed when returned.
    """
    with _engines_lock:
        entry = _engines.pop(url, None)
    if entry is not None:
        entry[0].dispose()


@contextmanager
def session_scope(url: str) -> Iterator[Session]:
    """The one place that commits: on success; rolls back on any error."""
    session = _entry(url)[1]()
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
