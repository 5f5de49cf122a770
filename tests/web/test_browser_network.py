"""The hospital as a network on the pages, in a real browser (Playwright driving Debian's
Chromium, headless): the ward's expected transfers in, the critical-care unit's patients
waiting to step down, and the hospital total each night with its 80% band.

The server runs over a copy of the demo hospital (tests/web/served.py) in which one current
KV-CRIT patient is flagged fit for discharge at a time set here in the database; where the
demo has no step-downs to KV-SURG yet (before issue 16's demo), the copy's KV-CRIT stays that
went to a ward are marked as gone to KV-SURG so that routing has something to learn.

Outside references: the forecast API's own JSON (DATA_CONTRACT.md, with issue 16's
``transfers_in``: transfers are counted inside ``components["emergency"]``) for every figure
the pages show; the flag's time as stored in the database (not the page) for the wait;
axe-core (bundled by axe-playwright-python) for accessibility, no serious or critical
violation, as tests/web/test_accessibility.py.
"""

from __future__ import annotations

import re
import shutil
from collections.abc import Iterator
from datetime import timedelta
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import func, select, update

from app.config import PROJECT_ROOT
from app.forecast.hospital_total import total_by_night
from app.forecast.service import model_for
from app.store import db, repo
from app.store.models import Observation, Stay
from tests.conftest import UTC_ZONE
from tests.web.served import DEMO_NOW, Served, start, stop, trained_copy
from tests.web.site_pages import UNITS, signed_in_context

pytestmark = [pytest.mark.browser, pytest.mark.slow]

FLAG = "fit_for_discharge"
ARTIFACTS = PROJECT_ROOT / "test-artifacts"
# The flag set here: 30 h 20 min before the demo's morning, so the page reads "30 hours".
FLAGGED_BEFORE = timedelta(hours=30, minutes=20)


def _flag_a_patient(url: str) -> tuple[str, Any]:
    """Set fit_for_discharge = 1 on a KV-CRIT patient in the unit at the demo's morning whose
    flag does not already stand; return the stay and the flag's stored time."""
    flagged_at = DEMO_NOW - FLAGGED_BEFORE
    with db.session_scope(url) as session:
        current = session.scalars(
            select(Stay.stay_id).where(
                Stay.unit == "KV-CRIT", Stay.admitted_at < flagged_at - timedelta(hours=6),
                Stay.discharged_at.is_(None) | (Stay.discharged_at > DEMO_NOW))
            .order_by(Stay.admitted_at, Stay.stay_id)).all()
        for stay_id in current:
            # No flag entry of this stay from flagged_at on; its latest before is not 1.
            entries = session.execute(
                select(Observation.observed_at, Observation.value)
                .where(Observation.stay_id == stay_id, Observation.name == FLAG,
                       Observation.recorded_at <= DEMO_NOW)
                .order_by(Observation.observed_at, Observation.recorded_at,
                          Observation.revision)).all()
            if entries and (entries[-1][1] == 1.0 or entries[-1][0] >= flagged_at):
                continue
            session.add(Observation(stay_id=stay_id, observed_at=flagged_at, name=FLAG,
                                    value=1.0, recorded_at=flagged_at))
            session.flush()
            stored = session.scalar(select(Observation.observed_at).where(
                Observation.stay_id == stay_id, Observation.name == FLAG,
                Observation.value == 1.0).order_by(Observation.observed_at.desc()))
            return stay_id, stored
    raise AssertionError("no KV-CRIT patient to flag at the demo's morning")


def _with_step_downs(url: str) -> None:
    """Step-downs KV-CRIT -> KV-SURG in the history, when the demo has none yet."""
    with db.session_scope(url) as session:
        moved = session.scalar(select(func.count()).select_from(Stay).where(
            Stay.unit == "KV-CRIT", Stay.to_unit == "KV-SURG"))
        if not moved:
            session.execute(update(Stay).where(Stay.unit == "KV-CRIT", Stay.outcome == "ward")
                            .values(to_unit="KV-SURG"))


@pytest.fixture(scope="module")
def network(demo_db: str, tmp_path_factory: pytest.TempPathFactory
            ) -> Iterator[tuple[Served, str, Any]]:
    folder = tmp_path_factory.mktemp("network")
    path = folder / "network-source.db"
    shutil.copy(demo_db.removeprefix("sqlite:///"), path)
    source = f"sqlite:///{path}"
    _with_step_downs(source)
    stay_id, flagged_at = _flag_a_patient(source)
    db.release_engine(source)
    url = trained_copy(source, Path(folder), UNITS)
    running = start(url)
    yield running, stay_id, flagged_at
    stop(running)


def _page(chromium: object, site: Served) -> tuple[Any, Any]:
    context = signed_in_context(chromium, site, "manager",
                                viewport={"width": 1600, "height": 1000})
    return context, context.new_page()


def _shot(page: Any, name: str, selector: str) -> None:
    ARTIFACTS.mkdir(exist_ok=True)
    page.locator(selector).screenshot(path=str(ARTIFACTS / f"{name}.png"))


def _api(page: Any, site: Served, unit: str) -> dict[str, Any]:
    response = page.request.get(f"{site.base}/api/units/{unit}/forecast")
    assert response.status == 200, response.text()
    return response.json()


def _cells(page: Any, row: str) -> list[str]:
    return [t.strip() for t in page.locator(f"#transfers-in {row} td").all_inner_texts()]


def test_the_ward_page_splits_newcomers_into_transfers_emergency_and_booked(
        chromium, network) -> None:
    site, _, _ = network
    context, page = _page(chromium, site)
    forecast = _api(page, site, "KV-SURG")
    days = forecast["days"]
    # Issue 16, helper R: the ward's forecast names the patients expected from KV-CRIT.
    assert all("transfers_in" in d for d in days), "the forecast JSON has no transfers_in"
    assert any(d["transfers_in"].get("KV-CRIT", 0.0) > 0 for d in days), days[0]
    page.goto(f"{site.base}/units/KV-SURG")
    page.wait_for_selector("#transfers-in table")
    one = "{:.1f}".format
    moved = [d["transfers_in"].get("KV-CRIT", 0.0) for d in days]
    assert _cells(page, "tr.from-unit[data-unit='KV-CRIT']") == [one(v) for v in moved]
    # Emergency (other) = emergency - all transfers in; booked = the elective component.
    other = [max(d["components"]["emergency"] - sum(d["transfers_in"].values()), 0.0)
             for d in days]
    assert _cells(page, "tr.emergency-other") == [one(v) for v in other]
    assert _cells(page, "tr.booked") == [one(d["components"]["elective"]) for d in days]
    # The foot adds the lines shown (the emergency and elective components, by interface 3).
    total = [o + d["components"]["elective"] + sum(d["transfers_in"].values())
             for o, d in zip(other, days, strict=True)]
    assert _cells(page, "tr.newcomers-total") == [one(v) for v in total]
    # Row headers name the source in words: no colour carries the meaning.
    heads = page.locator("#transfers-in tbody th[scope=row]").all_inner_texts()
    assert "Transfers from KV-CRIT" in heads and "Booked" in heads
    _shot(page, "network-transfers-in", "#transfers-in")
    tonight = page.inner_text("#transfers-tonight")
    assert f"{one(moved[0])} moved here from KV-CRIT" in tonight
    context.close()


def test_the_critical_care_page_lists_the_flagged_patient_and_its_wait(
        chromium, network) -> None:
    site, stay_id, flagged_at = network
    context, page = _page(chromium, site)
    page.goto(f"{site.base}/units/KV-CRIT")
    page.wait_for_selector("#step-down")
    row = page.locator(f"#waiting-{stay_id}")
    assert row.count() == 1
    # The wait from the flag's time as stored in the database to the page's "now".
    hours = (DEMO_NOW - flagged_at).total_seconds() / 3600
    assert hours == pytest.approx(30 + 20 / 60)
    assert float(row.get_attribute("data-hours")) == pytest.approx(hours, abs=0.01)
    assert row.locator(".waited").inner_text().strip() == f"{int(hours)} hours"
    with db.session_scope(site.db_url) as session:
        bed = repo.latest_beds(session, "KV-CRIT", [stay_id]).get(stay_id)
    assert row.locator("td").first.inner_text().strip() == (bed or "–")
    assert row.locator(".destination").inner_text().strip() not in ("", "not known")
    # Longest wait first.
    waits = [float(v) for v in page.locator("#step-down-list tbody tr").evaluate_all(
        "rows => rows.map(r => r.dataset.hours)")]
    assert waits == sorted(waits, reverse=True)
    _shot(page, "network-step-down", "#step-down")
    sentence = page.inner_text("#step-down-sentence")
    assert "exit block" in sentence and re.match(rf"{len(waits)} patients? (is|are)", sentence)
    headers = page.locator("#step-down-list thead th[scope=col]").all_inner_texts()
    assert headers[:4] == ["Bed", "Stay", "Fit since", "Waiting"]
    # The learnt exit block, in words, with the number of waits it stands on (the model's).
    with db.session_scope(site.db_url) as session:
        learnt = model_for(session, "KV-CRIT", DEMO_NOW).payload["exit_block"]["KV-SURG"]
    held = page.inner_text("#held-back-KV-SURG")
    assert f"({learnt['waits']} patients fit to move to KV-SURG)" in held and "while it was full" in held
    context.close()


def test_home_shows_the_hospital_total_each_night_with_its_band(chromium, network) -> None:
    site, _, _ = network
    context, page = _page(chromium, site)
    forecasts = {u: _api(page, site, u) for u in UNITS}
    page.goto(site.base + "/")
    page.wait_for_selector("#hospital-nights table")
    _shot(page, "network-hospital-nights", "#hospital-nights")
    expected = total_by_night(forecasts, UTC_ZONE)
    rows = page.locator("#hospital-nights tbody tr")
    assert rows.count() == len(expected) == 7
    for i, night in enumerate(expected):
        row = rows.nth(i)
        assert row.locator(".night-name").inner_text() == night.night.name
        assert int(row.locator(".median").inner_text()) == night.median
        low, high = (int(v) for v in re.findall(r"\d+", row.locator(".band").inner_text()))
        assert (low, high) == night.band80 and low <= night.median <= high
    # Tonight's row is the table foot's total.
    foot = page.locator("#hospital-total .tonight")
    assert int(foot.locator(".median").inner_text()) == expected[0].median
    assert "counted once" in page.inner_text("#counted-once")
    context.close()


@pytest.mark.parametrize("unit", UNITS)
def test_the_unit_pages_with_the_network_panels_pass_axe(chromium, network, unit) -> None:
    from axe_playwright_python.sync_playwright import Axe

    site, _, _ = network
    context, page = _page(chromium, site)
    page.goto(f"{site.base}/units/{unit}")
    page.wait_for_selector("#fan .main-svg", timeout=120_000)
    panel = "#step-down" if unit == "KV-CRIT" else "#transfers-in"
    assert page.locator(panel).count() == 1  # the panel under test is on the page
    results = Axe().run(page)
    context.close()
    assert results.response.get("testEngine", {}).get("name") == "axe-core"
    blocking = [f"{v['id']} ({v['impact']}): {v['help']}"
                for v in results.response["violations"] if v["impact"] in ("serious",
                                                                           "critical")]
    assert not blocking, "\n".join(blocking)


def test_the_wards_transfers_are_part_of_its_emergency_component(chromium, network) -> None:
    """Issue 16's agreed forecast JSON: transfers_in are counted inside the emergency
    component, so "emergency (other)" is never below zero (also with arrivals turned away
    at the ceiling)."""
    site, _, _ = network
    context, page = _page(chromium, site)
    days = _api(page, site, "KV-SURG")["days"]
    context.close()
    short = [(d["date"], d["components"]["emergency"], sum(d["transfers_in"].values()))
             for d in days
             if d["components"]["emergency"] < sum(d["transfers_in"].values()) - 1e-9]
    assert not short, short


def test_the_hospital_totals_mean_is_the_sum_of_the_units_means(chromium, network) -> None:
    """Linearity of expectation: the mean of a sum is the sum of the means, whatever the
    dependence between the units (any probability text; from memory: Feller, An Introduction to
    Probability Theory and Its Applications, vol. 1, 3rd ed., IX.2)."""
    site, _, _ = network
    context, page = _page(chromium, site)
    forecasts = {u: _api(page, site, u) for u in UNITS}
    context.close()
    for k, night in enumerate(total_by_night(forecasts, UTC_ZONE)):
        units_mean = sum(forecasts[u]["days"][k]["mean"] for u in UNITS)
        assert night.mean == pytest.approx(units_mean, abs=0.05), night.night.name
