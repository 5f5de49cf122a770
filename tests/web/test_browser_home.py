"""The hospital at a glance, the wall screen, night names and the charts, in a real browser
(Playwright driving Debian's Chromium, headless) against the demo with both units trained.

Outside references: the Gregorian calendar (Python's ``calendar``: Monday 30 November 2026,
the demo's replayed morning, is a Monday, so its coming night is "Mon night"); the forecast
API's own JSON (the data contract) for every figure a page shows; numpy's ``convolve`` for
the hospital total (the pmf of a sum of independent counts); Plotly's documented config and
mode-bar button names (plotly.js ``src/components/modebar/buttons.js``: "sendChartToCloud",
title "Share chart...", from memory, checked against the bundled file) for the toolbar.
Screenshots go to test-artifacts/.
"""

from __future__ import annotations

import calendar
import re
from typing import Any

import numpy as np
import pytest

from app.config import PROJECT_ROOT
from app.forecast.hospital_total import total_by_night
from tests.conftest import UTC_ZONE
from tests.web.served import Served
from tests.web.site_pages import signed_in_context

pytestmark = [pytest.mark.browser, pytest.mark.slow]

ARTIFACTS = PROJECT_ROOT / "test-artifacts"
UNITS = ("KV-CRIT", "KV-SURG")
NUMBER = re.compile(r"\d+")


def _page(chromium: object, site: Served, username: str = "manager", **options: Any):
    context = signed_in_context(chromium, site, username,
                                viewport=options.pop("viewport", {"width": 1600, "height": 900}),
                                **options)
    return context, context.new_page()


def _shot(page: Any, name: str) -> None:
    ARTIFACTS.mkdir(exist_ok=True)
    page.screenshot(path=str(ARTIFACTS / f"{name}.png"), full_page=True)


def _api(page: Any, site: Served, unit: str) -> dict[str, Any]:
    response = page.request.get(f"{site.base}/api/units/{unit}/forecast")
    assert response.status == 200, response.text()
    return response.json()


def _numbers(text: str) -> list[int]:
    return [int(v) for v in NUMBER.findall(text)]


def test_the_same_night_has_the_same_name_on_both_demo_units(chromium, site) -> None:
    assert calendar.weekday(2026, 11, 30) == calendar.MONDAY  # the demo's replayed morning
    context, page = _page(chromium, site)
    seen: dict[str, dict[str, Any]] = {}
    for unit in UNITS:
        page.goto(f"{site.base}/units/{unit}")
        page.wait_for_selector("#fan .main-svg")
        seen[unit] = {
            "tile": page.inner_text(".tonight-census .label"),
            "rows": page.locator("table.days td.night .night-name").all_inner_texts(),
            "labels": page.locator("table.days td.night .census-label").all_inner_texts(),
            "ticks": page.evaluate("document.getElementById('fan').layout.xaxis.ticktext"),
        }
        _shot(page, f"nights-{unit.lower()}")
    crit, surg = seen["KV-CRIT"], seen["KV-SURG"]
    days = ["Mon", "Tue", "Wed", "Thu", "Fri", "Sat", "Sun"]
    assert crit["rows"] == surg["rows"] == [f"{d} night" for d in days]
    assert "Mon night" in crit["tile"] and "Mon night" in surg["tile"]
    # The instants differ (KV-CRIT counts at 00:00, KV-SURG at 23:00); the names do not.
    assert "census Tue 00:00" in crit["tile"] and "census Mon 23:00" in surg["tile"]
    assert crit["labels"][4] == "4 Dec, census Sat 00:00"
    assert surg["labels"][4] == "4 Dec, census Fri 23:00"
    assert calendar.weekday(2026, 12, 4) == calendar.FRIDAY
    assert [t.split("<br>")[0] for t in crit["ticks"]] == [t.split("<br>")[0]
                                                           for t in surg["ticks"]]
    page.goto(site.base + "/")
    assert "(Mon night)" in page.inner_text("#units-table thead")
    context.close()


def _tile_numbers(page: Any) -> dict[str, Any]:
    return {"median": int(page.inner_text(".tonight-census .value")),
            "band80": _numbers(page.inner_text(".tonight-census .sub"))[:2],
            "p_tonight": page.inner_text(".risk-tonight .value .risk").strip(),
            "p_week": page.inner_text(".risk-week .value .risk").strip()}


def test_home_shows_every_units_tonight_figures_equal_to_its_unit_page(chromium, site) -> None:
    context, page = _page(chromium, site)
    unit_pages, forecasts = {}, {}
    for unit in UNITS:
        page.goto(f"{site.base}/units/{unit}")
        unit_pages[unit] = _tile_numbers(page)
        forecasts[unit] = _api(page, site, unit)
    page.goto(site.base + "/")
    page.wait_for_selector(".small-chart .main-svg")
    _shot(page, "home")
    for unit in UNITS:
        row = page.locator(f"#unit-{unit}")
        shown = {"median": int(row.locator(".tonight .median").inner_text()),
                 "band80": _numbers(row.locator(".tonight .band").inner_text()),
                 "p_tonight": row.locator(".p-tonight .risk").inner_text().strip(),
                 "p_week": row.locator(".p-week .risk").inner_text().strip()}
        assert shown == unit_pages[unit], unit
        tonight = forecasts[unit]["days"][0]["quantiles"]
        assert shown["median"] == tonight["0.5"]
        assert shown["band80"] == [tonight["0.1"], tonight["0.9"]]
        # One small chart per unit, drawn.
        assert page.locator(f"#chart-{unit} .main-svg").count() >= 1
    # The hospital total: the convolution of the units' pmfs for tonight (numpy), not the
    # sum of their medians. Where a unit lists patients passed on from the other
    # (``moved_in``, issue 16) each is counted once, so the total is app/forecast/
    # hospital_total.py's (checked against outside references in tests/forecast/); its mean
    # is checked by linearity in tests/web/test_browser_network.py.
    if any(d.get("moved_in") for u in UNITS for d in forecasts[u]["days"][:1]):
        tonight_total = total_by_night(forecasts, UTC_ZONE)[0]
        expected = [tonight_total.band80[0], tonight_total.median, tonight_total.band80[1]]
    else:
        pmfs = [np.asarray(forecasts[u]["days"][0]["pmf"]) for u in UNITS]
        cumulative = np.cumsum(np.convolve(pmfs[0], pmfs[1]))
        expected = [int(np.searchsorted(cumulative, q - 1e-12)) for q in (0.1, 0.5, 0.9)]
    total = page.locator("#hospital-total")
    assert int(total.locator(".tonight .median").inner_text()) == expected[1]
    assert _numbers(total.locator(".tonight .band").inner_text()) == [expected[0], expected[2]]
    assert "independent" in page.inner_text("#total-note")
    assert "at least one" in page.inner_text("#week-note")
    assert "warning level" in page.inner_text("#home-legend")
    context.close()


def test_wall_mode_is_large_refreshes_itself_and_shows_the_time(chromium, site) -> None:
    context, page = _page(chromium, site, viewport={"width": 1920, "height": 1080})
    answer = page.goto(site.base + "/wall?refresh=5")
    page.wait_for_selector(".small-chart .main-svg")
    _shot(page, "wall")
    assert answer is not None and answer.headers["refresh"] == "5"
    first = page.inner_text("#refreshed strong")
    assert re.fullmatch(r"\d\d:\d\d:\d\d", first)
    # Large type, the chart's text included (the home page's chart text is 12 px).
    table_px = page.evaluate(
        "parseFloat(getComputedStyle(document.querySelector('#units-table td')).fontSize)")
    tick_px = page.evaluate("parseFloat(getComputedStyle(document.querySelector("
                            "'.small-chart .xtick text')).fontSize)")
    assert table_px >= 24 and tick_px >= 20, (table_px, tick_px)
    # It reloads by itself within the interval, and says when.
    with page.expect_navigation(timeout=15_000):
        pass
    page.wait_for_selector("#refreshed strong")
    assert page.inner_text("#refreshed strong") != first
    assert page.locator("#stale").count() == 0  # the demo's census is fresh at its morning
    # An interval outside app/bounds.py is refused.
    assert page.goto(site.base + "/wall?refresh=1").status == 422
    context.close()


def _hover_texts(page: Any, index: int) -> list[str]:
    box = page.evaluate("""(i) => {
        const g = document.getElementById('fan'), L = g._fullLayout;
        const median = g.data.find(t => t.name === 'median');
        const r = g.getBoundingClientRect();
        return [r.left + L.margin.l + L.xaxis.d2p(median.x[i]),
                r.top + L.margin.t + L.yaxis.d2p(median.y[i])]; }""", index)
    page.mouse.move(box[0], box[1])
    # Wait until the hover shows this point (its median line names the night).
    page.wait_for_function("""(i) => {
        const g = document.getElementById('fan');
        const name = g.data.find(t => t.name === 'median').customdata[i];
        return Array.from(document.querySelectorAll('#fan .hoverlayer text'))
            .some(t => t.textContent.startsWith(name + ':')); }""", arg=index)
    return page.evaluate(
        "Array.from(document.querySelectorAll('#fan .hoverlayer text')).map(t => t.textContent)")


def test_the_charts_hover_lists_both_bounds_of_every_band(chromium, site) -> None:
    context, page = _page(chromium, site)
    page.goto(site.base + "/units/KV-SURG")
    page.wait_for_selector("#fan .main-svg")
    # The demo's ward admits its own emergencies up to one over its staffed beds and takes
    # critical care's step-downs only below them (app/demo/generate.py, "Bed pressure" and
    # "Step-down and exit block"): the ceiling note says what the model learnt of both.
    note = page.inner_text("#ceiling-note")
    assert "once it holds 1 patient more than its staffed beds" in note
    assert "passed on by other units wait there until it holds fewer than its staffed" in note
    forecast = _api(page, site, "KV-SURG")
    for index in (1, 5):  # tonight and Fri night
        texts = _hover_texts(page, index)
        q = forecast["days"][index - 1]["quantiles"]
        bands = {m.group(1): (int(m.group(2)), int(m.group(3)))
                 for t in texts if (m := re.fullmatch(r"(\d+)% band: (\d+) to (\d+)", t))}
        assert bands == {"95": (q["0.025"], q["0.975"]), "80": (q["0.1"], q["0.9"]),
                         "50": (q["0.25"], q["0.75"])}, texts
        assert any(t.endswith(f"median {q['0.5']}") and "night" in t for t in texts), texts
    _shot(page, "fan-hover")
    context.close()


CHART_PAGES = ("/", "/wall", "/units/KV-CRIT", "/units/KV-SURG",
               "/units/KV-CRIT/booking?planned_date=2026-12-02&specialty=cardiac-surgery&age=68",
               "/units/KV-CRIT/model")


def test_no_plotly_cloud_or_logo_buttons_on_any_page(chromium, site) -> None:
    context, page = _page(chromium, site)
    for path in CHART_PAGES:
        page.goto(site.base + path)
        page.wait_for_selector(".js-plotly-plot .main-svg", timeout=120_000)
        plots = page.locator(".js-plotly-plot").count()
        titles = page.evaluate("Array.from(document.querySelectorAll('.modebar-btn'))"
                               ".map(b => b.getAttribute('data-title') || '')")
        # Each chart keeps a toolbar (so this check sees one) without the cloud, share,
        # studio or logo buttons.
        assert titles.count("Download plot as a PNG") == plots, (path, titles)
        assert not [t for t in titles if re.search(r"cloud|share|studio|plotly|edit", t, re.I)]
        assert page.locator(".modebar-btn--logo, .modebar a[href], a[href*='plot.ly'], "
                            "a[href*='chart-studio']").count() == 0, path
    context.close()
