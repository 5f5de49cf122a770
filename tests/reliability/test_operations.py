"""Operations: restore checks the backup's schema, backup cleans up, tokens stay ended, the
API docs are not served from a CDN to anyone, and the booking redirect keeps each field.

Invented unit (U-OPS), accounts and tokens. Backup and restore work on SQLite only (for
PostgreSQL they point to pg_dump / pg_restore), so their tests run on SQLite; the others run
on both databases.
"""

from __future__ import annotations

import io
import os
import sqlite3
from datetime import UTC, datetime, timedelta
from pathlib import Path
from urllib.parse import parse_qs, urlsplit

import pytest
from fastapi.testclient import TestClient

from app.cli.main import main
from app.ingest import import_file
from app.store import db
from app.store import users as accounts
from app.web.app import create_app
from tests.conftest import UTC_ZONE
from tests.reliability.conftest import PASSWORD, SecuredApp
from tests.security.fixtures import csrf, dump_sqlite, issue_token, signed_in_client


def live_path(db_url: str) -> Path:
    return Path(db_url.removeprefix("sqlite:///"))


def seed_unit(db_url: str) -> None:
    with db.session_scope(db_url) as session:
        import_file(session, "units", b"unit,beds\nU-OPS,12\n", "units.csv", tz=UTC_ZONE)


def backup_copy(db_url: str, target: Path) -> Path:
    assert main(["--db", db_url, "backup", str(target)]) == 0
    return target


def whoami(client: TestClient, token: str) -> int:
    return client.get("/api/whoami", headers={"Authorization": f"Bearer {token}"}).status_code


# -- restore checks the schema first (failure 8) --------------------------------------------------

def damaged_backups(db_url: str, folder: Path) -> dict[str, Path]:
    """Backups that would leave Morrow unusable, each with the word the refusal must name."""
    made = {}
    for name, statement, word in (
            ("unknown-revision", "UPDATE alembic_version SET version_num = '0999'", "0999"),
            ("no-observation", "DROP TABLE observation", "observation"),
            ("no-column", "ALTER TABLE booking DROP COLUMN procedure", "procedure")):
        path = backup_copy(db_url, folder / f"{name}.db")
        with sqlite3.connect(path) as conn:
            conn.execute(statement)
        conn.close()
        made[word] = path
    return made


def test_restore_refuses_a_backup_whose_schema_morrow_cannot_use(
        secured: SecuredApp, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    db_url = secured.db_url
    seed_unit(db_url)
    backups = damaged_backups(db_url, tmp_path)
    with db.session_scope(db_url) as session:
        import_file(session, "units", b"unit,beds\nU-OPS,14\nU-LATE,4\n", "units2.csv",
                    tz=UTC_ZONE)
    before = dump_sqlite(live_path(db_url))
    capsys.readouterr()
    for word, path in backups.items():
        assert main(["--db", db_url, "restore", str(path)]) == 2, word
        err = capsys.readouterr().err
        assert word in err and "nothing was changed" in err.lower(), err
        assert "Error" not in err and "Traceback" not in err  # plain words, no exception name
        assert dump_sqlite(live_path(db_url)) == before, word
    # Nothing was replaced, so no copy of a replaced database was made either.
    assert not [p for p in live_path(db_url).parent.iterdir() if ".before-restore-" in p.name]
    # The database is still usable by the commands and the page.
    assert main(["--db", db_url, "users", "list"]) == 0
    assert "U-LATE" in TestClient(secured.app).get(
        "/api/units", headers={"Authorization": f"Bearer {issue_token(db_url, 'bm.test')}"}
    ).text


def test_restore_brings_an_older_complete_backup_up_to_date(
        tmp_path: Path, capsys: pytest.CaptureFixture[str], db_url: str) -> None:
    older = tmp_path / "older.db"
    db.upgrade(f"sqlite:///{older}", "0005")  # a complete backup made by an older version
    db.release_engine(f"sqlite:///{older}")
    assert main(["--db", db_url, "restore", str(older)]) == 0
    assert db.current_revision(db_url) == db.head_revision()
    # A backup that lacks a table of its own (older) revision is refused like the others.
    broken = tmp_path / "older-broken.db"
    db.upgrade(f"sqlite:///{broken}", "0005")
    db.release_engine(f"sqlite:///{broken}")
    with sqlite3.connect(broken) as conn:
        conn.execute("DROP TABLE training_run")
    conn.close()
    capsys.readouterr()
    assert main(["--db", db_url, "restore", str(broken)]) == 2
    assert "training_run" in capsys.readouterr().err
    assert db.current_revision(db_url) == db.head_revision()


def test_a_restore_whose_upgrade_fails_puts_the_database_back(
        db_url: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
        capsys: pytest.CaptureFixture[str]) -> None:
    seed_unit(db_url)
    backup = backup_copy(db_url, tmp_path / "b.db")
    with db.session_scope(db_url) as session:
        import_file(session, "units", b"unit,beds\nU-LATE,4\n", "units2.csv", tz=UTC_ZONE)
    before = dump_sqlite(live_path(db_url))
    upgrade = db.upgrade
    calls: list[str] = []

    def upgrade_fails_after_the_copy(url: str, revision: str = "head") -> None:
        calls.append(url)
        if len(calls) > 1:  # the command's own start-up upgrade passes; the restore's fails
            raise RuntimeError("a migration failed on the restored data")
        upgrade(url, revision)

    monkeypatch.setattr(db, "upgrade", upgrade_fails_after_the_copy)
    capsys.readouterr()
    assert main(["--db", db_url, "restore", str(backup)]) == 1
    err = capsys.readouterr().err
    assert "put back" in err and "RuntimeError" not in err, err
    monkeypatch.setattr(db, "upgrade", upgrade)
    assert dump_sqlite(live_path(db_url)) == before
    assert main(["--db", db_url, "users", "list"]) == 0


# -- backup cleans up after itself ---------------------------------------------------------------

def test_backup_leaves_no_partial_file_when_it_fails(
        db_url: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
        capsys: pytest.CaptureFixture[str]) -> None:
    seed_unit(db_url)
    out = tmp_path / "out"
    folder = out / "backups"
    folder.mkdir(parents=True)
    assert main(["--db", db_url, "backup", "--force", str(folder)]) != 0
    assert "directory" in capsys.readouterr().err
    assert sorted(p.name for p in out.iterdir()) == ["backups"]
    assert not list(folder.iterdir())

    # A failure after the copy was written (here: the final rename, as on a full disk).
    def refuse(src: object, dst: object) -> None:
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "replace", refuse)
    assert main(["--db", db_url, "backup", str(out / "b.db")]) == 1
    err = capsys.readouterr().err
    assert "No space left on device" in err and "OSError" not in err
    assert sorted(p.name for p in out.iterdir()) == ["backups"]


# -- tokens stay ended ---------------------------------------------------------------------------

def set_password_by_cli(db_url: str, username: str, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr("sys.stdin", io.StringIO("another long password\n"))
    assert main(["--db", db_url, "users", "set-password", username, "--password-stdin"]) == 0


@pytest.mark.both_databases
def test_a_password_reset_ends_the_accounts_tokens(
        secured: SecuredApp, monkeypatch: pytest.MonkeyPatch) -> None:
    client = TestClient(secured.app)
    token = issue_token(secured.db_url, "nic.test")
    other = issue_token(secured.db_url, "view.test")
    assert whoami(client, token) == 200
    set_password_by_cli(secured.db_url, "nic.test", monkeypatch)
    assert whoami(client, token) == 401
    assert whoami(client, other) == 200  # another account's token is untouched
    # The token list shows it revoked, so a bed manager sees why it stopped.
    with db.session_scope(secured.db_url) as session:
        revoked = {t.prefix: t.revoked_at for t, name in accounts.list_tokens(session)
                   if name == "nic.test"}
    assert revoked == {token[:12]: revoked[token[:12]]} and revoked[token[:12]] is not None
    # A token issued after the new password works.
    assert whoami(client, issue_token(secured.db_url, "nic.test")) == 200


@pytest.mark.both_databases
def test_a_token_stays_revoked_when_its_account_is_enabled_again(secured: SecuredApp) -> None:
    client = TestClient(secured.app)
    token = issue_token(secured.db_url, "sched.test")
    assert whoami(client, token) == 200
    for active in (False, True):
        with db.session_scope(secured.db_url) as session:
            accounts.set_active(session, "sched.test", active, actor="bm.test")
        assert whoami(client, token) == 401
    # The account itself works again: it signs in, and a new token works.
    signed_in_client(secured.app, "sched.test", PASSWORD)
    assert whoami(client, issue_token(secured.db_url, "sched.test")) == 200


def test_restoring_a_backup_does_not_revive_ended_tokens_or_sessions(
        secured: SecuredApp, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    db_url = secured.db_url
    kept = issue_token(db_url, "view.test", "kept")
    revoked = issue_token(db_url, "view.test", "revoked by hand")
    reset = issue_token(db_url, "nic.test", "ended by a password reset")
    disabled = issue_token(db_url, "sched.test", "ended by disabling")
    browser = signed_in_client(secured.app, "bm.test", PASSWORD)
    assert browser.get("/").status_code == 200
    backup = backup_copy(db_url, tmp_path / "before.db")

    with db.session_scope(db_url) as session:
        token_id = next(t.id for t, _ in accounts.list_tokens(session)
                        if t.prefix == revoked[:12])
        accounts.revoke_token(session, token_id, actor="bm.test")
        accounts.set_active(session, "sched.test", False, actor="bm.test")
    set_password_by_cli(db_url, "nic.test", monkeypatch)
    browser.post("/signout", data={"csrf_token": csrf(browser)})
    assert main(["--db", db_url, "restore", str(backup)]) == 0

    client = TestClient(create_app(db_url))
    with db.session_scope(db_url) as session:  # the backup's accounts are back ...
        accounts.set_active(session, "sched.test", True, actor="bm.test")
    assert whoami(client, kept) == 200  # ... a token live before and after still works
    for token in (revoked, reset, disabled):
        assert whoami(client, token) == 401
    # The signed-out browser's cookie (live in the backup) does not sign it in again.
    assert browser.get("/", follow_redirects=False).status_code == 303


def test_restore_onto_a_new_database_ends_every_token(
        secured: SecuredApp, tmp_path: Path) -> None:
    token = issue_token(secured.db_url, "view.test")
    backup = backup_copy(secured.db_url, tmp_path / "b.db")
    # A new machine's database never issued the backup's tokens: none can be trusted.
    fresh = tmp_path / "new-machine.db"
    url = f"sqlite:///{fresh}"
    sqlite3.connect(fresh).close()
    assert main(["--db", url, "restore", str(backup)]) == 0
    assert whoami(TestClient(create_app(url)), token) == 401


# -- the API docs --------------------------------------------------------------------------------

@pytest.mark.both_databases
def test_api_docs_are_not_served_from_a_cdn_nor_without_sign_in(secured: SecuredApp) -> None:
    anonymous = TestClient(secured.app)
    for path in ("/docs", "/redoc", "/docs/oauth2-redirect", "/openapi.json"):
        answer = anonymous.get(path, follow_redirects=False)
        assert answer.status_code in (303, 401, 404), (path, answer.status_code)
        assert "cdn" not in answer.text.lower() and "swagger" not in answer.text.lower()
    signed_in = signed_in_client(secured.app, "view.test", PASSWORD)
    for path in ("/docs", "/redoc"):
        answer = signed_in.get(path)
        assert answer.status_code == 404 and "cdn" not in answer.text.lower()
    schema = signed_in.get("/openapi.json")
    assert schema.status_code == 200 and "/api/whoami" in schema.json()["paths"]


# -- the booking form's redirect -----------------------------------------------------------------

@pytest.mark.both_databases
def test_booking_redirect_keeps_each_field_as_typed(secured: SecuredApp) -> None:
    seed_unit(secured.db_url)
    client = signed_in_client(secured.app, "sched.test", PASSWORD)
    planned = (datetime.now(UTC) + timedelta(days=3)).date().isoformat()
    answer = client.post("/units/U-OPS/booking", follow_redirects=False, data={
        "csrf_token": csrf(client), "planned_date": planned, "age": "45",
        "specialty": "a&age=7#x", "procedure": "knee=left&right"})
    assert answer.status_code == 303
    location = urlsplit(answer.headers["location"])
    assert location.path == "/units/U-OPS/booking" and location.fragment == ""
    query = parse_qs(location.query)
    assert query["message"][0].startswith("booked B-"), query
    assert query["age"] == ["45"]
    assert query["specialty"] == ["a&age=7#x"]
    assert query["procedure"] == ["knee=left&right"]
    assert query["planned_date"] == [planned]
