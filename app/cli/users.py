"""``morrow users add | set-password | list``, ``morrow backup FILE``, ``morrow restore FILE``
and ``morrow demo users``.

Passwords are read without echo from the terminal, or one line from standard input with
``--password-stdin`` (for scripts); never from the command line, where other users of the
machine could read them in the process list.
"""

from __future__ import annotations

import argparse
import getpass
import os
import secrets
import sqlite3
import sys
from datetime import UTC, datetime
from pathlib import Path

from sqlalchemy.engine import make_url
from sqlalchemy.exc import SQLAlchemyError

from app.store import backup_schema, db
from app.store import users as accounts
from app.store.users import ROLE_LABELS, ROLES, AccountError

EXIT_OK, EXIT_ERROR, EXIT_BAD_INPUT = 0, 1, 2

DEMO_USERS = (("demo-manager", "bed_manager"), ("demo-scheduler", "scheduler"),
              ("demo-nurse", "nurse_in_charge"), ("demo-viewer", "viewer"))


def _cli_actor() -> str:
    return f"cli:{os.environ.get('USER', 'unknown')}"


def _error(message: str, status: int = EXIT_BAD_INPUT) -> int:
    print(f"error: {message}", file=sys.stderr)
    return status


def _read_password(args: argparse.Namespace) -> str | None:
    if args.password_stdin:
        line = sys.stdin.readline()
        return line.rstrip("\r\n") if line else None
    if not sys.stdin.isatty():
        return None
    first = getpass.getpass("password: ")
    if getpass.getpass("again: ") != first:
        print("error: the two passwords differ", file=sys.stderr)
        return None
    return first


# -- users --------------------------------------------------------------------------------------

def cmd_users_add(args: argparse.Namespace) -> int:
    password = _read_password(args)
    if password is None:
        return _error("no password given: type it at the prompt or pipe it with --password-stdin")
    try:
        with db.session_scope(args.db) as session:
            user = accounts.create_user(session, args.username, args.role, password,
                                        actor=_cli_actor())
            name, role = user.username, user.role
    except AccountError as exc:
        return _error(str(exc))
    print(f"added {name} ({ROLE_LABELS[role]})")
    return EXIT_OK


def cmd_users_set_password(args: argparse.Namespace) -> int:
    password = _read_password(args)
    if password is None:
        return _error("no password given: type it at the prompt or pipe it with --password-stdin")
    try:
        with db.session_scope(args.db) as session:
            user = accounts.set_password(session, args.username, password, actor=_cli_actor())
            name = user.username
    except AccountError as exc:
        return _error(str(exc))
    print(f"new password set for {name}; their sessions have ended, their API tokens are "
          "revoked and any sign-in lock is lifted")
    return EXIT_OK


def cmd_users_list(args: argparse.Namespace) -> int:
    with db.session_scope(args.db) as session:
        rows = [(u.username, ROLE_LABELS.get(u.role, u.role), "active" if u.active else "disabled")
                for u in accounts.list_users(session)]
    if not rows:
        print("no users yet: add one with `morrow users add NAME --role bed_manager`")
        return EXIT_OK
    width = max(len(r[0]) for r in rows)
    for name, role, state in rows:
        print(f"{name:<{width}}  {role:<16} {state}")
    return EXIT_OK


def cmd_demo_users(args: argparse.Namespace) -> int:
    """Make (or reset) one demo account per role and print how to sign in."""
    made = []
    with db.session_scope(args.db) as session:
        for name, role in DEMO_USERS:
            password = secrets.token_urlsafe(9)
            if accounts.get_user(session, name) is None:
                accounts.create_user(session, name, role, password, actor="demo")
            else:
                accounts.set_password(session, name, password, actor="demo")
                accounts.set_active(session, name, True, actor="demo")
                accounts.set_role(session, name, role, actor="demo")
            made.append((name, role, password))
    print("Demo accounts (invented; passwords are new each time this runs):")
    for name, role, password in made:
        print(f"  {name:<15} {ROLE_LABELS[role]:<16} password: {password}")
    print("Sign in at /signin with one of these.")
    return EXIT_OK


# -- backup and restore ---------------------------------------------------------------------------

def _sqlite_path(url: str) -> Path | None:
    parsed = make_url(url)
    if parsed.get_backend_name() != "sqlite" or parsed.database in (None, "", ":memory:"):
        return None
    return Path(parsed.database)


def _integrity(conn: sqlite3.Connection) -> str:
    return "; ".join(row[0] for row in conn.execute("PRAGMA integrity_check"))


def _revision(conn: sqlite3.Connection) -> str | None:
    try:
        row = conn.execute("SELECT version_num FROM alembic_version").fetchone()
    except sqlite3.DatabaseError:
        return None
    return None if row is None else str(row[0])


def cmd_backup(args: argparse.Namespace) -> int:
    """Copy the live database with SQLite's online backup (safe while the server runs)."""
    source = _sqlite_path(args.db)
    if source is None:
        return _error("backup works on an SQLite database; for another database use its own "
                      "tools (for PostgreSQL: pg_dump --format=custom --file=FILE DATABASE, "
                      "safe while the server runs)")
    target = Path(args.file)
    if target.is_dir():
        return _error(f"{target} is a directory; give a file name for the backup")
    if target.exists() and not args.force:
        return _error(f"{target} exists; give --force to overwrite it")
    if target.resolve() == source.resolve():
        return _error("the backup file cannot be the database itself")
    partial = target.with_name(target.name + ".partial")
    partial.unlink(missing_ok=True)
    try:
        src = sqlite3.connect(source)
        try:
            dst = sqlite3.connect(partial)
            try:
                src.backup(dst)
                # One self-contained file: no -wal beside it.
                dst.execute("PRAGMA journal_mode=DELETE")
                check, revision = _integrity(dst), _revision(dst)
            finally:
                dst.close()
        finally:
            src.close()
        if check != "ok":
            return _error(f"the copy failed its integrity check ({check}); nothing was written",
                          EXIT_ERROR)
        os.replace(partial, target)
    except (OSError, sqlite3.Error) as exc:
        return _error(f"could not write the backup to {target}: {_plain(exc)}; nothing was "
                      "written", EXIT_ERROR)
    finally:
        # Whatever failed (a full disk, a target that cannot be replaced), no half copy stays.
        partial.unlink(missing_ok=True)
    print(f"backed up {source} to {target} ({target.stat().st_size} bytes, "
          f"schema revision {revision})")
    return EXIT_OK


def cmd_restore(args: argparse.Namespace) -> int:
    """Replace the database's content with a backup, keeping a copy of what it replaced."""
    target = _sqlite_path(args.db)
    if target is None:
        return _error("restore works on an SQLite database; for another database use its own "
                      "tools (for PostgreSQL: stop the server, then pg_restore --clean "
                      "--if-exists --dbname=DATABASE FILE)")
    source = Path(args.file)
    if not source.is_file():
        return _error(f"{source}: no such file")
    try:
        src = sqlite3.connect(f"file:{source}?mode=ro", uri=True)
        try:
            check, revision = _integrity(src), _revision(src)
        finally:
            src.close()
    except sqlite3.DatabaseError as exc:
        return _error(f"{source} is not an SQLite database ({exc})")
    if check != "ok":
        return _error(f"{source} fails its integrity check ({check}); nothing was changed")
    try:
        problems = backup_schema.schema_problems(source, revision)
    except SQLAlchemyError:
        problems = ["its tables cannot be read"]
    if problems:
        return _error(f"{source} cannot be restored: {'; '.join(problems)}. Nothing was "
                      "changed")
    honoured = _live_credentials(args.db)
    db.release_engine(args.db)  # this process's connections must not hold the file
    saved = None
    if target.exists():
        stamp = datetime.now(UTC).strftime("%Y%m%dT%H%M%SZ")
        saved = target.with_name(f"{target.name}.before-restore-{stamp}")
        live = sqlite3.connect(target)
        try:
            out = sqlite3.connect(saved)
            try:
                live.backup(out)
                out.execute("PRAGMA journal_mode=DELETE")
            finally:
                out.close()
        finally:
            live.close()
    check = _copy_into(source, target)
    if check != "ok":
        return _error(f"the restored database fails its integrity check ({check})", EXIT_ERROR)
    try:
        db.upgrade(args.db)  # a backup from an older version is brought up to this one
    except Exception:  # Alembic and the drivers raise several kinds; none leaves it usable
        db.release_engine(args.db)
        if saved is None:
            return _error(f"{source} could not be brought up to this version's schema",
                          EXIT_ERROR)
        _copy_into(saved, target)  # the database the restore replaced, back in place
        return _error(f"{source} could not be brought up to this version's schema; the "
                      "database was put back as it was before the restore", EXIT_ERROR)
    with db.session_scope(args.db) as session:
        revoked, ended = accounts.end_credentials_not_in(session, honoured,
                                                          actor=_cli_actor())
    kept = f"; the replaced database is kept as {saved}" if saved else ""
    print(f"restored {target} from {source} (backup at schema revision {revision}, now "
          f"{db.current_revision(args.db)}){kept}")
    if revoked or ended:
        print(f"{revoked} API token(s) and {ended} sign-in session(s) from the backup were "
              "ended: the replaced database no longer honoured them")
    return EXIT_OK


def _copy_into(source: Path, target: Path) -> str:
    """Copy the SQLite database ``source`` into ``target``; the copy's integrity check.

    The backup API writes the copy into the live file under SQLite's own locks, so a reader
    never sees half of it."""
    src = sqlite3.connect(f"file:{source}?mode=ro", uri=True)
    try:
        dst = sqlite3.connect(target, timeout=30)
        try:
            src.backup(dst)
            dst.execute("PRAGMA journal_mode=WAL")
            return _integrity(dst)
        finally:
            dst.close()
    finally:
        src.close()


def _live_credentials(url: str) -> accounts.LiveCredentials:
    """What the database about to be replaced honours; nothing when it cannot be read (then
    every token and session of the backup ends: see ``end_credentials_not_in``)."""
    try:
        with db.session_scope(url) as session:
            return accounts.live_credentials(session)
    except SQLAlchemyError:
        return accounts.LiveCredentials(frozenset(), frozenset())


def _plain(exc: BaseException) -> str:
    return getattr(exc, "strerror", None) or str(exc)


# -- parsers --------------------------------------------------------------------------------------

def register(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    """Add ``users``, ``backup`` and ``restore`` to the top-level subcommands."""
    p = sub.add_parser("users", help="accounts that sign in to the web page")
    usersub = p.add_subparsers(dest="users_command", required=True, metavar="ACTION")
    a = usersub.add_parser("add", help="add an account")
    a.add_argument("username")
    a.add_argument("--role", required=True, choices=ROLES)
    a.add_argument("--password-stdin", action="store_true",
                   help="read the password from the first line of standard input")
    a.set_defaults(func=cmd_users_add)
    a = usersub.add_parser("set-password", help="set a new password (ends their sessions)")
    a.add_argument("username")
    a.add_argument("--password-stdin", action="store_true",
                   help="read the password from the first line of standard input")
    a.set_defaults(func=cmd_users_set_password)
    usersub.add_parser("list", help="list accounts").set_defaults(func=cmd_users_list)

    p = sub.add_parser("backup", help="copy the SQLite database to FILE (safe while serving)")
    p.add_argument("file")
    p.add_argument("--force", action="store_true", help="overwrite FILE if it exists")
    p.set_defaults(func=cmd_backup)

    p = sub.add_parser("restore", help="replace the database with the backup in FILE "
                                       "(the replaced one is kept beside it)")
    p.add_argument("file")
    p.set_defaults(func=cmd_restore)


def register_demo(demosub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    """Add ``demo users`` beside ``demo load``."""
    demosub.add_parser("users", help="make one demo account per role and print their "
                                     "passwords").set_defaults(func=cmd_demo_users)
