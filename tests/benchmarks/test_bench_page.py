"""Page and API latency on loopback for the demo's larger unit (KV-SURG, 28 beds):
10 concurrent signed-in clients for a bounded 30 s, each alternating the unit page and the
forecast API. Target: p95 under 300 ms (reported beside the figure)."""

from __future__ import annotations

import statistics
from pathlib import Path

from tests.benchmarks.walkers import p95, signed_in_client, walk
from tests.web.served import start, stop, trained_copy

CLIENTS = 10
SECONDS = 30.0
PATHS = ("/units/KV-SURG", "/api/units/KV-SURG/forecast")


def test_page_and_api_latency_with_10_clients(demo_db: str, tmp_path: Path) -> None:
    served = start(trained_copy(demo_db, tmp_path, ("KV-SURG",)))
    try:
        clients = [signed_in_client(served.base) for _ in range(CLIENTS)]
        clients[0].get(PATHS[0])  # first forecast computed before the clock starts
        times, errors = walk(clients, PATHS, SECONDS)
        for c in clients:
            c.close()
    finally:
        stop(served)
    everything = [t for values in times.values() for t in values]
    for path, values in [*times.items(), ("all", everything)]:
        slow = p95(values)
        print(f"\nBENCH {path}: {len(values)} requests, median "
              f"{statistics.median(values) * 1000:.0f} ms, p95 {slow * 1000:.0f} ms "
              f"(target p95 300 ms) {'ok' if slow <= 0.3 else 'OVER TARGET'}")
    assert not errors, errors[:5]
    assert len(everything) > CLIENTS
