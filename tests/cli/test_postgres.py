"""The command line on PostgreSQL: `backup`/`restore` refuse and name PostgreSQL's own tools,
and the README's procedure with those tools (pg_dump, pg_restore) gives the same data back.
Invented unit, stays and accounts."""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import pytest
from sqlalchemy import func, select, text
from sqlalchemy.engine import make_url

from app.cli.main import main
from app.ingest import import_file
from app.store import db
from app.store.models import AuditEvent, Stay, Unit
from tests.conftest import UTC_ZONE
from tests.databases import PostgresDatabases
from tests.security.fixtures import make_user


def libpq_url(url: str) -> str:
    """The SQLAlchemy URL as PostgreSQL's own tools take it (no driver name)."""
    return make_url(url).set(drivername="postgresql").render_as_string(hide_password=False)


def test_backup_and_restore_point_to_postgresql_tools(
        postgres_databases: PostgresDatabases, tmp_path: Path,
        capsys: pytest.CaptureFixture[str]) -> None:
    with postgres_databases.fresh() as url:
        assert main(["--db", url, "backup", str(tmp_path / "b.db")]) == 2
        assert "pg_dump --format=custom" in capsys.readouterr().err
        assert main(["--db", url, "restore", str(tmp_path / "b.db")]) == 2
        assert "pg_restore --clean --if-exists" in capsys.readouterr().err
        assert not (tmp_path / "b.db").exists()
        db.release_engine(url)


def test_serve_refuses_no_workers(db_url: str, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["--db", db_url, "serve", "--workers", "0"]) == 2
    assert "--workers must be at least 1" in capsys.readouterr().err


def counts(url: str) -> tuple[int, int, int]:
    with db.session_scope(url) as session:
        return (session.scalar(select(func.count()).select_from(Unit)) or 0,
                session.scalar(select(func.count()).select_from(Stay)) or 0,
                session.scalar(select(func.count()).select_from(AuditEvent)) or 0)


@pytest.mark.skipif(shutil.which("pg_dump") is None or shutil.which("pg_restore") is None,
                    reason="PostgreSQL's client tools are not installed (postgresql-client)")
def test_pg_dump_and_pg_restore_round_trip(postgres_databases: PostgresDatabases,
                                           tmp_path: Path) -> None:
    with postgres_databases.fresh() as url:
        with db.session_scope(url) as session:
            import_file(session, "units", b"unit,beds\nU-PG,6\n", "units.csv", tz=UTC_ZONE)
            import_file(session, "stays", b"stay_id,unit,admitted_at,admission_type\n"
                        b"S-1,U-PG,2026-03-01T10:00,emergency\n", "stays.csv", tz=UTC_ZONE)
        make_user(url, "bm.pg", "bed_manager", "a long test password")
        saved = counts(url)
        dump = tmp_path / "morrow.dump"
        # README "Deployment": backups with the database's own tools.
        subprocess.run(["pg_dump", "--format=custom", f"--file={dump}", libpq_url(url)],
                       check=True, capture_output=True)
        with db.session_scope(url) as session:
            import_file(session, "units", b"unit,beds\nU-NEW,2\n", "units-2.csv", tz=UTC_ZONE)
        assert counts(url) != saved
        db.release_engine(url)  # as with the server stopped
        subprocess.run(["pg_restore", "--clean", "--if-exists", f"--dbname={libpq_url(url)}",
                        str(dump)], check=True, capture_output=True)
        assert counts(url) == saved
        assert db.current_revision(url) == db.head_revision()
        # The sequences came back too: the next write gets a fresh id, no clash.
        with db.session_scope(url) as session:
            import_file(session, "units", b"unit,beds\nU-AFTER,3\n", "units-3.csv", tz=UTC_ZONE)
        with db.get_engine(url).connect() as conn:
            assert conn.execute(text("SELECT count(*) FROM unit")).scalar() == saved[0] + 1
        db.release_engine(url)
