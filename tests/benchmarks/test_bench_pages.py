"""Every page's latency on loopback with 10 signed-in clients (bed managers) for a bounded
30 s: each client walks the list of pages (tests/web/site_pages.py) from its own starting
point, over the demo hospital with both units trained and a stored backtest each. Each page
is visited once before the clock starts, so the first forecast, the planning simulation and
the model page are computed (and kept) before timing: the target is the page a person opens
once someone has, at a huddle. Target (the pages issue): every page's p95 under 300 ms,
reported beside each figure (as with every speed target here, reported and not asserted;
the assertion is that every page answered)."""

from __future__ import annotations

import time
from datetime import UTC, datetime
from pathlib import Path

from app.demo.backtest import store_demo_backtest
from tests.benchmarks.walkers import p95, signed_in_client, walk
from tests.conftest import UTC_ZONE
from tests.web.served import start, stop, trained_copy
from tests.web.site_pages import UNITS, site_pages

CLIENTS = 10
SECONDS = 30.0
P95_TARGET_S = 0.3
DEMO_NOW = datetime(2026, 11, 30, 8, 0, tzinfo=UTC)


def test_every_page_with_10_clients(demo_db: str, tmp_path: Path) -> None:
    url = trained_copy(demo_db, tmp_path, UNITS)
    for unit in UNITS:
        store_demo_backtest(url, unit, DEMO_NOW, UTC_ZONE)
    served = start(url)
    paths = [p.path for p in site_pages()]
    try:
        clients = [signed_in_client(served.base, "manager") for _ in range(CLIENTS)]
        warm: dict[str, float] = {}
        status: dict[str, int] = {}  # each page must answer as it did the first time
        for path in paths:
            began = time.perf_counter()
            status[path] = clients[0].get(path).status_code
            warm[path] = time.perf_counter() - began
        times, errors = walk(clients, paths, SECONDS, expected=status, stride=3)
        for c in clients:
            c.close()
    finally:
        stop(served)
    over = []
    for path, values in times.items():
        if not values:
            continue
        slow = p95(values)
        ok = slow <= P95_TARGET_S
        if not ok:
            over.append(path)
        print(f"\nBENCH {path}: first view {warm[path] * 1000:.0f} ms; {len(values)} requests, "
              f"median {sorted(values)[len(values) // 2] * 1000:.0f} ms, p95 {slow * 1000:.0f} ms "
              f"(target p95 300 ms) {'ok' if ok else 'OVER TARGET'}")
    print(f"\nBENCH pages over the target: {over or 'none'}")
    assert not errors, errors[:5]
    # Pages answer themselves, apart from the unknown unit (404) and admin-only pages (403).
    assert all(code in (200, 403, 404) for code in status.values()), status
    assert status[f"/units/{UNITS[0]}"] == 200 and status[f"/units/{UNITS[1]}/model"] == 200
    assert all(times[p] for p in paths), [p for p in paths if not times[p]]
