"""The in-process bounded cache (app/bounded_cache.py) keeps what Python's own
``functools.lru_cache`` keeps: the ``size`` most recently used keys. Reference: the standard
library's least-recently-used policy, replayed on the same sequence of keys."""

from __future__ import annotations

import functools
import random
from datetime import UTC, datetime, timedelta

from app import bounded_cache
from app.forecast import models
from app.store import db
from app.store.models import Unit


def test_keeps_the_keys_python_lru_cache_keeps() -> None:
    rng = random.Random(4)
    keys = [rng.randrange(12) for _ in range(400)]
    ours: bounded_cache.BoundedCache[int] = bounded_cache.BoundedCache(5)
    reference_built: list[int] = []
    ours_built: list[int] = []

    @functools.lru_cache(maxsize=5)
    def reference(key: int) -> int:
        reference_built.append(key)
        return key * key

    def build(key: int) -> int:
        ours_built.append(key)
        return key * key

    for key in keys:
        assert ours.get_or_build(key, lambda k=key: build(k)) == reference(key)
    # The same misses in the same order: the same keys were evicted at the same moments.
    assert ours_built == reference_built and len(ours_built) > 5
    assert reference.cache_info().currsize == len(ours._items) == 5


def test_parsed_models_are_kept_within_a_bound(db_url: str) -> None:
    # A server retrains units daily for months: the parsed payloads must not pile up.
    start = datetime(2026, 1, 1, tzinfo=UTC)
    with db.session_scope(db_url) as session:
        session.add(Unit(code="U1"))
        session.flush()
        for day in range(models.PAYLOADS_KEPT + 6):
            models.save_model(session, "U1", start + timedelta(days=day), {"day": day})
    with db.session_scope(db_url) as session:
        for day in range(models.PAYLOADS_KEPT + 6):
            found = models.newest_model(session, "U1", start + timedelta(days=day, hours=1))
            assert found is not None and found[2] == {"day": day}
    assert len(models._payloads._items) == models.PAYLOADS_KEPT
