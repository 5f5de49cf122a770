"""`morrow plan` on the demo hospital (invented) with a trained model.

Outside references: the Erlang B formula as a truncated Poisson distribution,
B(c, A) = P(N = c) / P(N <= c) for N ~ Poisson(A) (the textbook identity; computed with
scipy.stats.poisson, independently of app.stats.erlang), and plain arithmetic of the offered
load A = lambda x W (METHODS.md section 4) for the scenarios.
"""

from __future__ import annotations

import contextlib
import io
import json
import re

import pytest
from scipy import stats

from app.cli.main import main
from app.config import get_settings
from tests.planning.conftest import UNIT
from tests.web.served import DEMO_NOW

SMALL = ["--years", "0.5", "--replications", "4"]
RUN = ["--years", "1", "--replications", "8"]


def _erlang_b_scipy(beds: int, load: float) -> float:
    return float(stats.poisson.pmf(beds, load) / stats.poisson.cdf(beds, load))


@pytest.fixture(scope="module")
def report(planning_db: str) -> dict:
    out = io.StringIO()
    with pytest.MonkeyPatch.context() as patch, contextlib.redirect_stdout(out):
        patch.setenv("MORROW_TIMEZONE", "UTC")
        patch.setenv("MORROW_NOW", DEMO_NOW.isoformat())
        get_settings.cache_clear()
        status = main(["--db", planning_db, "plan", "--unit", UNIT, *RUN,
                       "--beds", "22-34", "--scale-arrivals", "emergency=+10%",
                       "--scale-stay", "longest=0.8", "--move-electives", "Mon:Fri=50%",
                       "--json"])
    get_settings.cache_clear()
    assert status == 0
    return json.loads(out.getvalue())


def test_json_curve_beside_erlang_and_beds_needed(report: dict) -> None:
    load = report["demand"]["offered_load"]
    assert 15 < load < 35  # KV-SURG: about 23 beds busy on average in the demo
    curve = report["curve"]
    assert [r["beds"] for r in curve] == list(range(22, 35))
    for row in curve:
        assert row["erlang_b"] == pytest.approx(_erlang_b_scipy(row["beds"], load), rel=1e-9)
        share = row["share_turned_away"]
        assert 0 <= share["ci_low"] <= share["mean"] <= share["ci_high"] <= 1
    shares = [r["share_turned_away"]["mean"] for r in curve]
    # Many find no bed at 22 beds, hardly any at 34 (Erlang: 18% and 0.7% at this load).
    assert shares[0] > 0.1 and shares[-1] < 0.02
    assert all(b <= a + 1e-3 for a, b in zip(shares, shares[1:], strict=False))
    occupancy = [r["occupancy_rate"]["mean"] for r in curve]
    assert occupancy[0] > occupancy[-1]
    needed = report["beds_needed"]
    target = report["settings"]["target"]
    assert target == 0.05
    erlang = min(c for c in range(1, 200) if _erlang_b_scipy(c, load) <= target)
    assert needed["erlang"] == erlang
    by_beds = {r["beds"]: r["share_turned_away"]["mean"] for r in curve}
    # The simulated answer is the first bed count at or under the target on the same demand.
    assert by_beds[needed["simulation"]] <= target < by_beds[needed["simulation"] - 1]
    assert needed["simulation_confident"] >= needed["simulation"]
    assert report["settings"]["replications"] == 8 and report["settings"]["days"] == 365


def test_json_scenarios_against_the_current_state(report: dict) -> None:
    scenarios = {s["name"]: s for s in report["scenarios"]}
    assert list(scenarios) == ["current state", "10% more emergency admissions",
                               "stays in G1 20% shorter", "50% of Mon electives on Fri"]
    current = scenarios["current state"]
    assert current["beds"] == report["compare_at"] == report["staffed_beds"] == 28
    emergency_load = next(s["offered_load"] for s in report["demand"]["streams"]
                          if s["name"] == "emergency")
    longest = max(report["demand"]["groups"], key=lambda g: g["mean_stay"])
    assert longest["name"] == "G1"
    # Offered load A = sum lambda x W: +10% emergencies adds a tenth of their load; stays 20%
    # shorter in G1 remove a fifth of G1's; moving electives between weekdays changes nothing.
    more = scenarios["10% more emergency admissions"]
    assert more["offered_load"] - current["offered_load"] == pytest.approx(0.1 * emergency_load)
    shorter = scenarios["stays in G1 20% shorter"]
    assert current["offered_load"] - shorter["offered_load"] == pytest.approx(
        0.2 * longest["offered_load"])
    moved = scenarios["50% of Mon electives on Fri"]
    assert moved["offered_load"] == pytest.approx(current["offered_load"])
    # Paired replications: more demand means more find no bed, shorter stays fewer.
    assert more["metrics"]["share_turned_away"]["difference"] > 0
    assert shorter["metrics"]["share_turned_away"]["difference"] < 0
    assert more["metrics"]["occupancy_rate"]["difference"] > 0
    assert more["beds_needed"]["simulation"] >= current["beds_needed"]["simulation"]
    assert shorter["beds_needed"]["erlang"] <= current["beds_needed"]["erlang"]


def test_table_shows_beds_needed_and_scenarios(planning_db: str,
                                               capsys: pytest.CaptureFixture[str],
                                               report: dict) -> None:
    status = main(["--db", planning_db, "plan", "--unit", UNIT, *RUN, "--beds", "22-34",
                   "--scale-arrivals", "emergency=1.1", "--scale-stay", "G1=-20%",
                   "--move-electives", "monday:fr=0.5"])
    assert status == 0
    text = capsys.readouterr().out
    needed = report["beds_needed"]  # the same seed and settings give the same numbers
    assert re.search(rf"by simulation:\s+{needed['simulation']} ", text)
    assert re.search(rf"by the Erlang loss formula:\s+{needed['erlang']} ", text)
    assert "staffed beds now:               28" in text
    row = re.search(r"^\s+28\s+(\d+\.\d)% \(", text, re.M)
    assert row is not None
    assert float(row.group(1)) == pytest.approx(
        100 * next(r for r in report["curve"] if r["beds"] == 28)["share_turned_away"]["mean"],
        abs=0.05)
    for name in ("current state", "10% more emergency admissions", "stays in G1 20% shorter",
                 "50% of Mon electives on Fri"):
        assert name in text
    assert "G1   mean stay" in text


@pytest.mark.parametrize(("extra", "message"), [
    (["--scale-stay", "G9=0.8"], "no patient group 'G9'; groups are G1: "),
    (["--move-share", "G1=0.2"], "write it like --move-share G1:G2=0.2"),
    (["--move-electives", "Mon:Xyz=0.5"], "'Xyz' is not a weekday"),
    (["--scale-arrivals", "walk-in=1.2"], "no arrivals called 'walk-in'; choose from: all, "),
    (["--target", "1.5"], "target: must be between 0 and 1"),
    (["--beds", "20-x"], "--beds '20-x'"),
    (["--scale-arrivals", "all=-100%"], "the expected number of arrivals is 0"),
])
def test_bad_input_is_refused_with_a_clear_message(planning_db: str, extra: list[str],
                                                   message: str,
                                                   capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["--db", planning_db, "plan", "--unit", UNIT, *SMALL, *extra]) == 2
    assert message in capsys.readouterr().err


def test_unknown_unit_and_missing_model(planning_db: str, demo_db: str,
                                       capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["--db", planning_db, "plan", "--unit", "KV-NONE", *SMALL]) == 2
    assert "unit 'KV-NONE' is not known (known units: " in capsys.readouterr().err
    # The shared demo database has no trained model.
    assert main(["--db", demo_db, "plan", "--unit", "KV-CRIT", *SMALL]) == 2
    err = capsys.readouterr().err
    assert "no model of unit KV-CRIT" in err and "morrow train --unit KV-CRIT" in err
