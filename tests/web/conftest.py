"""Fixtures shared by the browser tests: one server over the demo hospital with both units
trained (for the checks that visit every page, tests/web/site_pages.py), and one browser for
the whole run."""

from __future__ import annotations

from collections.abc import Iterator

import pytest

from tests.web.served import Served, start, stop, trained_copy
from tests.web.site_pages import UNITS, launched


@pytest.fixture(scope="session")
def site(demo_db: str, tmp_path_factory: pytest.TempPathFactory) -> Iterator[Served]:
    url = trained_copy(demo_db, tmp_path_factory.mktemp("site"), UNITS)
    running = start(url)
    yield running
    stop(running)


@pytest.fixture(scope="session")
def chromium() -> Iterator[object]:
    yield from launched()


@pytest.fixture(scope="session")
def browser(chromium: object) -> object:
    """The same browser under the name the older browser tests use: Playwright's sync API
    allows one running instance per process, so every browser test shares this one."""
    return chromium
