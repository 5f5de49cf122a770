"""Score entry, errors as pages and the audit trail in a real browser (issue 14, items 5, 7, 8).

Playwright drives Debian's Chromium against a served demo (tests/web/served.py). The ranges
checked are the published ones: SOFA 0-24 (Vincent et al., Intensive Care Med 1996), as
DATA_CONTRACT.md states them. Every stored result is read back from the database, not from
the page alone. Screenshots go to test-artifacts/.
"""

from __future__ import annotations

import re
from collections.abc import Iterator

import pytest
from sqlalchemy import select

from app.store import db
from app.store.models import AuditEvent, Observation
from tests.web.served import Served, start, stop, trained_copy
from tests.web.test_browser import shot, signed_in

pytestmark = [pytest.mark.browser, pytest.mark.slow]

UNIT = "KV-CRIT"


@pytest.fixture(scope="module")
def served(demo_db: str, tmp_path_factory: pytest.TempPathFactory) -> Iterator[Served]:
    url = trained_copy(demo_db, tmp_path_factory.mktemp("scores"), (UNIT,))
    running = start(url)
    yield running
    stop(running)


def _rows(served: Served, stay_id: str) -> list[tuple[str, float, bool]]:
    """The stored sofa rows of a stay, in the order entered: (observed_at, value, withdrawn)."""
    with db.session_scope(served.db_url) as session:
        rows = session.execute(select(Observation.observed_at, Observation.value,
                                      Observation.withdrawn)
                               .where(Observation.stay_id == stay_id, Observation.name == "sofa")
                               .order_by(Observation.recorded_at, Observation.revision)).all()
    return [(str(o), float(v), bool(w)) for o, v, w in rows]


def _patient_with_bed(page) -> tuple[str, str]:
    """A row's stay id and bed (the demo's census gives every patient a bed)."""
    row = page.locator("#patients tbody tr").first
    stay_id = row.get_attribute("id").removeprefix("stay-")
    bed = row.locator("td").first.inner_text().strip()
    assert bed, "the demo's census names a bed for every patient"
    return stay_id, bed


def _latest_score_cell(page, stay_id: str) -> str:
    return page.locator(f"#stay-{stay_id} td").nth(4).inner_text()


def test_a_refused_score_shows_at_the_row_keeps_the_value_and_stores_nothing(
        browser, served) -> None:
    page = signed_in(browser, served, "nurse")
    page.goto(f"{served.base}/units/{UNIT}")
    stay_id, bed = _patient_with_bed(page)
    before = _rows(served, stay_id)
    row = page.locator(f"#stay-{stay_id}")
    row.locator("select[name=name]").select_option("sofa")
    row.locator("input[name=value]").fill("25")  # SOFA's published range ends at 24
    row.locator("button[type=submit]").click()
    page.wait_for_url(re.compile(r".*outcome=refused.*"))
    answer = page.locator(f"#result-{stay_id}")
    text = answer.inner_text()
    assert "SOFA must be a whole number from 0 to 24" in text, text
    assert f"bed {bed}" in text and stay_id not in text  # the bed, not the stay id
    assert answer.get_attribute("role") == "alert"
    assert "refused" in (answer.get_attribute("class") or "")
    # The typed value is still in the box, marked invalid.
    value_box = page.locator(f"#stay-{stay_id} input[name=value]")
    assert value_box.input_value() == "25"
    assert value_box.get_attribute("aria-invalid") == "true"
    # The answer is read out at once: the focus is on it.
    assert page.evaluate("document.activeElement.id") == f"result-{stay_id}"
    refused_colour = answer.evaluate("e => getComputedStyle(e).backgroundColor")
    shot(page, "score-refused-at-row")
    assert _rows(served, stay_id) == before  # nothing stored

    # A recorded value, for contrast: another look, stored once.
    page.locator(f"#stay-{stay_id} input[name=value]").fill("7")
    page.locator(f"#stay-{stay_id} button[type=submit]").click()
    page.wait_for_url(re.compile(r".*outcome=recorded.*"))
    answer = page.locator(f"#result-{stay_id}")
    assert f"SOFA 7 recorded for bed {bed}" in answer.inner_text()
    assert answer.get_attribute("role") == "status"
    assert answer.evaluate("e => getComputedStyle(e).backgroundColor") != refused_colour
    assert page.locator(f"#stay-{stay_id} input[name=value]").input_value() == ""
    assert "SOFA 7" in _latest_score_cell(page, stay_id)
    shot(page, "score-recorded-at-row")
    after = _rows(served, stay_id)
    assert after[:-1] == before and after[-1][1:] == (7.0, False)


def test_a_correction_and_a_withdrawal_are_new_rows_and_move_the_latest_value(
        browser, served) -> None:
    page = signed_in(browser, served, "nurse")
    page.goto(f"{served.base}/units/{UNIT}")
    row = page.locator("#patients tbody tr").nth(1)
    stay_id = row.get_attribute("id").removeprefix("stay-")
    earlier = _latest_score_cell(page, stay_id)
    row.locator("select[name=name]").select_option("sofa")
    row.locator("input[name=value]").fill("11")
    row.locator("button[type=submit]").click()
    page.wait_for_url(re.compile(r".*outcome=recorded.*"))
    assert "SOFA 11" in _latest_score_cell(page, stay_id)
    stored = len(_rows(served, stay_id))

    # Correct it on the patient's score history page.
    page.click(f"#stay-{stay_id} a.score-history-link")
    page.wait_for_url(re.compile(rf".*/stays/{stay_id}/scores"))
    assert "do not replace" in page.inner_text(".caution")
    first = page.locator("table.score-history tbody tr").first
    assert "SOFA (0–24)" in first.inner_text()
    first.locator("input[name=value]").fill("9")
    first.locator("form[action$='/scores'] button").click()
    page.wait_for_url(re.compile(r".*outcome=recorded.*"))
    assert "corrects 11" in page.inner_text(f"#result-{stay_id}")
    assert "SOFA 9" in _latest_score_cell(page, stay_id)
    rows = _rows(served, stay_id)
    assert len(rows) == stored + 1 and rows[-2][1] == 11.0 and rows[-1][1:] == (9.0, False)
    assert rows[-1][0] == rows[-2][0]  # the same observation time: a correction, both kept

    # Withdraw it: a third row, the value no longer counts and the earlier latest is back.
    page.click(f"#stay-{stay_id} a.score-history-link")
    page.locator("table.score-history tbody tr").first.locator(
        ".withdraw-form button").click()
    page.wait_for_url(re.compile(r".*outcome=recorded.*"))
    assert "withdrawn" in page.inner_text(f"#result-{stay_id}")
    rows = _rows(served, stay_id)
    assert len(rows) == stored + 2 and rows[-1][1:] == (9.0, True)
    assert _latest_score_cell(page, stay_id) == earlier  # the forecast's latest value
    page.click(f"#stay-{stay_id} a.score-history-link")
    history = page.locator("table.score-history tbody tr").first.inner_text()
    assert "withdrawn" in history and "corrected to 9" in history and "withdrew 9" in history
    shot(page, "score-history")
    with db.session_scope(served.db_url) as session:
        actions = session.scalars(select(AuditEvent.action).where(
            AuditEvent.entity == "observation",
            AuditEvent.entity_id.startswith(f"{stay_id} sofa"))
            .order_by(AuditEvent.id)).all()
    assert actions[-3:] == ["insert", "correct", "withdraw"]


def test_the_audit_filter_by_person_works_from_the_form(browser, served) -> None:
    nurse = signed_in(browser, served, "nurse")
    nurse.goto(f"{served.base}/units/{UNIT}")
    row = nurse.locator("#patients tbody tr").nth(2)
    stay_id = row.get_attribute("id").removeprefix("stay-")
    bed = row.locator("td").first.inner_text().strip()
    row.locator("select[name=name]").select_option("sofa")
    row.locator("input[name=value]").fill("5")
    row.locator("button[type=submit]").click()
    nurse.wait_for_url(re.compile(r".*outcome=recorded.*"))

    page = signed_in(browser, served, "manager")
    page.goto(f"{served.base}/audit")
    page.fill("input[name=who]", "nurse")  # every other field left empty
    page.click("form.filters button[type=submit]")
    page.wait_for_url(re.compile(r".*who=nurse.*"))
    assert page.locator("p.problem").count() == 0
    who = page.locator("table.audit tbody tr td:nth-child(2)").all_inner_texts()
    assert who and set(who) == {"nurse"}
    changes = page.locator("table.audit td.change").all_inner_texts()
    assert f"recorded SOFA 5 for bed {bed} (stay {stay_id}), observed Mon 30 Nov 2026 08:00" \
        in changes, changes[:5]
    # Times on the site's clock (UTC for the served demo), not raw ISO text.
    assert not re.search(r"\d{4}-\d\d-\d\dT", page.locator("table.audit td").first.inner_text())

    # The record kind "observation" finds the score entries, alone or with the person.
    page.select_option("select[name=entity]", "observation")
    page.click("form.filters button[type=submit]")
    page.wait_for_url(re.compile(r".*entity=observation.*"))
    kinds = page.locator("table.audit tbody tr td:nth-child(4)").all_inner_texts()
    assert kinds and all(k.startswith("observation ") for k in kinds)
    shot(page, "audit-filtered")

    # Only "From" filled works too; an impossible batch number is a page, not JSON.
    page.goto(f"{served.base}/audit?who=&entity=&entity_id=&action=&batch=&since=2026-11-01"
              "&until=")
    assert page.locator("table.audit tbody tr").count() > 0
    answer = page.goto(f"{served.base}/audit?who=nurse&batch=abc")
    assert answer.status == 422 and "text/html" in answer.headers["content-type"]
    assert "not a batch number" in page.inner_text("p.problem")


def test_a_404_page_has_the_menu_and_the_caution(browser, served) -> None:
    page = signed_in(browser, served, "manager")
    answer = page.goto(f"{served.base}/units/NOPE")
    assert answer.status == 404 and "text/html" in answer.headers["content-type"]
    assert "There is no unit NOPE" in page.inner_text("main") or "NOPE" in page.inner_text("main")
    assert page.locator("nav.main-nav a[href='/']").count() == 1
    assert "do not replace" in page.inner_text(".caution")
    shot(page, "error-404")
    answer = page.goto(f"{served.base}/no/such/page")
    assert answer.status == 404 and page.locator("nav.main-nav").count() == 1
    # The API keeps its JSON.
    api = page.request.get(f"{served.base}/api/units/NOPE/forecast")
    assert api.status == 404 and api.json()["detail"] == "unit NOPE is not known"


def test_a_viewer_sees_no_score_form_and_is_refused_with_a_page(browser, served) -> None:
    page = signed_in(browser, served, "viewer")
    page.goto(f"{served.base}/units/{UNIT}")
    assert page.locator("#patients tbody tr").count() >= 5
    assert page.locator("form.score-form").count() == 0
    assert page.locator("a.score-history-link").count() >= 5  # the history is for everyone
    shot(page, "unit-as-viewer")
    # Sent anyway (a stale page, say): a 403 page with the menu and the caution.
    token = page.evaluate("document.querySelector('input[name=csrf_token]').value")
    answer = page.request.post(f"{served.base}/units/{UNIT}/scores", form={
        "csrf_token": token, "stay_id": "S-x", "name": "sofa", "value": "3"})
    assert answer.status == 403 and "text/html" in answer.headers["content-type"]
    body = answer.text()
    assert "main-nav" in body and "do not replace" in body and "Not allowed" in body


def test_a_422_on_a_form_is_a_page_not_json(browser, served) -> None:
    page = signed_in(browser, served, "nurse")
    page.goto(f"{served.base}/units/{UNIT}")
    stay_id = page.locator("#patients tbody tr").first.get_attribute("id").removeprefix("stay-")
    # A form that lost a field on the way (an old page, an edited request): the route's
    # validation answers 422.
    before = _rows(served, stay_id)
    page.evaluate("id => document.querySelector(`#stay-${id} input[name=stay_id]`).remove()",
                  stay_id)
    page.locator(f"#stay-{stay_id} input[name=value]").fill("3")
    with page.expect_navigation() as navigation:
        page.locator(f"#stay-{stay_id} button[type=submit]").click()
    answer = navigation.value
    assert answer is not None and answer.status == 422
    assert "text/html" in answer.headers["content-type"]
    text = page.inner_text("main")
    assert "patient is missing" in text and "{" not in text
    assert page.locator("nav.main-nav").count() == 1 and "do not replace" in page.inner_text(
        ".caution")
    shot(page, "error-422")
    assert _rows(served, stay_id) == before  # nothing stored
