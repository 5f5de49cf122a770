"""One import in a transaction of its own, committed before the caller answers, run again
when another writer got in the way, and held to a time limit.

The command line and the upload page both import this way. Two people importing the same
file at the same moment both find its rows missing and both insert them; the second to
commit fails on the unique key. Imports are idempotent, so that import is simply run again
(``app.store.retry``): it then finds the rows the first one stored and reports them as
unchanged. A refused file (``ImportRefused``) is never run again: it would be refused again.
"""

from __future__ import annotations

import gc
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from zoneinfo import ZoneInfo

from sqlalchemy.orm import Session

from app.ingest.importer import ImportResult, import_file
from app.store.retry import run_transaction

# Generous: the whole demo history (tens of thousands of rows) imports in seconds; an import
# still running after this long is stopped rather than left holding the write lock.
IMPORT_TIME_LIMIT_S = 300.0


class ImportTimedOut(Exception):
    """The import ran past its time limit and was rolled back; nothing was stored."""

    def __init__(self, limit_s: float):
        self.limit_s = limit_s
        super().__init__(f"the import took longer than {limit_s:g} seconds and was stopped; "
                         "nothing was stored. Split the file into smaller parts and import "
                         "them one by one.")


_gc_lock = threading.Lock()
_gc_pausers = 0


@contextmanager
def _collector_paused() -> Iterator[None]:
    """No cyclic garbage collection while an import builds its rows.

    A large file makes millions of small objects that all live until the import ends; each
    full collection then walks all of them while holding the interpreter lock, so every other
    request of the server stalled for hundreds of milliseconds at a time (measured with
    tests/benchmarks/test_bench_upload_stall.py). Reference counting still frees what is
    dropped; the collector runs again when the last import in the process ends.
    """
    global _gc_pausers
    with _gc_lock:
        _gc_pausers += 1
        gc.disable()
    try:
        yield
    finally:
        with _gc_lock:
            _gc_pausers -= 1
            if _gc_pausers == 0:
                gc.enable()


def import_once(url: str, kind: str, data: bytes, filename: str, *, tz: ZoneInfo,
                actor: str = "import", limit_s: float = IMPORT_TIME_LIMIT_S) -> ImportResult:
    """Import ``data`` and commit it; a conflicting concurrent import makes it run again.

    Raises ``ImportRefused`` (nothing stored) or ``ImportTimedOut`` once ``limit_s`` has
    passed: checked before each run and before the commit, so an import that finishes late
    is rolled back instead of being stored after its caller was told it failed.
    """
    deadline = time.monotonic() + limit_s

    def work(session: Session) -> ImportResult:
        if time.monotonic() >= deadline:
            raise ImportTimedOut(limit_s)
        with _collector_paused():
            result = import_file(session, kind, data, filename, tz=tz, actor=actor)
        if time.monotonic() >= deadline:
            raise ImportTimedOut(limit_s)
        return result

    return run_transaction(url, work, retry_conflicts=True, deadline=deadline)
