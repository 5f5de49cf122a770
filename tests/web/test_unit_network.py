"""The unit page's network figures without a browser (app/web/unit_network.py).

Reference: the forecast JSON of ../shared/design/DATA_CONTRACT.md with issue 16's agreed
``transfers_in`` (expected patients at a census who came from that unit after as_of, counted
inside ``components["emergency"]``); the expected lines are worked by hand from the invented
forecast below. Night names: the Gregorian calendar (Python's ``calendar``: 30 November 2026
is a Monday).
"""

from __future__ import annotations

import calendar

import pandas as pd
import pytest

from app.web.forecasts import Shown
from app.web.unit_network import held_back, transfer_split, waited_words
from tests.forecast.unit_state import unit_state

AS_OF = pd.Timestamp("2026-11-30 08:00", tz="UTC")


def _shown(days: list[dict[str, object]]) -> Shown:
    stays = pd.DataFrame({"stay_id": pd.Series(dtype=object),
                          "admitted_at": pd.Series(dtype=object),
                          "discharged_at": pd.Series(dtype=object)})
    return Shown({"days": days}, unit_state("KV-SURG", stays, AS_OF, beds=20), None)


def _day(census_at: str, emergency: float, elective: float, **extra: object) -> dict[str, object]:
    return {"census_at": census_at, "components": {"current": 10.0, "emergency": emergency,
                                                   "elective": elective}, **extra}


def test_transfers_are_taken_out_of_the_emergency_line() -> None:
    assert calendar.weekday(2026, 11, 30) == calendar.MONDAY
    split = transfer_split(_shown([
        _day("2026-12-01T00:00:00+00:00", 2.5, 1.0, transfers_in={"KV-CRIT": 0.9}),
        _day("2026-12-02T00:00:00+00:00", 3.0, 0.5,
             transfers_in={"KV-CRIT": 1.25, "KV-HDU": 0.25}),
        _day("2026-12-03T00:00:00+00:00", 1.0, 0.0),  # no transfers_in this day
    ]))
    assert split is not None
    assert split["senders"] == ["KV-CRIT", "KV-HDU"]
    assert [n["name"] for n in split["nights"]] == ["Mon night", "Tue night", "Wed night"]
    assert split["nights"][0]["relative"] == "Tonight"
    # By hand: emergency (other) = emergency - the day's transfers; the lines add up to the
    # newcomers (emergency + elective components).
    assert split["emergency"] == pytest.approx([1.6, 1.5, 1.0])
    assert split["transfers"] == {"KV-CRIT": pytest.approx([0.9, 1.25, 0.0]),
                                  "KV-HDU": pytest.approx([0.0, 0.25, 0.0])}
    assert split["booked"] == pytest.approx([1.0, 0.5, 0.0])
    assert split["total"] == pytest.approx([3.5, 3.5, 1.0])


def test_no_split_without_transfers_in() -> None:
    # A forecast from a model trained before routing has no key, or an empty one.
    assert transfer_split(_shown([_day("2026-12-01T00:00:00+00:00", 2.0, 1.0)])) is None
    assert transfer_split(_shown([_day("2026-12-01T00:00:00+00:00", 2.0, 1.0,
                                       transfers_in={})])) is None
    assert transfer_split(Shown(None, _shown([]).state, "no model")) is None


def test_waits_read_in_hours_then_days() -> None:
    # The cut at two days is common practice, no source; the arithmetic is by hand.
    assert waited_words(0.6) == "under an hour"
    assert waited_words(1.2) == "1 hour"
    assert waited_words(31.4) == "31 hours"
    assert waited_words(47.99) == "47 hours"
    assert waited_words(48.0) == "2.0 days"
    assert waited_words(90.0) == "3.8 days"


def test_held_back_turns_the_learnt_rates_into_typical_waits() -> None:
    # A constant rate's median wait is ln 2 / rate (the exponential distribution): 12 moves
    # a day with room is ln 2 / 12 days = 1.39 hours; 0.5 a day while full is 33.3 hours.
    payload = {"exit_block": {"KV-SURG": {
        "with_room": {"events": 120, "exposure_days": 10.0},
        "when_full": {"events": 6, "exposure_days": 12.0}, "waits": 130}}}
    (found,) = held_back(payload)
    assert found["with_room"] == "1 hour" and found["when_full"] == "33 hours"
    # Under five moves while full, a count is said instead of a typical wait.
    payload["exit_block"]["KV-SURG"]["when_full"] = {"events": 1, "exposure_days": 186.2}
    (found,) = held_back(payload)
    assert found["when_full"] is None and found["moved_when_full"] == 1
    assert held_back({}) == []
