"""`morrow plan --units` on the demo hospital (invented): KV-CRIT and KV-SURG together.

Outside references: Little's law (Little 1961, Operations Research 9:383-387, from memory)
per unit on the demo pair's run, and the routing share counted again from the stays table
with Python's own sqlite3 (not the store's queries).
"""

from __future__ import annotations

import contextlib
import io
import json
import sqlite3
from datetime import datetime, timedelta

import pytest

from app.cli.main import main
from app.config import get_settings
from tests.planning.conftest import PAIR
from tests.web.served import DEMO_NOW

RUN = ["--years", "1", "--replications", "6"]


def _plan(db_url: str, *args: str) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        status = main(["--db", db_url, "plan", *args])
    return status, out.getvalue(), err.getvalue()


@pytest.fixture(scope="module")
def report(network_db: str) -> dict:
    with pytest.MonkeyPatch.context() as patch:
        patch.setenv("MORROW_TIMEZONE", "UTC")
        patch.setenv("MORROW_NOW", DEMO_NOW.isoformat())
        get_settings.cache_clear()
        status, out, err = _plan(network_db, "--units", ",".join(PAIR), "--beds",
                                 "KV-SURG=+2", *RUN, "--json")
    get_settings.cache_clear()
    assert status == 0, err
    return json.loads(out)


def test_routing_share_is_the_counted_share_of_step_downs(report: dict,
                                                          network_db: str) -> None:
    # The share of KV-CRIT's discharges that went on to KV-SURG, counted again from the
    # stays table: by the cut-off over all history (the routing model's overall share), or
    # over the year before it (the fallback for a model without routing).
    route = next(r for r in report["routes"]
                 if (r["source"], r["target"]) == ("KV-CRIT", "KV-SURG"))
    until = datetime.fromisoformat(route["trained_until"])
    since = (until - timedelta(days=365) if route["source_of_shares"] == "to_unit counts"
             else datetime.min.replace(tzinfo=until.tzinfo))
    with sqlite3.connect(network_db.removeprefix("sqlite:///")) as conn:
        rows = conn.execute("SELECT discharged_at, to_unit, outcome FROM stay "
                            "WHERE unit = 'KV-CRIT' AND discharged_at IS NOT NULL").fetchall()
    ended = [(datetime.fromisoformat(d).replace(tzinfo=until.tzinfo), t, o) for d, t, o in rows]
    window = [(t, o) for d, t, o in ended if since < d <= until]
    assert len(window) > 100
    counted = sum(t == "KV-SURG" and o != "died" for t, o in window) / len(window)
    assert 0.05 < counted < 0.95  # the demo passes a real share of its patients on
    assert route["share"] == pytest.approx(counted, rel=1e-9)


def test_two_more_ward_beds_shorten_the_step_down_queue(report: dict) -> None:
    crit, surg = report["units"]
    assert (crit["unit"], surg["unit"]) == PAIR
    assert surg["beds_after"] == surg["staffed_beds"] + 2
    assert crit["beds_after"] == crit["staffed_beds"]
    before = report["before"]["KV-CRIT"]["waiting_bed_days_per_week"]
    after = report["after"]["KV-CRIT"]["waiting_bed_days_per_week"]
    change = report["change"]["KV-CRIT"]["waiting_bed_days_per_week"]
    assert before["mean"] > 0
    # More ward beds cannot lengthen the queue out of critical care (paired replications).
    assert after["mean"] <= before["mean"]
    assert change["mean"] == pytest.approx(after["mean"] - before["mean"], abs=1e-9)
    assert change["ci_low"] <= change["mean"] <= change["ci_high"] <= 1e-9
    curve = report["curve"]
    assert [r["extra"] for r in curve] == [0, 1, 2, 3, 4]
    waits = [r["units"]["KV-CRIT"]["waiting_bed_days_per_week"]["mean"] for r in curve]
    assert waits[0] == pytest.approx(before["mean"])
    assert waits[2] == pytest.approx(after["mean"])
    assert all(b <= a + 1e-9 for a, b in zip(waits, waits[1:], strict=False))


def test_littles_law_per_unit_on_the_demo_pair(report: dict) -> None:
    # Little (1961): mean beds held = entries a day x mean time in the unit (waiting to move
    # on included); the sides are measured apart and differ by edge effects only (under 3%
    # for one simulated year; common practice, no source).
    for unit in PAIR:
        row = report["before"][unit]
        assert row["entries_per_day"]["mean"] * row["mean_time_in_unit"]["mean"] == \
            pytest.approx(row["mean_occupancy"]["mean"], rel=0.03)


def test_the_table_reads_in_words(network_db: str) -> None:
    status, out, err = _plan(network_db, "--units", ",".join(PAIR), "--beds", "KV-SURG=+1",
                             "--years", "0.5", "--replications", "3")
    assert status == 0, err
    assert "bed-days a week spent waiting to move on" in out
    assert "KV-CRIT -> KV-SURG" in out


@pytest.mark.parametrize(("args", "message"), [
    (["--units", "KV-CRIT,KV-SURG", "--beds", "KV-XX=+2"], "not one of --units"),
    (["--units", "KV-CRIT,KV-SURG", "--beds", "KV-SURG=+99"], "outside the allowed range"),
    (["--units", "KV-CRIT,KV-SURG", "--beds", "KV-SURG=two"], "not a whole number"),
    (["--units", "KV-CRIT,KV-NONE"], "is not known"),
    (["--units", ",".join(f"U{i}" for i in range(11))], "outside the allowed range"),
    (["--unit", "KV-SURG", "--units", "KV-CRIT,KV-SURG"], "either --unit"),
])
def test_bad_input_exits_2_with_a_message(network_db: str, args: list[str],
                                          message: str) -> None:
    status, _, err = _plan(network_db, *args, "--years", "0.1", "--replications", "2")
    assert status == 2
    assert message in err
