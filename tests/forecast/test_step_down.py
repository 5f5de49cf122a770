"""Patients fit to leave and still in the unit (app/forecast/step_down.py).

References: the "as of" rule of ../shared/design/DATA_CONTRACT.md (an observation counts from
its observed_at and recorded_at; a later-recorded entry for the same instant corrects it; a
withdrawn value has none), and hours worked by hand from the invented times below. The
routing payload is built in the shape agreed for issue 16 (destinations, overall, groups,
counts, trained_until) and read through app/forecast/routing.py.
"""

from __future__ import annotations

import shutil
from dataclasses import replace
from datetime import UTC, datetime, timedelta

import pandas as pd
import pytest

from app.forecast.step_down import likeliest_alive, waiting_to_step_down
from app.ingest import import_file
from app.ingest.score_entries import withdraw
from app.state import load_state
from app.state.frames import OBSERVATION_COLUMNS
from app.store import db
from tests.conftest import UTC_ZONE
from tests.forecast.unit_state import unit_state
from tests.ingest.csvtext import OBS_HEADER, csv_bytes

AS_OF = pd.Timestamp("2026-11-30 08:00", tz="UTC")
FLAG = "fit_for_discharge"


def _at(hours_before: float) -> pd.Timestamp:
    return AS_OF - pd.Timedelta(hours=hours_before)


def _state(observations: list[tuple[str, float, float, float]]):
    """Stays S-1..S-6 in KV-CRIT (S-6 left before as_of) and flag entries given as
    (stay, hours before as_of observed, value, hours before as_of recorded)."""
    stays = pd.DataFrame({
        "stay_id": [f"S-{i}" for i in range(1, 7)],
        "admitted_at": [_at(200)] * 6,
        "discharged_at": [None] * 5 + [_at(2)],
        "admission_type": ["emergency"] * 6, "outcome": [None] * 5 + ["ward"],
        "age": [60.0] * 6, "sex": ["F"] * 6, "specialty": ["x"] * 6, "source": ["ed"] * 6,
        "booking_id": [None] * 6})
    state = unit_state("KV-CRIT", stays, AS_OF, beds=8)
    rows = pd.DataFrame(
        [(s, _at(o), FLAG, v, _at(r)) for s, o, v, r in observations],
        columns=OBSERVATION_COLUMNS)
    return replace(state, observations=rows)


def test_the_wait_runs_from_the_first_flag_still_standing() -> None:
    state = _state([
        ("S-1", 30, 0, 30), ("S-1", 20, 1, 19), ("S-1", 10, 1, 10),  # set at -20 h, kept
        ("S-2", 50, 1, 50), ("S-2", 40, 0, 40), ("S-2", 5, 1, 5),   # set again at -5 h
        ("S-3", 12, 1, 12), ("S-3", 6, 0, 6),                       # unset: not waiting
        ("S-6", 30, 1, 30),                                         # left the unit
    ])
    waiting = waiting_to_step_down(state, None, beds={"S-1": "C3"})
    # Hand-worked: S-1 waits 20 h from 06:00 UTC on 29 Nov, S-2 5 h; longest wait first.
    assert [w.stay_id for w in waiting] == ["S-1", "S-2"]
    assert waiting[0].flagged_at == pd.Timestamp("2026-11-29 12:00", tz="UTC")
    assert [w.hours_waiting for w in waiting] == pytest.approx([20.0, 5.0])
    assert [w.bed for w in waiting] == ["C3", ""]
    # No routing (a model trained before it): the destination is not known.
    assert waiting[0].destination is None and waiting[0].share is None


def test_entries_after_as_of_and_corrections_follow_the_as_of_rule() -> None:
    state = _state([
        ("S-1", -1, 1, -1),               # observed after as_of: unknown then
        ("S-2", 10, 1, -2),               # observed before, recorded after as_of: unknown
        ("S-3", 8, 1, 8), ("S-3", 8, 0, 7),  # the same instant corrected to 0 an hour later
        ("S-4", 9, 0, 9), ("S-4", 9, 1, 4),  # the same instant corrected to 1: waits from -9 h
    ])
    waiting = waiting_to_step_down(state, None)
    assert [(w.stay_id, w.hours_waiting) for w in waiting] == [("S-4", pytest.approx(9.0))]
    # Seen an hour before the as_of, S-4's correction (recorded 4 h before) already counts,
    # seen 5 h before it does not.
    earlier = state.known_at(_at(5))
    assert waiting_to_step_down(earlier, None) == []


def test_a_withdrawn_flag_does_not_keep_a_patient_waiting(migrated_template, tmp_path) -> None:
    """A withdrawal (observation.withdrawn) removes the value from its recorded_at on, so the
    flag before it is the latest again (DATA_CONTRACT.md, observations)."""
    path = tmp_path / "flag.db"
    shutil.copy(migrated_template, path)
    url = f"sqlite:///{path}"
    base = datetime(2026, 11, 28, 8, 0, tzinfo=UTC)

    def t(hours: float) -> str:
        return (base + timedelta(hours=hours)).isoformat()

    with db.session_scope(url) as session:
        import_file(session, "units", b"unit,beds,valid_from,census_time\nKV-CRIT,8,,00:00\n",
                    "units.csv", tz=UTC_ZONE)
        import_file(session, "stays", csv_bytes(
            "stay_id,unit,admitted_at,discharged_at,admission_type,outcome,age",
            f"S-1,KV-CRIT,{t(0)},,emergency,,70", f"S-2,KV-CRIT,{t(0)},,emergency,,64"),
            "stays.csv", tz=UTC_ZONE)
        import_file(session, "observations", csv_bytes(
            OBS_HEADER, f"S-1,{t(10)},{FLAG},0,{t(10)}", f"S-1,{t(20)},{FLAG},1,{t(20)}",
            f"S-2,{t(30)},{FLAG},1,{t(30)}"), "obs.csv", tz=UTC_ZONE)
        withdraw(session, "S-2", FLAG, base + timedelta(hours=30),
                 recorded_at=base + timedelta(hours=31), actor="nurse")
    with db.session_scope(url) as session:
        before = load_state(session, "KV-CRIT", base + timedelta(hours=30.5), UTC_ZONE)
        after = load_state(session, "KV-CRIT", base + timedelta(hours=32), UTC_ZONE,
                           with_history=False)
    db.release_engine(url)
    # Before the withdrawal is recorded both wait (S-1 from 20 h, S-2 from 30 h); once it is,
    # S-2's flag has no value and S-2 has none standing.
    assert [(w.stay_id, w.hours_waiting) for w in waiting_to_step_down(before, None)] == [
        ("S-1", pytest.approx(10.5)), ("S-2", pytest.approx(0.5))]
    assert [(w.stay_id, w.hours_waiting) for w in waiting_to_step_down(after, None)] == [
        ("S-1", pytest.approx(12.0))]


def test_the_likeliest_place_leaves_death_out_and_shares_among_the_rest() -> None:
    # Hand-worked: without "died" (0.2) the rest sum to 0.8; KV-SURG 0.5 / 0.8 = 0.625.
    assert likeliest_alive({"KV-SURG": 0.5, "elsewhere": 0.2, "home": 0.1,
                            "died": 0.2}) == ("KV-SURG", pytest.approx(0.625))
    assert likeliest_alive({"home": 0.4, "elsewhere": 0.4}) == ("elsewhere",
                                                                pytest.approx(0.5))
    assert likeliest_alive({"died": 1.0}) == (None, None)
    assert likeliest_alive({}) == (None, None)


def _payload() -> dict[str, object]:
    """A unit's model payload with routing in the agreed shape (issue 16): group 3 sends most
    patients to KV-SURG, group 4 most home; the unit overall mostly elsewhere."""
    return {"routing": {
        "destinations": ["KV-SURG", "home", "died", "elsewhere"],
        "overall": {"KV-SURG": 0.3, "home": 0.2, "died": 0.1, "elsewhere": 0.4},
        "groups": {"3": {"KV-SURG": 0.6, "home": 0.1, "died": 0.1, "elsewhere": 0.2},
                   "4": {"KV-SURG": 0.1, "home": 0.7, "died": 0.1, "elsewhere": 0.1}},
        "counts": {"KV-SURG": 30, "home": 20, "died": 10, "elsewhere": 40},
        "trained_until": "2026-11-30T08:00:00+00:00"}}


def test_each_waiting_patient_gets_its_groups_likeliest_place() -> None:
    routing_module = pytest.importorskip("app.forecast.routing")
    routing = routing_module.Routing.from_payload(_payload())
    assert routing is not None
    assert routing_module.Routing.from_payload({"los": {}}) is None  # trained before routing
    state = _state([("S-1", 30, 1, 30), ("S-2", 20, 1, 20), ("S-3", 10, 1, 10)])
    waiting = waiting_to_step_down(state, routing, groups={"S-1": 3, "S-2": 4, "S-3": 99})
    by_stay = {w.stay_id: (w.destination, w.share) for w in waiting}
    # Hand-worked from the payload, death left out (shares of the remaining 0.9):
    # group 3: KV-SURG 0.6 / 0.9; group 4: home 0.7 / 0.9; an unknown group takes the
    # overall shares: elsewhere 0.4 / 0.9.
    assert by_stay == {"S-1": ("KV-SURG", pytest.approx(2 / 3)),
                       "S-2": ("home", pytest.approx(7 / 9)),
                       "S-3": ("elsewhere", pytest.approx(4 / 9))}
