"""The planning page, signed in, on the demo hospital (invented) with a trained model.

Outside reference: the Erlang B formula as a truncated Poisson distribution (scipy.stats,
independent of app.stats.erlang) for the plotted Erlang curve.
"""

from __future__ import annotations

import html
import json
import re

import pytest
from fastapi.testclient import TestClient
from scipy import stats

from app.web.app import create_app
from tests.planning.conftest import UNIT
from tests.security.fixtures import acting_as, signed_in_client
from tests.web.served import PASSWORD

FORM = ("target=5&years=1&replications=10&s1=arrivals&s1_type=emergency&s1_arrivals=10"
        "&s2=stay&s2_group=G1&s2_stay=-20&s3=share&s3_share=30&s3_from=G1&s3_to=G2")


def _figure(page: str, name: str) -> dict:
    found = re.search(rf'<script type="application/json" id="{name}-data">(.*?)</script>', page,
                      re.S)
    assert found is not None, f"no figure {name} on the page"
    return json.loads(found.group(1))


@pytest.fixture(scope="module")
def client(planning_db: str) -> TestClient:
    return signed_in_client(create_app(planning_db), "viewer", PASSWORD)


def test_curve_and_scenarios_are_plotted_for_a_viewer(client: TestClient) -> None:
    page = client.get(f"/units/{UNIT}/planning")
    assert page.status_code == 200, page.text[:500]
    assert "do not replace" in page.text  # the caution, from base.html
    curve = {t.get("name"): t for t in _figure(page.text, "curve")["data"]}
    simulated, erlang = curve["simulated"], curve["Erlang loss formula"]
    beds = simulated["x"]
    assert len(beds) >= 10 and beds == sorted(beds)
    assert all(0 <= y <= 100 for y in simulated["y"]) and simulated["y"][0] > simulated["y"][-1]
    load = float(re.search(r'Demand \(offered load\)</span>\s*<span class="value">([\d.]+)',
                           page.text).group(1))
    for b, y in zip(beds, erlang["y"], strict=True):
        # Plotted Erlang B against scipy's truncated Poisson at the page's (rounded) load.
        reference = 100 * stats.poisson.pmf(b, load) / stats.poisson.cdf(b, load)
        assert y == pytest.approx(reference, abs=1.0)
    assert "target 5%" in curve and "mean occupancy" in curve
    needed = int(re.search(r'find no bed</span>\s*<span class="value">(\d+)', page.text).group(1))
    assert needed in beds
    points = _figure(page.text, "scenarios")["data"]
    left = [t for t in points if t.get("xaxis", "x") == "x"]  # the no-bed panel
    labels = [y for t in left for y in t["y"]]
    # Default scenarios: 10% more emergency admissions, the longest group's stays 20% shorter.
    assert set(labels) == {"current state", "10% more emergency admissions",
                           "stays in G1 20% shorter"}
    xs = [x for t in left for x in t["x"]]
    assert len(xs) == 3 and all(0 <= x <= 100 for x in xs)
    # Each error bar has one colour, its markers' (a list made the browser draw them black:
    # "Invalid color specifier").
    assert all(isinstance(t["error_x"]["color"], str)
               and t["error_x"]["color"] == t["marker"]["color"] for t in points)
    assert "1 year" in page.text and "10 replications" in page.text  # the settings used


def test_form_chooses_target_and_three_scenarios(client: TestClient) -> None:
    page = client.get(f"/units/{UNIT}/planning?{FORM.replace('target=5', 'target=2')}")
    assert page.status_code == 200
    labels = [y for t in _figure(page.text, "scenarios")["data"]
              if t.get("xaxis", "x") == "x" for y in t["y"]]
    assert set(labels) == {"current state", "10% more emergency admissions",
                           "stays in G1 20% shorter", "30% of G1 patients as G2"}
    curve = {t.get("name"): t for t in _figure(page.text, "curve")["data"]}
    assert curve["target 2%"]["y"] == [2.0, 2.0]
    # A tighter target needs at least as many beds as the default 5%.
    at_2 = int(re.search(r'find no bed</span>\s*<span class="value">(\d+)', page.text).group(1))
    default = client.get(f"/units/{UNIT}/planning?{FORM}")
    at_5 = int(re.search(r'find no bed</span>\s*<span class="value">(\d+)',
                         default.text).group(1))
    assert at_2 > at_5


def test_bad_form_values_are_explained(client: TestClient) -> None:
    page = client.get(f"/units/{UNIT}/planning?{FORM.replace('s3_to=G2', 's3_to=G9')}")
    assert page.status_code == 422
    assert "no patient group &#39;G9&#39;" in page.text
    page = client.get(f"/units/{UNIT}/planning?{FORM.replace('years=1', 'years=30')}")
    assert page.status_code == 422 and "morrow plan" in html.unescape(page.text)
    assert client.get("/units/KV-NONE/planning").status_code == 404


def test_signed_out_visitor_is_not_shown_the_plan(planning_db: str) -> None:
    page = TestClient(create_app(planning_db)).get(f"/units/{UNIT}/planning",
                                                   follow_redirects=False)
    assert page.status_code in (303, 401)
    assert "curve-data" not in page.text


def test_unit_without_a_model_explains_the_first_step(demo_db: str) -> None:
    app = create_app(demo_db)  # the shared demo database has no trained model
    acting_as(app, "viewer")
    page = TestClient(app).get("/units/KV-CRIT/planning")
    assert page.status_code == 200
    assert "No model has been trained for KV-CRIT" in page.text
    # The first step in words a page reader can act on, not a command line (pages issue).
    assert "Training runs" in page.text and "curve-data" not in page.text
    assert "morrow train" not in page.text
