"""Benchmarks print their figures; run them with `make bench`."""

from __future__ import annotations

import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager


@contextmanager
def timed(label: str, target_s: float, out: dict[str, float]) -> Iterator[None]:
    start = time.perf_counter()
    yield
    out[label] = elapsed = time.perf_counter() - start
    verdict = "ok" if elapsed <= target_s else "OVER TARGET"
    print(f"\nBENCH {label}: {elapsed:.3f} s (target {target_s:g} s) {verdict}")


def best_of(repeats: int, work: Callable[[], object]) -> float:
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        work()
        times.append(time.perf_counter() - start)
    return min(times)
