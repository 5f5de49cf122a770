"""Signed-in HTTP clients walking a list of pages for a bounded time: the load of the page
benchmarks (each client starts at its own place in the list)."""

from __future__ import annotations

import threading
import time
from collections.abc import Mapping, Sequence

import httpx2

from tests.security.fixtures import sign_in_form
from tests.web.served import PASSWORD


def signed_in_client(base: str, username: str = "viewer", timeout: float = 120.0
                     ) -> httpx2.Client:
    client = httpx2.Client(base_url=base, timeout=timeout)
    assert sign_in_form(client, username, PASSWORD).status_code == 303
    return client


def walk(clients: Sequence[httpx2.Client], paths: Sequence[str], seconds: float, *,
         expected: Mapping[str, int] | None = None, stride: int = 1
         ) -> tuple[dict[str, list[float]], list[str]]:
    """Every client requests ``paths`` in turn (client i from position ``stride * i``) until
    ``seconds`` have passed; each request's time by path, and the answers that were not the
    ``expected`` status (200 unless given)."""
    times: dict[str, list[float]] = {p: [] for p in paths}
    errors: list[str] = []
    lock = threading.Lock()
    deadline = time.monotonic() + seconds

    def work(client: httpx2.Client, offset: int) -> None:
        i = offset
        while time.monotonic() < deadline:
            path = paths[i % len(paths)]
            began = time.perf_counter()
            response = client.get(path)
            elapsed = time.perf_counter() - began
            with lock:
                times[path].append(elapsed)
                if response.status_code != (expected or {}).get(path, 200):
                    errors.append(f"{path} {response.status_code}")
            i += 1

    threads = [threading.Thread(target=work, args=(c, stride * i))
               for i, c in enumerate(clients)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    return times, errors


def p95(values: Sequence[float]) -> float:
    ordered = sorted(values)
    return ordered[int(0.95 * (len(ordered) - 1))]
