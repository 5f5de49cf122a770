"""Load run for several server workers: 40 signed-in clients for 60 s on loopback, reads and
score writes mixed as in test_bench_load.py, against

- PostgreSQL with `morrow serve --workers 4` (the deployment the README describes), and
- SQLite with one worker (the default), in the same run so the two figures are comparable.

Targets (the issue's): no errors, every accepted score stored exactly once (counted in the
database). Median and p95 latency are printed beside each other, not asserted, as with
every speed target here. The demo hospital (invented) with a model trained for KV-CRIT.
"""

from __future__ import annotations

import os
import statistics
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path

import httpx2 as httpx
import pytest
from sqlalchemy import func, select

from app.config import PROJECT_ROOT, get_settings
from app.demo.load import load_demo
from app.forecast.service import train_model
from app.store import db
from app.store.models import Observation
from tests.benchmarks.test_bench_load import (
    PASSWORD,
    UNIT,
    Tally,
    free_port,
    percentile,
    run_client,
)
from tests.conftest import DEMO_DIR, UTC_ZONE
from tests.security.fixtures import make_user
from tests.security.test_workers import cpu_ticks, worker_pids

pytestmark = pytest.mark.both_databases

CLIENTS = 40
DURATION_S = 60.0
P95_TARGET_MS = 300.0
WORKERS = {"sqlite": 1, "postgresql": 4}


@dataclass
class Server:
    base_url: str
    db_url: str
    workers: int
    stderr_path: Path


def wait_until_idle(pids: list[int], timeout_s: float = 180.0) -> None:
    """Until every worker has finished starting (their CPU time stops growing)."""
    deadline = time.monotonic() + timeout_s
    last = sum(cpu_ticks(p) for p in pids)
    while time.monotonic() < deadline:
        time.sleep(1.0)
        now = sum(cpu_ticks(p) for p in pids)
        if now - last < 10:  # under 0.1 s of CPU in the last second, all workers together
            return
        last = now
    raise AssertionError("the workers were still busy starting after 180 s")


@pytest.fixture
def server(database: str, db_url: str, tmp_path: Path,
           monkeypatch: pytest.MonkeyPatch) -> Iterator[Server]:
    monkeypatch.setenv("MORROW_TIMEZONE", "UTC")
    get_settings.cache_clear()
    with db.session_scope(db_url) as session:
        load_demo(session, DEMO_DIR, tz=UTC_ZONE, shift=True)
    with db.session_scope(db_url) as session:
        # Train until a minute ago, or the first minute would find no model.
        until = datetime.now(UTC).replace(second=0, microsecond=0) - timedelta(minutes=1)
        train_model(session, UNIT, until, UTC_ZONE)
    for c in range(CLIENTS):
        make_user(db_url, f"load.nurse{c:02d}", "nurse_in_charge", PASSWORD)
    db.get_engine(db_url).dispose()
    workers = WORKERS[database]
    port = free_port()
    stderr_path = tmp_path / "server.err"
    with open(stderr_path, "wb") as stderr:
        child = subprocess.Popen(
            [sys.executable, "-m", "app.cli.main", "--db", db_url, "serve", "--host",
             "127.0.0.1", "--port", str(port), "--workers", str(workers)],
            cwd=PROJECT_ROOT, env={**os.environ, "MORROW_TIMEZONE": "UTC"},
            stdout=subprocess.DEVNULL, stderr=stderr)
    base = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + 180
        while True:
            assert child.poll() is None, stderr_path.read_text()
            try:
                if httpx.get(f"{base}/health", timeout=2).status_code == 200:
                    break
            except httpx.TransportError:
                pass
            assert time.monotonic() < deadline, "the server did not start in 180 s"
            time.sleep(0.2)
        if workers > 1:
            pids = worker_pids(child.pid)
            assert len(pids) == workers, pids
            wait_until_idle(pids)
        yield Server(base, db_url, workers, stderr_path)
    finally:
        child.terminate()
        try:
            child.wait(timeout=30)
        except subprocess.TimeoutExpired:
            child.kill()
            child.wait()
        get_settings.cache_clear()


def test_load_forty_clients_sixty_seconds(server: Server, database: str) -> None:
    tally = Tally()
    start = threading.Barrier(CLIENTS + 1)
    stop_at = [float("inf")]
    threads = [threading.Thread(target=run_client, args=(n, server.base_url, start, stop_at,
                                                         tally), daemon=True)
               for n in range(CLIENTS)]
    for t in threads:
        t.start()
    try:
        start.wait(timeout=600)  # every client has signed in
    except threading.BrokenBarrierError:
        pytest.fail(f"the clients could not all sign in: {tally.errors[:5]}")
    load_before = os.getloadavg()[0]
    began = time.monotonic()
    stop_at[0] = began + DURATION_S
    for t in threads:
        t.join(timeout=DURATION_S + 120)
    wall = time.monotonic() - began
    assert not any(t.is_alive() for t in threads)

    with db.session_scope(server.db_url) as session:
        stored = dict(session.execute(
            select(Observation.name, func.count()).where(Observation.name.like("load%"))
            .group_by(Observation.name)).all())
    accepted = dict(tally.scores_accepted)
    everything = [ms for values in tally.latencies.values() for ms in values]
    requests = len(everything)
    median, p95 = statistics.median(everything), percentile(everything, 95)
    setup = f"{database}, {server.workers} worker{'s' if server.workers > 1 else ''}"
    verdict = "ok" if p95 <= P95_TARGET_MS else "OVER TARGET"
    print(f"\nBENCH load [{setup}]: load average {load_before:.1f} before the run, "
          f"{os.getloadavg()[0]:.1f} after (2 cores)")
    print(f"BENCH load [{setup}]: {CLIENTS} clients, {wall:.0f} s, {requests} requests "
          f"({requests / wall:.1f}/s), {len(tally.errors)} errors, "
          f"{sum(accepted.values())} scores accepted, {sum(stored.values())} stored")
    print(f"BENCH load [{setup}] latency: median {median:.0f} ms, p95 {p95:.0f} ms "
          f"(target p95 {P95_TARGET_MS:.0f} ms) {verdict}")
    for kind, values in sorted(tally.latencies.items()):
        print(f"BENCH   {kind:<13} n={len(values):<5} median {statistics.median(values):6.0f} ms"
              f"  p95 {percentile(values, 95):6.0f} ms  max {max(values):6.0f} ms")

    assert tally.errors == [], tally.errors[:10]
    assert sum(accepted.values()) > 0
    assert stored == accepted  # every accepted score stored once, none lost, none doubled
    log = server.stderr_path.read_text(errors="replace")
    assert "Traceback" not in log
    assert not [s for s in tally.stay_ids if s in log]  # no patient id in the server's log
