"""The planning page's section on units together, on the demo hospital (invented).

The figures it shows are the report of app/forecast/network_plan.py, checked against
queueing theory in tests/stats/test_network.py and on the command line in
tests/planning/test_plan_network.py; here: the page shows that report faithfully.
"""

from __future__ import annotations

import json
import re

import pytest
from fastapi.testclient import TestClient

from app.web.app import create_app
from tests.security.fixtures import signed_in_client
from tests.web.served import PASSWORD


@pytest.fixture(scope="module")
def client(network_db: str) -> TestClient:
    return signed_in_client(create_app(network_db), "viewer", PASSWORD)


def _figure(page: str) -> dict:
    found = re.search(r'<script type="application/json" id="together-chart-data">(.*?)</script>',
                      page, re.S)
    assert found is not None, "no figure of units together on the page"
    return json.loads(found.group(1))


def test_the_section_offers_the_other_units_without_running(client: TestClient) -> None:
    page = client.get("/units/KV-CRIT/planning")
    assert page.status_code == 200, page.text[:500]
    assert "Planning KV-CRIT together with another unit" in page.text
    assert '<option >KV-SURG</option>' in page.text or "<option>KV-SURG</option>" in page.text
    assert "together-chart-data" not in page.text


def test_two_more_ward_beds_are_plotted_with_intervals(client: TestClient) -> None:
    page = client.get("/units/KV-CRIT/planning?with_unit=KV-SURG&more_beds=2")
    assert page.status_code == 200, page.text[:800]
    figure = _figure(page.text)
    trace = next(t for t in figure["data"] if t["name"].startswith("KV-CRIT"))
    assert list(trace["x"]) == [0, 1, 2, 3, 4]
    means = list(trace["y"])
    assert means[0] > 0
    # Error bars: the interval around each mean, never below zero.
    for m, up, down in zip(means, trace["error_y"]["array"], trace["error_y"]["arrayminus"],
                           strict=True):
        assert up >= 0 and 0 <= down <= m + 1e-12
    assert means[2] <= means[0]
    assert "KV-CRIT → KV-SURG" in page.text
    assert "28 → 30" in page.text or re.search(r"\d+ → \d+</td>", page.text)
    # The caution stays on the page (base.html).
    assert "judgement" in page.text


@pytest.mark.parametrize(("query", "message"), [
    ("with_unit=KV-NONE", "choose a unit from the list"),
    ("with_unit=KV-SURG&more_beds=9", "choose from the list"),
    ("with_unit=KV-SURG&more_beds=60", "outside the allowed range"),
    ("with_unit=KV-SURG&more_in=KV-OTHER", "choose one of the two units"),
])
def test_bad_choices_are_refused_with_a_message(client: TestClient, query: str,
                                                message: str) -> None:
    page = client.get(f"/units/KV-CRIT/planning?{query}")
    assert page.status_code == 422
    assert message in page.text
