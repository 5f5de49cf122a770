"""`morrow backup FILE` and `morrow restore FILE`: a round trip gives back the same data.

Invented unit, stays and accounts.
"""

from __future__ import annotations

import sqlite3
from pathlib import Path

import pytest

from app.cli.main import main
from app.ingest import import_file
from app.store import db
from tests.conftest import UTC_ZONE
from tests.security.fixtures import dump_sqlite, make_user


def test_backup_and_restore_round_trip(db_url: str, tmp_path: Path,
                                       capsys: pytest.CaptureFixture[str]) -> None:
    live = Path(db_url.removeprefix("sqlite:///"))
    with db.session_scope(db_url) as session:
        import_file(session, "units", b"unit,beds\nU-BK,12\n", "units.csv", tz=UTC_ZONE)
        import_file(session, "stays", b"stay_id,unit,admitted_at,admission_type\n"
                    b"S-1,U-BK,2026-03-01T10:00,emergency\n", "stays.csv", tz=UTC_ZONE)
    make_user(db_url, "bm.backup", "bed_manager", "a long test password")
    saved = dump_sqlite(live)
    backup = tmp_path / "morrow-backup.db"

    # An uncommitted write in another connection is not in the backup: it copies a
    # consistent committed state while the database is in use.
    writer = sqlite3.connect(live, timeout=30)
    writer.execute("BEGIN IMMEDIATE")
    writer.execute("UPDATE unit SET census_time = '09:00'")
    assert main(["--db", db_url, "backup", str(backup)]) == 0
    writer.rollback()
    writer.close()
    assert "schema revision" in capsys.readouterr().out
    assert dump_sqlite(backup) == saved
    assert not backup.with_name(backup.name + "-wal").exists()  # one self-contained file
    with sqlite3.connect(backup) as conn:
        assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"

    # Change everything after the backup, then restore it.
    with db.session_scope(db_url) as session:
        import_file(session, "units", b"unit,beds\nU-BK,20\nU-NEW,5\n", "units2.csv",
                    tz=UTC_ZONE)
    make_user(db_url, "late.user", "viewer", "a long test password")
    replaced = dump_sqlite(live)
    assert replaced != saved
    assert main(["--db", db_url, "restore", str(backup)]) == 0
    out = capsys.readouterr().out
    assert "restored" in out
    assert dump_sqlite(live) == saved
    with sqlite3.connect(live) as conn:
        assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    # What the restore replaced is kept beside the database.
    kept = [p for p in live.parent.iterdir() if ".before-restore-" in p.name]
    assert len(kept) == 1 and str(kept[0]) in out
    assert dump_sqlite(kept[0]) == replaced
    # The service's own connections read the restored data.
    assert main(["--db", db_url, "users", "list"]) == 0
    listed = capsys.readouterr().out
    assert "bm.backup" in listed and "late.user" not in listed


def test_backup_refuses_to_overwrite_and_restore_checks_its_file(
        db_url: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    target = tmp_path / "b.db"
    assert main(["--db", db_url, "backup", str(target)]) == 0
    assert main(["--db", db_url, "backup", str(target)]) == 2
    assert "--force" in capsys.readouterr().err
    assert main(["--db", db_url, "backup", "--force", str(target)]) == 0
    junk = tmp_path / "junk.db"
    junk.write_bytes(b"this is not a database" * 100)
    assert main(["--db", db_url, "restore", str(junk)]) == 2
    assert "not an SQLite database" in capsys.readouterr().err
    empty = tmp_path / "other.db"
    sqlite3.connect(empty).execute("CREATE TABLE t (x)").connection.close()
    assert main(["--db", db_url, "restore", str(empty)]) == 2
    assert "not a Morrow database" in capsys.readouterr().err
    assert main(["--db", db_url, "restore", str(tmp_path / "missing.db")]) == 2


def test_users_commands(db_url: str, monkeypatch: pytest.MonkeyPatch,
                        capsys: pytest.CaptureFixture[str]) -> None:
    import io

    monkeypatch.setattr("sys.stdin", io.StringIO("a good long password\n"))
    assert main(["--db", db_url, "users", "add", "Ward.Lead", "--role", "nurse_in_charge",
                 "--password-stdin"]) == 0
    assert "added ward.lead (nurse in charge)" in capsys.readouterr().out
    monkeypatch.setattr("sys.stdin", io.StringIO("short\n"))
    assert main(["--db", db_url, "users", "set-password", "ward.lead", "--password-stdin"]) == 2
    assert "at least 10 characters" in capsys.readouterr().err
    monkeypatch.setattr("sys.stdin", io.StringIO("another long password\n"))
    assert main(["--db", db_url, "users", "set-password", "ward.lead", "--password-stdin"]) == 0
    assert main(["--db", db_url, "users", "list"]) == 0
    assert "ward.lead  nurse in charge  active" in capsys.readouterr().out
    from app.store import users as accounts

    with db.session_scope(db_url) as session:
        user = accounts.get_user(session, "ward.lead")
        assert user is not None
        assert accounts.verify_password("another long password", user.password_hash)
        assert user.password_hash.startswith("scrypt$17$8$1$")  # the service's full cost


def test_demo_users_prints_how_to_sign_in(db_url: str,
                                          capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["--db", db_url, "demo", "users"]) == 0
    out = capsys.readouterr().out
    for name in ("demo-manager", "demo-scheduler", "demo-nurse", "demo-viewer"):
        assert name in out
    assert "/signin" in out
    from app.store import users as accounts

    manager_line = next(line for line in out.splitlines() if "demo-manager" in line)
    password = manager_line.split("password: ")[1].strip()
    with db.session_scope(db_url) as session:
        user = accounts.get_user(session, "demo-manager")
        assert user is not None and user.role == "bed_manager"
        assert accounts.verify_password(password, user.password_hash)
