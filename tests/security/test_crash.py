"""A process killed with SIGKILL in the middle of a large import leaves the database whole,
without any of that import, and the same import then succeeds. Invented unit and stays."""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest
from sqlalchemy import func, select

from app.config import PROJECT_ROOT
from app.ingest import import_file
from app.store import db
from app.store.models import AuditEvent, ImportBatch, Observation
from tests.conftest import UTC_ZONE

ROWS = 40_000
STAYS = 300


def counts(url: str) -> tuple[int, int, int]:
    with db.session_scope(url) as session:
        return (session.scalar(select(func.count()).select_from(Observation)) or 0,
                session.scalar(select(func.count()).select_from(ImportBatch)) or 0,
                session.scalar(select(func.count()).select_from(AuditEvent)) or 0)


@pytest.mark.slow
def test_sigkill_during_a_large_import(db_url: str, tmp_path: Path) -> None:
    stays = "\n".join(f"S-{i},U-KL,2026-01-01T00:00,emergency" for i in range(STAYS))
    with db.session_scope(db_url) as session:
        import_file(session, "units", b"unit,beds\nU-KL,400\n", "units.csv", tz=UTC_ZONE)
        import_file(session, "stays", f"stay_id,unit,admitted_at,admission_type\n{stays}\n"
                    .encode(), "stays.csv", tz=UTC_ZONE)
    before = counts(db_url)
    engine = db.get_engine(db_url)
    with engine.connect() as conn:
        conn.exec_driver_sql("PRAGMA wal_checkpoint(TRUNCATE)")
    engine.dispose()
    base = datetime(2026, 1, 2, tzinfo=UTC)
    lines = ["stay_id,observed_at,name,value"] + [
        f"S-{i % STAYS},{(base + timedelta(minutes=i // STAYS)).isoformat()},sofa,{i % 24}"
        for i in range(ROWS)]
    big = tmp_path / "observations.csv"
    big.write_text("\n".join(lines) + "\n")
    path = Path(db_url.removeprefix("sqlite:///"))
    wal = path.with_name(path.name + "-wal")

    env = {**os.environ, "MORROW_TIMEZONE": "UTC"}
    child = subprocess.Popen(
        [sys.executable, "-m", "app.cli.main", "--db", db_url, "import", "observations", str(big)],
        cwd=PROJECT_ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    # Uncommitted pages spill into the WAL once the import writes more than the page cache
    # holds: a WAL past 1 MB while the process still runs means the import is mid-write.
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and child.poll() is None:
        if wal.exists() and wal.stat().st_size > 1_000_000:
            break
        time.sleep(0.005)
    assert child.poll() is None, "the import finished before it could be interrupted"
    assert wal.stat().st_size > 1_000_000
    child.send_signal(signal.SIGKILL)
    child.communicate(timeout=30)
    assert child.returncode == -signal.SIGKILL

    with sqlite3.connect(path) as conn:
        assert conn.execute("PRAGMA integrity_check").fetchall() == [("ok",)]
    assert counts(db_url) == before  # not a row, batch or audit event of the killed import

    with db.session_scope(db_url) as session:
        result = import_file(session, "observations", big.read_bytes(), big.name, tz=UTC_ZONE,
                             actor="rerun")
    assert (result.inserted, result.unchanged) == (ROWS, 0)
    assert counts(db_url)[0] == ROWS
