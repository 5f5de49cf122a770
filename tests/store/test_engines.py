"""The engine registry never drops a pool with its connections still open.

An engine dropped while its pool still holds connections leaves them to the garbage
collector, which closes them at an arbitrary later moment (psycopg then warns that a
connection "was deleted while still open"). These checks count the pool's connections;
they use SQLite files so they run without a server.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from sqlalchemy import text

from app.store import db


def _open_one(url: str) -> None:
    with db.get_engine(url).connect() as conn:
        assert conn.execute(text("SELECT 1")).scalar() == 1


def test_the_oldest_engine_is_disposed_when_too_many_are_open(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(db, "MAX_ENGINES", 2)
    urls = [f"sqlite:///{tmp_path / f'd{i}.db'}" for i in range(3)]
    try:
        _open_one(urls[0])
        first = db.get_engine(urls[0])
        assert first.pool.checkedin() == 1
        _open_one(urls[1])
        _open_one(urls[2])  # the third pushes the first out
        assert first.pool.checkedin() == 0
        assert db.get_engine(urls[0]) is not first
    finally:
        for url in urls:
            db.release_engine(url)


def test_release_closes_idle_connections_and_the_next_use_starts_afresh(
        tmp_path: Path) -> None:
    url = f"sqlite:///{tmp_path / 'one.db'}"
    with db.session_scope(url) as session:
        assert session.execute(text("SELECT 1")).scalar() == 1
    engine = db.get_engine(url)
    assert engine.pool.checkedin() == 1
    db.release_engine(url)
    assert engine.pool.checkedin() == 0
    with db.session_scope(url) as session:
        assert session.get_bind() is not engine
    db.release_engine(url)
    db.release_engine(url)  # releasing an engine that is not open is harmless
