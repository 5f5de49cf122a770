"""Writers at once: 8 entering scores and 2 importing files; every write stored exactly once.

The scores are written as a score form will write them: one transaction holding the new
observation and its audit event. Invented unit and stays. Runs on SQLite and PostgreSQL;
tests/security/test_workers.py runs the same scenario through `morrow serve --workers 4`.
"""

from __future__ import annotations

import sqlite3
import threading
from datetime import UTC, datetime, timedelta
from typing import Any

import pytest
from sqlalchemy import func, select
from sqlalchemy.exc import OperationalError
from sqlalchemy.orm import Session

from app.ingest import import_file
from app.store import db
from app.store.audit import record_audit
from app.store.models import AuditEvent, ImportBatch, Observation
from app.store.retry import is_busy, run_transaction
from tests.conftest import UTC_ZONE
from tests.databases import is_postgres

pytestmark = pytest.mark.both_databases

WRITERS, SCORES_EACH = 8, 25
IMPORTERS, FILES_EACH, ROWS_PER_FILE = 2, 3, 400
STAYS = 40
T0 = datetime(2026, 3, 2, 8, 0, tzinfo=UTC)


def seed(url: str) -> None:
    stays = "\n".join(f"S-{i},U-CC,2026-03-01T00:00,emergency" for i in range(STAYS))
    with db.session_scope(url) as session:
        import_file(session, "units", b"unit,beds\nU-CC,50\n", "units.csv", tz=UTC_ZONE)
        import_file(session, "stays", f"stay_id,unit,admitted_at,admission_type\n{stays}\n"
                    .encode(), "stays.csv", tz=UTC_ZONE)


def enter_score(session: Session, writer: int, k: int) -> None:
    n = writer * SCORES_EACH + k
    values = {"stay_id": f"S-{n % STAYS}", "observed_at": T0 + timedelta(minutes=n),
              "name": "news2", "value": float(n % 21),
              "recorded_at": T0 + timedelta(minutes=n)}
    session.add(Observation(**values))
    session.flush()
    record_audit(session, f"nurse{writer}", "insert", "observation",
                 f"{values['stay_id']}/news2/{values['observed_at'].isoformat()}", None, values,
                 form="POST /units/{unit}/scores")


def observation_file(importer: int, f: int) -> bytes:
    start = T0 + timedelta(days=1 + importer * FILES_EACH + f)
    lines = ["stay_id,observed_at,name,value"]
    lines += [f"S-{i % STAYS},{(start + timedelta(minutes=i)).isoformat()},sofa,{i % 25}"
              for i in range(ROWS_PER_FILE)]
    return ("\n".join(lines) + "\n").encode()


@pytest.mark.slow
def test_eight_score_writers_and_two_importers(db_url: str) -> None:
    seed(db_url)
    start = threading.Barrier(WRITERS + IMPORTERS)
    errors: list[BaseException] = []

    def writer(w: int) -> None:
        start.wait()
        for k in range(SCORES_EACH):
            run_transaction(db_url, lambda s, k=k: enter_score(s, w, k))

    def importer(i: int) -> None:
        start.wait()
        for f in range(FILES_EACH):
            data = observation_file(i, f)
            run_transaction(db_url, lambda s, f=f, data=data: import_file(
                s, "observations", data, f"obs-{i}-{f}.csv", tz=UTC_ZONE, actor=f"importer{i}"))

    def guarded(target: Any, arg: int) -> None:
        try:
            target(arg)
        except BaseException as exc:  # collected: a thread's failure must fail the test
            errors.append(exc)

    threads = [threading.Thread(target=guarded, args=(writer, w)) for w in range(WRITERS)]
    threads += [threading.Thread(target=guarded, args=(importer, i)) for i in range(IMPORTERS)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=120)
    assert not any(t.is_alive() for t in threads)
    assert not errors, errors

    with db.session_scope(db_url) as session:
        def count(query: Any) -> int:
            return session.scalar(query) or 0

        scores = count(select(func.count()).select_from(Observation)
                       .where(Observation.name == "news2"))
        distinct = count(select(func.count(func.distinct(Observation.observed_at)))
                         .where(Observation.name == "news2"))
        assert scores == distinct == WRITERS * SCORES_EACH
        imported = count(select(func.count()).select_from(Observation)
                         .where(Observation.name == "sofa"))
        assert imported == IMPORTERS * FILES_EACH * ROWS_PER_FILE
        per_writer = dict(session.execute(
            select(AuditEvent.actor, func.count()).where(AuditEvent.entity == "observation")
            .group_by(AuditEvent.actor)).all())
        assert per_writer == {f"nurse{w}": SCORES_EACH for w in range(WRITERS)}
        batches = session.execute(select(ImportBatch.filename, ImportBatch.inserted)
                                  .where(ImportBatch.kind == "observations")).all()
        assert sorted(batches) == sorted((f"obs-{i}-{f}.csv", ROWS_PER_FILE)
                                         for i in range(IMPORTERS) for f in range(FILES_EACH))
        assert session.execute(select(func.count()).select_from(ImportBatch)
                               .where(ImportBatch.kind == "form")).scalar() == WRITERS * SCORES_EACH
    if is_postgres(db_url):
        return
    path = db_url.removeprefix("sqlite:///")
    with sqlite3.connect(path) as conn:
        assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"


def _busy() -> OperationalError:
    return OperationalError("INSERT ...", {}, sqlite3.OperationalError("database is locked"))


def test_busy_transaction_is_rerun_whole(db_url: str) -> None:
    seed(db_url)
    runs = []

    def work(session: Session) -> str:
        runs.append(len(runs))
        enter_score(session, 0, 0)  # written, then thrown away with the failed transaction
        if len(runs) == 1:
            raise _busy()
        return "stored"

    assert run_transaction(db_url, work, pause_s=0.001) == "stored"
    assert runs == [0, 1]
    with db.session_scope(db_url) as session:
        assert session.scalar(select(func.count()).select_from(Observation)) == 1
        assert session.scalar(select(func.count()).select_from(AuditEvent)
                              .where(AuditEvent.entity == "observation")) == 1


def test_other_errors_are_not_retried(db_url: str) -> None:
    runs = []

    def work(session: Session) -> None:
        runs.append(1)
        raise OperationalError("SELECT", {}, sqlite3.OperationalError("no such table: x"))

    with pytest.raises(OperationalError, match="no such table"):
        run_transaction(db_url, work)
    assert runs == [1] and not is_busy(ValueError("database is locked"))

    def always_busy(session: Session) -> None:
        runs.append(1)
        raise _busy()

    with pytest.raises(OperationalError, match="database is locked"):
        run_transaction(db_url, always_busy, attempts=3, pause_s=0.001)
    assert len(runs) == 4


def test_postgres_deadlock_victim_is_rerun(postgres_databases: Any) -> None:
    """Two transactions that lock two rows in opposite orders: PostgreSQL aborts one
    (deadlock_detected, 40P01, after its deadlock_timeout) and run_transaction reruns it."""
    from sqlalchemy import update

    from app.store.models import Unit

    with postgres_databases.fresh() as url:
        with db.session_scope(url) as session:
            import_file(session, "units", b"unit,beds\nU-A,5\nU-B,5\n", "units.csv",
                        tz=UTC_ZONE)
        both_hold_one = threading.Barrier(2)
        attempts = {"ab": 0, "ba": 0}
        errors: list[BaseException] = []

        def lock_in_order(first: str, second: str, tag: str) -> None:
            def work(session: Session) -> None:
                attempts[tag] += 1
                session.execute(update(Unit).where(Unit.code == first).values(census_time="01:00"))
                if attempts[tag] == 1:  # only the first run meets the other in the middle
                    both_hold_one.wait(timeout=30)
                session.execute(update(Unit).where(Unit.code == second).values(census_time="02:00"))

            try:
                run_transaction(url, work, pause_s=0.01)
            except BaseException as exc:  # collected: a thread's failure must fail the test
                errors.append(exc)

        threads = [threading.Thread(target=lock_in_order, args=("U-A", "U-B", "ab")),
                   threading.Thread(target=lock_in_order, args=("U-B", "U-A", "ba"))]
        for t in threads:
            t.start()
        for t in threads:
            t.join(timeout=60)
        assert not any(t.is_alive() for t in threads)
        assert not errors, errors
        # One ran once, the deadlock's victim twice: three runs, and both committed. The
        # victim's rerun committed last, so its writes are the ones stored.
        assert sorted(attempts.values()) == [1, 2]
        first, second = ("U-A", "U-B") if attempts["ab"] == 2 else ("U-B", "U-A")
        with db.session_scope(url) as session:
            stored = dict(session.execute(select(Unit.code, Unit.census_time)).all())
        assert stored == {first: "01:00", second: "02:00"}


def test_wrong_guesses_at_once_are_all_counted(db_url: str) -> None:
    """Six wrong passwords for a new name at the same moment: each is counted, none fails.

    Checking then writing the counter in Python would lose counts (and two first failures
    would collide on the name's key); the count is kept by one UPDATE in the database."""
    from app.store import users as accounts
    from app.store.models import SigninFailure

    guesses = 6
    start = threading.Barrier(guesses)
    problems: list[str] = []

    def guess(k: int) -> None:
        start.wait()
        try:
            def attempt(session: Session) -> None:
                outcome = accounts.attempt_signin(
                    session, "nobody.here", f"wrong guess {k}", now=T0, max_failures=100,
                    window=timedelta(minutes=15))
                assert outcome.user is None
            run_transaction(db_url, attempt)
        except Exception as exc:  # collected: the test reports every one
            problems.append(f"{type(exc).__name__}: {exc}")

    threads = [threading.Thread(target=guess, args=(k,)) for k in range(guesses)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=120)
    assert problems == []
    with db.session_scope(db_url) as session:
        row = session.get(SigninFailure, "nobody.here")
        assert row is not None and row.failures == guesses
