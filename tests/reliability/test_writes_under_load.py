"""Writes under load through a real server: no 500, no stalled request, each confirmed write
stored exactly once.

Eight clients at once for ten seconds against one server process: two reading pages, three
nurses entering scores, two schedulers booking and one bed manager uploading small
observation files. A write that waited for another request's lock until the database gave
up answered 500 after 30 s; a request still unanswered after REQUEST_LIMIT_S counts as
stalled (a liveness bound far above any normal answer, not a speed target: those are in
tests/benchmarks/test_bench_load.py). Invented unit, stays and accounts.
"""

from __future__ import annotations

import threading
import time
from pathlib import Path

import httpx2 as httpx
import pytest

from app.store import db
from tests.reliability.crash_server import (
    UNIT,
    Record,
    ServerProcess,
    integrity_problems,
    run_writer,
    seed,
    sign_in,
    stored_problems,
)

pytestmark = [pytest.mark.both_databases, pytest.mark.slow]

RUN_S = 10.0
REQUEST_LIMIT_S = 20.0
WRITERS = {"score": 3, "booking": 2, "upload": 1}
READERS = 2
PAGES = (f"/units/{UNIT}", "/api/units", "/", f"/units/{UNIT}/booking", "/data")


def read_pages(client: httpx.Client, record: Record, stop: threading.Event) -> None:
    k = 0
    try:
        while not stop.is_set():
            path = PAGES[k % len(PAGES)]
            k += 1
            try:
                answer = client.get(path)
            except httpx.TransportError as exc:
                with record.lock:
                    record.failures.append(f"GET {path}: {exc!r}")
                continue
            if answer.status_code != 200:
                with record.lock:
                    record.failures.append(f"GET {path}: {answer.status_code}")
    finally:
        client.close()


def test_eight_clients_no_500_no_stall_each_write_once(db_url: str, tmp_path: Path) -> None:
    seed(db_url, writers=max(WRITERS.values()))
    server = ServerProcess(db_url, tmp_path / "server.err")
    record = Record()
    stop = threading.Event()
    try:
        server.start(timeout_s=120)
        threads = []
        for kind, count in WRITERS.items():
            for w in range(count):
                client, csrf = sign_in(server.base, kind, w)
                client.timeout = httpx.Timeout(REQUEST_LIMIT_S)
                threads.append(threading.Thread(
                    target=run_writer, args=(kind, w, (client, csrf), record, stop),
                    kwargs={"kills": False}, daemon=True))
        for _ in range(READERS):
            client, _ = sign_in(server.base, "upload", 0)
            client.timeout = httpx.Timeout(REQUEST_LIMIT_S)
            threads.append(threading.Thread(target=read_pages, args=(client, record, stop),
                                            daemon=True))
        began = time.monotonic()
        for t in threads:
            t.start()
        time.sleep(RUN_S)
        stop.set()
        for t in threads:
            t.join(timeout=REQUEST_LIMIT_S + 30)
        wall = time.monotonic() - began
        assert not any(t.is_alive() for t in threads)
        log = server.log.read_text(errors="replace")
    finally:
        stop.set()
        server.stop()
    db.release_engine(db_url)

    print(f"\n{len(threads)} clients, {wall:.1f} s: {len(record.scores)} scores, "
          f"{len(record.bookings)} bookings, {len(record.uploads)} files confirmed; "
          f"slowest write {max(record.latencies_ms, default=0):.0f} ms")
    assert not record.failures, record.failures[:10]
    assert min(len(record.scores), len(record.bookings), len(record.uploads)) > 0
    assert "Traceback" not in log, log[-3000:]
    problems = stored_problems(db_url, record)
    assert not problems, problems[:10]
    integrity, _ = integrity_problems(db_url)
    assert not integrity, integrity
    db.release_engine(db_url)
