"""Import speed: the whole demo history (target 30 s) and a 1,000-row snapshot (target 2 s)."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

from app.demo.load import load_demo
from app.ingest import import_file
from app.store import db
from tests.benchmarks.conftest import timed
from tests.conftest import DEMO_DIR, UTC_ZONE

CENSUS_HEADER = "taken_at,unit,bed,stay_id,admitted_at,admission_type,age,specialty"


def snapshot(taken_at: datetime, stays: range) -> bytes:
    rows = [CENSUS_HEADER]
    for i in stays:
        admitted = datetime(2026, 1, 1, tzinfo=UTC) + timedelta(hours=i % 500)
        rows.append(f"{taken_at.isoformat()},BIG,B{i},S-{i},{admitted.isoformat()},emergency,"
                    f"{20 + i % 70},general")
    return ("\n".join(rows) + "\n").encode()


def test_import_whole_demo_history(db_url: str) -> None:
    out: dict[str, float] = {}
    with timed("import whole demo history", 30, out), db.session_scope(db_url) as session:
        results, _ = load_demo(session, DEMO_DIR, tz=UTC_ZONE, shift=False)
    rows = sum(r.rows for r in results)
    print(f"BENCH   {rows} rows, {rows / out['import whole demo history']:.0f} rows/s")
    assert rows > 10_000


def test_import_1000_row_census_snapshot(db_url: str) -> None:
    with db.session_scope(db_url) as session:
        import_file(session, "units", b"unit,beds\nBIG,1200\n", "units.csv", tz=UTC_ZONE)
        first = datetime(2026, 2, 1, tzinfo=UTC)
        import_file(session, "census", snapshot(first, range(1000)), "c1.csv", tz=UTC_ZONE)
    out: dict[str, float] = {}
    # The second snapshot replaces 100 stays: it creates stays and diffs out discharges.
    with timed("import 1,000-row census snapshot", 2, out), db.session_scope(db_url) as session:
        result = import_file(session, "census", snapshot(first + timedelta(days=1),
                             range(100, 1100)), "c2.csv", tz=UTC_ZONE)
    assert result.inserted == 1000
