"""The planning page in a real browser (Playwright driving Debian's Chromium, headless).

Saves test-artifacts/planning-page.png. The page's figures are drawn by static/morrow.js from
the JSON the server placed in the page (no inline script: the CSP forbids it)."""

from __future__ import annotations

from collections.abc import Iterator

import pytest

from tests.web.served import Served, start, stop, trained_copy
from tests.web.test_browser import shot, signed_in

pytestmark = [pytest.mark.browser, pytest.mark.slow]


@pytest.fixture(scope="module")
def served(demo_db: str, tmp_path_factory: pytest.TempPathFactory) -> Iterator[Served]:
    url = trained_copy(demo_db, tmp_path_factory.mktemp("browser-planning"), ("KV-CRIT",))
    running = start(url)
    yield running
    stop(running)


def test_planning_page_draws_the_curve_and_two_scenarios(browser, served) -> None:
    page = signed_in(browser, served, "manager")
    console: list[str] = []
    page.on("console", lambda message: console.append(message.text))
    page.goto(served.base + "/units/KV-CRIT")
    page.click("text=Plan beds")
    page.wait_for_url(served.base + "/units/KV-CRIT/planning")
    page.wait_for_selector("#curve .main-svg")
    page.wait_for_selector("#scenarios .main-svg")
    simulated = page.evaluate(
        "document.getElementById('curve').data.find(t => t.name === 'simulated').y")
    assert len(simulated) >= 10 and simulated[0] > simulated[-1] >= 0
    points = page.evaluate("document.getElementById('curve').querySelectorAll"
                           "('.scatterlayer .point').length")
    assert points >= 2 * len(simulated)  # both panels drew their markers
    labels = page.evaluate("document.getElementById('scenarios').data"
                           ".filter(t => (t.xaxis || 'x') === 'x').flatMap(t => t.y)")
    assert set(labels) == {"current state", "10% more emergency admissions",
                           "stays in G1 20% shorter"}
    assert "do not replace" in page.inner_text(".caution")
    # Every plot's colours are valid: Plotly logs this for a colour it cannot read.
    assert not [m for m in console if "Invalid color" in m], console
    shot(page, "planning-page")
