"""The page in a real browser: Playwright driving Debian's Chromium, headless.

Each test saves a screenshot under test-artifacts/ (kept by CI as an artefact)."""

from __future__ import annotations

import re
import shutil
from collections.abc import Iterator

import pytest
from sqlalchemy import func, select

from app.config import PROJECT_ROOT
from app.store import db
from app.store.models import Booking, ImportBatch, Stay
from tests.web.served import PASSWORD, Served, start, stop, trained_copy

pytestmark = [pytest.mark.browser, pytest.mark.slow]

CHROMIUM = shutil.which("chromium") or "/usr/bin/chromium"
ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
        "--disable-background-networking", "--disable-component-update", "--disable-sync"]
ARTIFACTS = PROJECT_ROOT / "test-artifacts"


@pytest.fixture(scope="module")
def served(demo_db: str, tmp_path_factory: pytest.TempPathFactory) -> Iterator[Served]:
    url = trained_copy(demo_db, tmp_path_factory.mktemp("browser"), ("KV-CRIT",))
    running = start(url)
    yield running
    stop(running)


def signed_in(browser: object, served: Served, username: str = "manager"):
    page = browser.new_page(viewport={"width": 1440, "height": 900})  # type: ignore[attr-defined]
    page.goto(served.base + "/signin")
    page.fill("input[name=username]", username)
    page.fill("input[name=password]", PASSWORD)
    page.click("button[type=submit]")
    page.wait_for_url(served.base + "/")
    return page


def shot(page: object, name: str) -> None:
    ARTIFACTS.mkdir(exist_ok=True)
    page.screenshot(path=str(ARTIFACTS / f"{name}.png"), full_page=True)  # type: ignore[attr-defined]


def test_unit_page_has_a_chart_with_data(browser, served) -> None:
    page = signed_in(browser, served)
    page.goto(served.base + "/units/KV-CRIT")
    page.wait_for_selector("#fan .main-svg")
    traces = page.evaluate("document.getElementById('fan').data.length")
    medians = page.evaluate(
        "document.getElementById('fan').data.find(t => t.name === 'median').y.length")
    assert traces >= 7 and medians == 8  # now + seven census nights
    assert "do not replace" in page.inner_text(".caution")
    rows = page.locator("#patients tbody tr").count()
    assert rows >= 5
    shot(page, "unit-page")


def test_entering_a_score_changes_that_patients_probability(browser, served) -> None:
    page = signed_in(browser, served, "nurse")
    page.goto(served.base + "/units/KV-CRIT")
    # The emergency patient with the lowest SOFA: the demo unit's tree splits emergency
    # admissions on SOFA, so a much worse score must change their chance.
    rows = page.locator("#patients tbody tr")
    cells = rows.evaluate_all(
        "rs => rs.map(r => [r.children[3].textContent, r.children[4].getAttribute('data-value')])")
    emergency = [(float(v), i) for i, (kind, v) in enumerate(cells)
                 if kind == "emergency" and float(v) >= 0]
    index = min(emergency)[1]
    row = rows.nth(index)
    stay_id = row.get_attribute("id").removeprefix("stay-")
    before = row.locator(".p-tonight").inner_text()
    row.locator("select").select_option("sofa")
    row.locator("input[name=value]").fill("17")
    row.locator("button").click()
    page.wait_for_url(re.compile(r".*entered=.*"))
    assert "recorded" in page.inner_text(f"#result-{stay_id}")  # the answer is at the row
    after = page.locator(f"#stay-{stay_id} .p-tonight").inner_text()
    shot(page, "score-entered")
    assert before != after, (before, after)
    assert "SOFA 17" in page.inner_text(f"#stay-{stay_id}")


def test_booking_check_answers_with_a_14_day_strip(browser, served) -> None:
    page = signed_in(browser, served, "scheduler")
    page.goto(served.base + "/units/KV-CRIT/booking")
    page.fill("#planned_date", "2026-12-02")
    page.fill("#specialty", "cardiac-surgery")
    page.fill("#age", "68")
    page.click(".booking-form button")
    page.wait_for_selector("#strip .main-svg")
    answer = page.inner_text(".answer")
    assert "Chance a bed is free" in answer and "%" in answer
    assert page.locator(".strip-table tbody tr").count() == 14  # tomorrow on
    shot(page, "booking-check")
    with db.session_scope(served.db_url) as session:
        before = session.scalar(select(func.count()).select_from(Booking))
    page.click("#ask-book")  # books only after the confirmation step
    page.click(".book-form button")
    page.wait_for_selector(".flash")
    assert "booked" in page.inner_text(".flash")
    with db.session_scope(served.db_url) as session:
        assert session.scalar(select(func.count()).select_from(Booking)) == before + 1


def test_bad_upload_lists_problems_by_line_and_stores_nothing(browser, served, tmp_path) -> None:
    bad = tmp_path / "stays.csv"
    bad.write_text("stay_id,unit,admitted_at,admission_type\n"
                   "S-new-1,KV-CRIT,2026-11-29T10:00,emergency\n"
                   "S-new-2,KV-CRIT,not-a-time,emergency\n"
                   "S-new-3,KV-CRIT,2026-11-29T11:00,sideways\n")
    with db.session_scope(served.db_url) as session:
        stays = session.scalar(select(func.count()).select_from(Stay))
        batches = session.scalar(select(func.count()).select_from(ImportBatch))
    page = signed_in(browser, served)
    page.goto(served.base + "/data")
    page.select_option("#kind", "stays")
    page.set_input_files("#file", str(bad))
    page.click("form[action='/data/upload'] button")
    page.wait_for_selector("table.problems")
    cells = page.locator("table.problems tbody tr").evaluate_all(
        "rs => rs.map(r => [r.children[0].textContent, r.children[1].textContent])")
    shot(page, "upload-refused")
    assert ["3", "admitted_at"] in cells and ["4", "admission_type"] in cells
    with db.session_scope(served.db_url) as session:
        assert session.scalar(select(func.count()).select_from(Stay)) == stays
        assert session.scalar(select(func.count()).select_from(ImportBatch)) == batches


def test_model_page_shows_the_tree(browser, served) -> None:
    page = signed_in(browser, served, "viewer")
    page.goto(served.base + "/units/KV-CRIT/model")
    assert page.locator("ul.tree li").count() >= 3
    assert page.locator("ul.tree li.leaf").count() >= 2
    page.wait_for_selector("#group-1 .main-svg")
    shot(page, "model-page")
