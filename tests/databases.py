"""Throwaway PostgreSQL databases for tests that run on SQLite and on PostgreSQL.

A module opts in with ``pytestmark = pytest.mark.both_databases``: each of its tests that
uses ``db_url`` (or ``empty_db_url``) then runs twice, ``[sqlite]`` and ``[postgresql]``.
The PostgreSQL server is named by ``MORROW_TEST_POSTGRES_URL``, an SQLAlchemy URL of a
role allowed to create databases (``make test`` and ``.ci/run`` start a throwaway server
with ``.ci/postgres`` and set it). Without it the ``[postgresql]`` tests skip, saying so;
under ``CI=true`` they fail instead, so a green CI run always includes them.

As with SQLite (a copy of one migrated file), one database is migrated to head once per
run and each test gets a new database made from it with ``CREATE DATABASE ... TEMPLATE``,
dropped again after the test.
"""

from __future__ import annotations

import itertools
import os
from collections.abc import Iterator
from contextlib import contextmanager

import pytest
from sqlalchemy import Engine, create_engine
from sqlalchemy.engine import make_url
from sqlalchemy.pool import NullPool

from app.store import db

POSTGRES_URL_ENV = "MORROW_TEST_POSTGRES_URL"
BACKENDS = ("sqlite", "postgresql")


def postgres_admin_url() -> str:
    """The test server's URL, or a skip (a failure under CI) when none is configured."""
    url = os.environ.get(POSTGRES_URL_ENV, "").strip()
    if url:
        return url
    message = (f"PostgreSQL tests need {POSTGRES_URL_ENV} (`make test` starts a throwaway "
               "server with .ci/postgres when Debian's postgresql package is installed)")
    if os.environ.get("CI"):
        pytest.fail(message + "; .ci/run must start one")
    pytest.skip(message)


def is_postgres(url: str) -> bool:
    return make_url(url).get_backend_name() == "postgresql"


class PostgresDatabases:
    """Creates and drops uniquely named databases on one server, through an admin connection."""

    def __init__(self, admin_url: str) -> None:
        self.admin_url = make_url(admin_url)
        # CREATE/DROP DATABASE cannot run inside a transaction.
        self.admin: Engine = create_engine(self.admin_url, isolation_level="AUTOCOMMIT",
                                           poolclass=NullPool)
        self._names = (f"morrow_test_{os.getpid()}_{n}" for n in itertools.count())
        self.template: str | None = None

    def url(self, name: str) -> str:
        return self.admin_url.set(database=name).render_as_string(hide_password=False)

    def create(self, template: str | None = None) -> str:
        name = next(self._names)
        clause = f' TEMPLATE "{template}"' if template else ""
        with self.admin.connect() as conn:
            conn.exec_driver_sql(f'CREATE DATABASE "{name}"{clause}')
        return name

    def drop(self, name: str) -> None:
        db.release_engine(self.url(name))
        with self.admin.connect() as conn:
            # FORCE ends connections a test left open (PostgreSQL 13 and later).
            conn.exec_driver_sql(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')

    def migrate_template(self) -> str:
        """A database migrated from empty to head, to copy for each test."""
        name = self.create()
        url = self.url(name)
        db.upgrade(url)
        db.release_engine(url)  # a template must have no open connections
        self.template = name
        return name

    @contextmanager
    def fresh(self, *, migrated: bool = True) -> Iterator[str]:
        """A new database (a copy of the migrated template, or empty) for one test."""
        name = self.create(self.template if migrated else None)
        try:
            yield self.url(name)
        finally:
            self.drop(name)

    def close(self) -> None:
        if self.template is not None:
            self.drop(self.template)
        self.admin.dispose()
