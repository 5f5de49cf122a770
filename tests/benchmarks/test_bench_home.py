"""The unit page's first-visit transfer and the home page's server time, on loopback over the
demo with both units trained.

- First visit: a fresh browser (Debian's Chromium through Playwright; empty cache) opens
  KV-SURG's unit page; the bytes transferred are the Resource Timing ``transferSize`` of the
  page and of everything it loads (headers included). Target: under 1.5 MB (1,500,000 bytes).
- Home page: 10 signed-in clients for a bounded 20 s, alternating "/" and "/wall", once the
  forecasts are computed. Target: p95 under 300 ms.
"""

from __future__ import annotations

import statistics
from pathlib import Path

from tests.benchmarks.walkers import p95, signed_in_client, walk
from tests.web.served import start, stop, trained_copy
from tests.web.site_pages import launched, signed_in_context

FIRST_VISIT_TARGET_BYTES = 1_500_000
CLIENTS = 10
SECONDS = 20.0
PATHS = ("/", "/wall")


def test_unit_page_first_visit_transfer_and_home_page_time(demo_db: str, tmp_path: Path) -> None:
    served = start(trained_copy(demo_db, tmp_path, ("KV-CRIT", "KV-SURG")))
    try:
        warm = signed_in_client(served.base)
        warm.get("/")  # both forecasts computed before anything is measured
        transferred, parts = _first_visit(served)
        times = _home_times(served.base)
        warm.close()
    finally:
        stop(served)
    print(f"\nBENCH unit page first visit: {transferred:,} bytes transferred "
          f"(target under {FIRST_VISIT_TARGET_BYTES:,}) "
          f"{'ok' if transferred < FIRST_VISIT_TARGET_BYTES else 'OVER TARGET'}")
    for name, size in parts:
        print(f"BENCH   {name}: {size:,} bytes")
    values = times
    slow = p95(values)
    print(f"BENCH home page and wall screen, {CLIENTS} clients: {len(values)} requests, median "
          f"{statistics.median(values) * 1000:.0f} ms, p95 {slow * 1000:.0f} ms "
          f"(target p95 300 ms) {'ok' if slow <= 0.3 else 'OVER TARGET'}")
    assert transferred < FIRST_VISIT_TARGET_BYTES
    assert len(values) > CLIENTS


def _first_visit(served) -> tuple[int, list[tuple[str, int]]]:
    browsers = launched()
    browser = next(browsers)
    try:
        context = signed_in_context(browser, served, "viewer")
        fresh = browser.new_context(storage_state=context.storage_state())  # empty cache
        page = fresh.new_page()
        page.goto(served.base + "/units/KV-SURG")
        page.wait_for_selector("#fan .main-svg")
        entries = page.evaluate("""() => [performance.getEntriesByType('navigation')[0],
            ...performance.getEntriesByType('resource')].map(e => [e.name, e.transferSize])""")
        fresh.close()
        context.close()
    finally:
        browsers.close()
    parts = [(name.removeprefix(served.base), int(size)) for name, size in entries]
    return sum(size for _, size in parts), parts


def _home_times(base: str) -> list[float]:
    clients = [signed_in_client(base) for _ in range(CLIENTS)]
    times, errors = walk(clients, PATHS, SECONDS)
    for c in clients:
        c.close()
    assert not errors, errors[:5]
    return [t for values in times.values() for t in values]
