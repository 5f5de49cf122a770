"""kill -9 of the server while writes are in flight loses no confirmed write and doubles none.

A score writer, a booking writer and an uploader of small observation files work through a
real `morrow serve` process on a free loopback port. The server is killed with SIGKILL at
seeded random moments, KILLS times, and started again each time. Half of the kills come the
instant a client has been told its write was recorded, the moment a server that answers
before it commits would lose it; the others after a random (seeded) run time, often
mid-request.
Afterwards every confirmed write is in the database exactly once, nothing is there twice,
every file is whole or absent, and the database's own integrity check passes.
"""

from __future__ import annotations

import random
import threading
import time
from pathlib import Path

import pytest

from app.store import db
from tests.reliability.crash_server import (
    Record,
    ServerProcess,
    integrity_problems,
    run_writer,
    seed,
    sign_in,
    stored_problems,
)

pytestmark = [pytest.mark.both_databases, pytest.mark.slow]

KILLS = 20
SEED = 20261204
KINDS = ("score", "booking", "upload")


def test_kill_nine_at_random_moments_loses_no_confirmed_write(db_url: str,
                                                              tmp_path: Path) -> None:
    seed(db_url)
    rng = random.Random(SEED)
    server = ServerProcess(db_url, tmp_path / "server.err")
    record = Record()
    stop = threading.Event()
    starts: list[float] = []
    kinds_of_kill = {"after a confirmation": 0, "at a random time": 0}
    try:
        starts.append(server.start(timeout_s=120))
        clients = {kind: sign_in(server.base, kind) for kind in KINDS}
        threads = [threading.Thread(target=run_writer, args=(kind, 0, clients[kind], record,
                                                             stop), daemon=True)
                   for kind in KINDS]
        for t in threads:
            t.start()
        for kill in range(KILLS):
            if kill % 2 == 0 and record.wait_for_confirmation(timeout_s=5.0):
                kinds_of_kill["after a confirmation"] += 1
            else:
                time.sleep(rng.uniform(0.05, 1.0))
                kinds_of_kill["at a random time"] += 1
            server.kill()
            starts.append(server.start())
        time.sleep(0.5)  # a last stretch of writes, ended by a clean stop
        stop.set()
        for t in threads:
            t.join(timeout=60)
        assert not any(t.is_alive() for t in threads)
    finally:
        stop.set()
        server.stop()
    db.release_engine(db_url)

    print(f"\n{KILLS} kills ({kinds_of_kill}); restarts took {min(starts):.1f}-"
          f"{max(starts):.1f} s; confirmed: {len(record.scores)} scores, "
          f"{len(record.bookings)} bookings, {len(record.uploads)} files; "
          f"{record.lost_connections} writes cut off by a kill")
    assert not record.failures, record.failures[:10]
    assert min(len(record.scores), len(record.bookings), len(record.uploads)) > 0
    problems = stored_problems(db_url, record)
    assert not problems, problems[:10]
    integrity, how = integrity_problems(db_url)
    print(f"integrity: {how}: {integrity or 'ok'}")
    assert not integrity, integrity
    db.release_engine(db_url)
