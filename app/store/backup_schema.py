"""Whether an SQLite file holds a complete Morrow schema, checked before a restore uses it.

A restore replaces the live database; a file whose schema Morrow cannot use (a revision this
version does not know, or a known revision with a table or column missing) would leave every
command failing afterwards. The expected schema of a revision is not written down anywhere
but in the migrations, so it is read from them: a scratch database is migrated to that
revision and its tables and columns are the reference. Extra tables or columns in the file
are allowed (they do not stop Morrow from working).
"""

from __future__ import annotations

import sqlite3
import tempfile
from functools import lru_cache
from pathlib import Path

from sqlalchemy import create_engine, inspect
from sqlalchemy.engine import Engine

from app.store import db

Schema = dict[str, frozenset[str]]


def known_revisions() -> tuple[str, ...]:
    """Every revision in migrations/versions, oldest first."""
    from alembic.script import ScriptDirectory

    scripts = ScriptDirectory.from_config(db.alembic_config("sqlite://"))
    return tuple(reversed([s.revision for s in scripts.walk_revisions()]))


def _tables(engine: Engine) -> Schema:
    found = inspect(engine)
    return {name: frozenset(c["name"] for c in found.get_columns(name))
            for name in found.get_table_names()}


@lru_cache(maxsize=8)
def expected_schema(revision: str) -> Schema:
    """Tables and their columns at ``revision`` (a scratch database migrated to it)."""
    with tempfile.TemporaryDirectory(prefix="morrow-schema-") as folder:
        url = f"sqlite:///{Path(folder) / 'reference.db'}"
        db.upgrade(url, revision)
        engine = db.get_engine(url)
        try:
            return _tables(engine)
        finally:
            engine.dispose()


def file_schema(path: Path) -> Schema:
    """Tables and columns of the SQLite file at ``path``, opened read-only."""
    uri = f"{path.resolve().as_uri()}?mode=ro"  # as_uri escapes '?', '#' and spaces
    engine = create_engine("sqlite://", creator=lambda: sqlite3.connect(uri, uri=True))
    try:
        return _tables(engine)
    finally:
        engine.dispose()


def schema_problems(path: Path, revision: str | None) -> list[str]:
    """What keeps the file at ``path`` (stamped ``revision``) from being a usable Morrow
    database, in plain words; empty when it is complete."""
    if revision is None:
        return ["it has no schema revision (it is not a Morrow database)"]
    known = known_revisions()
    if revision not in known:
        return [f"its schema revision {revision!r} is not one this version of Morrow knows "
                f"(known: {', '.join(known)}); it may come from a newer version"]
    have = file_schema(path)
    problems = []
    for table, columns in sorted(expected_schema(revision).items()):
        if table not in have:
            problems.append(f"table {table} is missing")
            continue
        missing = sorted(columns - have[table])
        if missing:
            problems.append(f"table {table} lacks column{'s' if len(missing) > 1 else ''} "
                            f"{', '.join(missing)}")
    return problems
