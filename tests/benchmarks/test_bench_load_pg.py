"""Load run for several server workers: 40 signed-in clients for 60 s on loopback, reads and
score writes mixed as in test_bench_load.py, against

- PostgreSQL with `morrow serve --workers 4` (the deployment the README describes), and
- SQLite with one worker (the default), in the same run so the two figures are comparable.

Targets (the issue's): no errors, every accepted score stored exactly once (counted in the
database). Median and p95 latency are printed beside each other, not asserted, as with
every speed target here. The demo hospital (invented) with a model trained for KV-CRIT.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest

from app.config import get_settings
from tests.benchmarks.test_bench_load import Server, load_server, run_load

pytestmark = pytest.mark.both_databases

CLIENTS = 40
WORKERS = {"sqlite": 1, "postgresql": 4}


@pytest.fixture
def server(database: str, db_url: str, tmp_path: Path,
           monkeypatch: pytest.MonkeyPatch) -> Iterator[Server]:
    monkeypatch.setenv("MORROW_TIMEZONE", "UTC")
    get_settings.cache_clear()
    with load_server(db_url, tmp_path, CLIENTS, WORKERS[database]) as running:
        yield running
    get_settings.cache_clear()


def test_load_forty_clients_sixty_seconds(server: Server, database: str) -> None:
    print(f"\nBENCH database: {database}", end="")
    run_load(server, CLIENTS, sign_in_timeout_s=600)
