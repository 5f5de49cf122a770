"""Every page's latency on loopback with 10 signed-in clients (bed managers) for a bounded
30 s: each client walks the list of pages (tests/web/site_pages.py) from its own starting
point, over the demo hospital with both units trained and a stored backtest each. Each page
is visited once before the clock starts, so the first forecast, the planning simulation and
the model page are computed (and kept) before timing: the target is the page a person opens
once someone has, at a huddle. Target (the pages issue): every page's p95 under 300 ms,
reported beside each figure (as with every speed target here, reported and not asserted;
the assertion is that every page answered)."""

from __future__ import annotations

import re
import threading
import time
from datetime import UTC, datetime
from pathlib import Path

import httpx2

from app.demo.backtest import store_demo_backtest
from tests.conftest import UTC_ZONE
from tests.web.served import PASSWORD, start, stop, trained_copy
from tests.web.site_pages import UNITS, site_pages

CLIENTS = 10
SECONDS = 30.0
P95_TARGET_S = 0.3
DEMO_NOW = datetime(2026, 11, 30, 8, 0, tzinfo=UTC)


def _client(base: str) -> httpx2.Client:
    client = httpx2.Client(base_url=base, timeout=120.0)
    form = client.get("/signin").text
    token = re.search(r'name="csrf_token" value="([^"]+)"', form)
    assert token is not None
    client.post("/signin", data={"username": "manager", "password": PASSWORD,
                                 "csrf_token": token.group(1)})
    return client


def test_every_page_with_10_clients(demo_db: str, tmp_path: Path) -> None:
    url = trained_copy(demo_db, tmp_path, UNITS)
    for unit in UNITS:
        store_demo_backtest(url, unit, DEMO_NOW, UTC_ZONE)
    served = start(url)
    paths = [p.path for p in site_pages()]
    try:
        clients = [_client(served.base) for _ in range(CLIENTS)]
        warm: dict[str, float] = {}
        status: dict[str, int] = {}  # each page must answer as it did the first time
        for path in paths:
            began = time.perf_counter()
            status[path] = clients[0].get(path).status_code
            warm[path] = time.perf_counter() - began
        times: dict[str, list[float]] = {p: [] for p in paths}
        errors: list[str] = []
        lock = threading.Lock()
        deadline = time.monotonic() + SECONDS

        def work(client: httpx2.Client, offset: int) -> None:
            i = offset
            while time.monotonic() < deadline:
                path = paths[i % len(paths)]
                began = time.perf_counter()
                response = client.get(path)
                elapsed = time.perf_counter() - began
                with lock:
                    times[path].append(elapsed)
                    if response.status_code != status[path]:
                        errors.append(f"{path} {response.status_code}")
                i += 1

        threads = [threading.Thread(target=work, args=(c, 3 * i)) for i, c in enumerate(clients)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        for c in clients:
            c.close()
    finally:
        stop(served)
    over = []
    for path, values in times.items():
        values = sorted(values)
        if not values:
            continue
        p95 = values[int(0.95 * (len(values) - 1))]
        ok = p95 <= P95_TARGET_S
        if not ok:
            over.append(path)
        print(f"\nBENCH {path}: first view {warm[path] * 1000:.0f} ms; {len(values)} requests, "
              f"median {values[len(values) // 2] * 1000:.0f} ms, p95 {p95 * 1000:.0f} ms "
              f"(target p95 300 ms) {'ok' if ok else 'OVER TARGET'}")
    print(f"\nBENCH pages over the target: {over or 'none'}")
    assert not errors, errors[:5]
    # Pages answer themselves, apart from the unknown unit (404) and admin-only pages (403).
    assert all(code in (200, 403, 404) for code in status.values()), status
    assert status[f"/units/{UNITS[0]}"] == 200 and status[f"/units/{UNITS[1]}/model"] == 200
    assert all(times[p] for p in paths), [p for p in paths if not times[p]]
