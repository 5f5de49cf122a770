"""Every page of the site, for the checks that visit them all (accessibility, screenshots,
page latency): one list, so a new page is checked everywhere once it is added here.

The site runs over the demo hospital with both units trained (tests/web/served.py), the
clock fixed at the demo's last morning. Each page is visited as the roles that would open it.
"""

from __future__ import annotations

import os
import re
import shutil
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest

from app.config import PROJECT_ROOT
from tests.web.served import PASSWORD, Served

UNITS = ("KV-CRIT", "KV-SURG")
CHROMIUM = shutil.which("chromium") or "/usr/bin/chromium"
ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
        "--disable-background-networking", "--disable-component-update", "--disable-sync"]
SCREENSHOTS = PROJECT_ROOT / "test-artifacts" / "screenshots"


@dataclass(frozen=True)
class SitePage:
    name: str  # file-name safe
    path: str
    # A selector the page shows once drawn (charts are drawn after load by morrow.js).
    ready: str = "main"


def site_pages() -> list[SitePage]:
    """The pages a signed-in person can open (an admin-only page answers others with its
    own 403 page, which is checked too)."""
    pages = [SitePage("home", "/"), SitePage("data", "/data"),
             SitePage("people", "/people"), SitePage("audit", "/audit"),
             SitePage("not-found", "/units/NOPE")]
    if (PROJECT_ROOT / "templates" / "wall.html").exists():
        pages.append(SitePage("wall", "/wall"))
    for unit in UNITS:
        slug = unit.lower()
        pages += [
            SitePage(f"{slug}-unit", f"/units/{unit}", "#fan .main-svg"),
            SitePage(f"{slug}-booking", f"/units/{unit}/booking"),
            SitePage(f"{slug}-model", f"/units/{unit}/model"),
            SitePage(f"{slug}-training", f"/units/{unit}/training"),
            SitePage(f"{slug}-planning", f"/units/{unit}/planning", "#curve .main-svg"),
        ]
    return pages


def require_chromium() -> None:
    if not Path(CHROMIUM).exists():
        if os.environ.get("CI"):
            pytest.fail("chromium is not installed; .ci/run installs Debian's chromium")
        pytest.skip("chromium is not installed here (apt-get install chromium)")


def launched() -> Iterator[object]:
    """Debian's Chromium, headless, through Playwright."""
    require_chromium()
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        instance = p.chromium.launch(executable_path=CHROMIUM, args=ARGS)
        yield instance
        instance.close()


def signed_in_context(browser: object, served: Served, username: str, **options: object):
    """A browser context (its own cookies) signed in as ``username``."""
    context = browser.new_context(**options)  # type: ignore[attr-defined]
    page = context.new_page()
    page.goto(served.base + "/signin")
    page.fill("input[name=username]", username)
    page.fill("input[name=password]", PASSWORD)
    page.click("button[type=submit]")
    page.wait_for_url(re.compile(re.escape(served.base) + r"/(\?.*)?$"))
    page.close()
    return context


def visit(page: object, served: Served, site_page: SitePage) -> int:
    """Open the page and wait until it is drawn; its HTTP status."""
    response = page.goto(served.base + site_page.path)  # type: ignore[attr-defined]
    status = response.status if response is not None else 0
    if status == 200:
        page.wait_for_selector(site_page.ready, timeout=120_000)  # type: ignore[attr-defined]
    else:
        page.wait_for_load_state("load")  # type: ignore[attr-defined]
    return status
