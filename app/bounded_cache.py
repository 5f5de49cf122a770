"""A small in-process cache (pages, parsed models, survival tables): the most recently used
results by key, at most ``size`` of them, safe to share between the server's threads."""

from __future__ import annotations

import threading
from collections import OrderedDict
from collections.abc import Callable, Hashable
from typing import Generic, TypeVar

V = TypeVar("V")


class BoundedCache(Generic[V]):
    """Values by key; reading one makes it the newest, and the oldest go past ``size``."""

    def __init__(self, size: int) -> None:
        self.size = size
        self._items: OrderedDict[Hashable, V] = OrderedDict()
        self._lock = threading.Lock()

    def get(self, key: Hashable) -> V | None:
        with self._lock:
            if key not in self._items:
                return None
            self._items.move_to_end(key)
            return self._items[key]

    def put(self, key: Hashable, value: V) -> None:
        with self._lock:
            self._items[key] = value
            self._items.move_to_end(key)
            while len(self._items) > self.size:
                self._items.popitem(last=False)

    def get_or_build(self, key: Hashable, build: Callable[[], V]) -> V:
        """The cached value, or ``build()`` stored (built outside the lock, so a slow build
        does not hold other readers up; two at once may both build, the last one is kept)."""
        found = self.get(key)
        if found is None:
            found = build()
            self.put(key, found)
        return found
