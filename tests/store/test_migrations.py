"""Migrations: from empty to head, and upgrading a database that already holds data.

SQLite rebuilds a table to add a foreign key; with foreign keys enforced that fails on a
populated database unless the migration environment handles it, so this is tested on data.
Every test here runs on SQLite and on PostgreSQL.
"""

from __future__ import annotations

import pytest
from sqlalchemy import func, inspect, select, text

from app.demo.load import load_demo
from app.store import db
from app.store.models import AuditEvent, Base, Stay
from tests.conftest import DEMO_DIR, UTC_ZONE
from tests.databases import is_postgres

pytestmark = pytest.mark.both_databases


def test_upgrade_a_populated_database_from_the_first_revision(empty_db_url: str) -> None:
    url = empty_db_url
    db.upgrade(url, "0001")
    engine = db.get_engine(url)
    with engine.begin() as conn:  # rows as revision 0001 knew them, with references
        conn.execute(text("INSERT INTO import_batch (kind, filename, sha256, rows, inserted, "
                          "updated, unchanged, actor, created_at) VALUES ('stays', 's.csv', "
                          "'x', 1, 1, 0, 0, 'old', '2026-01-01 00:00:00')"))
        conn.execute(text("INSERT INTO unit (code, census_time, created_at) "
                          "VALUES ('U-OLD', '00:00', '2026-01-01 00:00:00')"))
        conn.execute(text("INSERT INTO stay (stay_id, unit, admitted_at, admission_type) "
                          "VALUES ('S-OLD', 'U-OLD', '2026-01-02 10:00:00', 'emergency')"))
        conn.execute(text("INSERT INTO observation (stay_id, observed_at, name, value, "
                          "recorded_at, batch_id) VALUES ('S-OLD', '2026-01-03 07:00:00', "
                          "'sofa', 5, '2026-01-03 07:00:00', 1)"))
    db.upgrade(url)
    assert db.current_revision(url) == db.head_revision()
    with engine.connect() as conn:
        if not is_postgres(url):
            assert conn.execute(text("PRAGMA foreign_keys")).scalar() == 1
            assert conn.execute(text("PRAGMA integrity_check")).scalar() == "ok"
        assert conn.execute(text("SELECT count(*) FROM observation")).scalar() == 1
    with db.session_scope(url) as session:
        assert session.get(Stay, "S-OLD").batch_id is None


def test_head_matches_the_models(db_url: str) -> None:
    """The migrated schema has every table and column the models declare, on each database."""
    with db.get_engine(db_url).connect() as conn:
        found = inspect(conn)
        tables = set(found.get_table_names())
        assert tables == set(Base.metadata.tables) | {"alembic_version"}
        for name, table in Base.metadata.tables.items():
            assert {c["name"] for c in found.get_columns(name)} == set(table.columns.keys())
            assert {tuple(fk["constrained_columns"]) for fk in found.get_foreign_keys(name)} == {
                tuple(c.name for c in fk.columns) for fk in table.foreign_key_constraints}


def test_downgrade_to_empty_and_up_again(empty_db_url: str) -> None:
    db.upgrade(empty_db_url)
    from alembic import command

    command.downgrade(db.alembic_config(empty_db_url), "base")
    with db.get_engine(empty_db_url).connect() as conn:
        assert set(inspect(conn).get_table_names()) <= {"alembic_version"}
    db.upgrade(empty_db_url)
    assert db.current_revision(empty_db_url) == db.head_revision()


def test_demo_loads_into_a_database_migrated_from_empty(db_url: str) -> None:
    with db.session_scope(db_url) as session:
        load_demo(session, DEMO_DIR, tz=UTC_ZONE, shift=False)
    with db.session_scope(db_url) as session:
        assert session.scalar(select(func.count()).select_from(Stay)) > 5000
        assert session.scalar(select(func.count()).select_from(AuditEvent)) > 5000
