"""Re-running a whole transaction when the database gave up on it so that others could go on.

SQLite lets one writer in at a time. A writer waits up to the busy timeout
(``db.BUSY_TIMEOUT_MS``) for the lock; past it, or when waiting could deadlock, it fails
with "database is locked". PostgreSQL lets writers run side by side and aborts one of two
transactions that wait on each other (deadlock_detected, SQLSTATE 40P01) or that cannot be
put in a serial order (serialization_failure, 40001). Either way the transaction has been
rolled back entirely, so running the same unit of work again from the start is safe: this
is the one retry we make. Imports are idempotent too, so a retried import can never store
a row twice.

One more conflict is worth a second run for an idempotent unit of work such as an import:
two transactions that each checked the store, found a key missing and inserted it. The
second to commit fails on the unique key (SQLite: "UNIQUE constraint failed"; PostgreSQL:
unique_violation, SQLSTATE 23505). Run again, the work finds the other's rows and changes
nothing. Only callers whose work is idempotent ask for it (``retry_conflicts``); for any
other work a unique conflict is a real answer.
"""

from __future__ import annotations

import random
import time
from collections.abc import Callable
from typing import TypeVar

from sqlalchemy.exc import IntegrityError, OperationalError
from sqlalchemy.orm import Session

from app.store import db

T = TypeVar("T")

BUSY_MESSAGES = ("database is locked", "database is busy", "database table is locked")
# PostgreSQL manual, Appendix A "PostgreSQL Error Codes", class 40 "Transaction Rollback".
RETRY_SQLSTATES = frozenset({"40001", "40P01"})
UNIQUE_VIOLATION = "23505"


def is_busy(exc: BaseException) -> bool:
    """Whether ``exc`` is the database's "busy, try again" answer (and not a real failure)."""
    if not isinstance(exc, OperationalError):
        return False
    if getattr(exc.orig, "sqlstate", None) in RETRY_SQLSTATES:
        return True
    return any(text in str(exc.orig).lower() for text in BUSY_MESSAGES)


def is_conflict(exc: BaseException) -> bool:
    """Whether ``exc`` is a unique key that another transaction stored first."""
    if not isinstance(exc, IntegrityError):
        return False
    if getattr(exc.orig, "sqlstate", None) == UNIQUE_VIOLATION:
        return True
    return "unique constraint failed" in str(exc.orig).lower()


def run_transaction(url: str, work: Callable[[Session], T], *, attempts: int = 5,
                    pause_s: float = 0.05, retry_conflicts: bool = False,
                    deadline: float | None = None) -> T:
    """Run ``work`` in one transaction (``db.session_scope``), again if the database was busy.

    ``work`` must do nothing outside the database that cannot be repeated: it may run up
    to ``attempts`` times, and only the last run's transaction is committed. With
    ``retry_conflicts`` a unique-key conflict is run again too (idempotent work only). No
    new run starts after ``deadline`` (a ``time.monotonic()`` value): the last error stands.
    """
    if attempts < 1:
        raise ValueError(f"attempts must be at least 1, got {attempts}")
    for attempt in range(1, attempts + 1):
        try:
            with db.session_scope(url) as session:
                return work(session)
        except (OperationalError, IntegrityError) as exc:
            again = is_busy(exc) or (retry_conflicts and is_conflict(exc))
            late = deadline is not None and time.monotonic() >= deadline
            if not again or attempt == attempts or late:
                raise
            # Jittered back-off so writers that collided do not collide again in step.
            time.sleep(pause_s * (2 ** (attempt - 1)) * (0.5 + random.random()))
    raise AssertionError("unreachable")  # the loop returns or raises
