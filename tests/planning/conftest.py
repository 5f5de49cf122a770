"""A copy of the demo hospital (invented) with KV-SURG's model trained at the demo's last
morning, shared by the planning tests (read-only: tests must not write to it)."""

from __future__ import annotations

from collections.abc import Iterator

import pytest

from app.config import get_settings
from tests.web.served import DEMO_NOW, trained_copy

UNIT = "KV-SURG"


@pytest.fixture(scope="session")
def planning_db(demo_db: str, tmp_path_factory: pytest.TempPathFactory) -> str:
    return trained_copy(demo_db, tmp_path_factory.mktemp("planning"), (UNIT,))


@pytest.fixture(autouse=True)
def demo_morning(monkeypatch: pytest.MonkeyPatch) -> Iterator[None]:
    """Site zone UTC and "now" fixed at the demo's last morning (as the fixture trained)."""
    monkeypatch.setenv("MORROW_TIMEZONE", "UTC")
    monkeypatch.setenv("MORROW_NOW", DEMO_NOW.isoformat())
    get_settings.cache_clear()
    yield
    get_settings.cache_clear()
