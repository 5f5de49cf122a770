"""The "as of" rule (DATA_CONTRACT.md): the state at T uses only what was known at T.

The property test builds two databases from the same invented history: one holding
everything, one holding only what was known at T (filtered by the contract's rules),
and checks that the state at T is the same from both.
"""

from __future__ import annotations

import contextlib
import shutil
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from app.ingest import import_file
from app.ingest.score_entries import NothingToWithdraw, withdraw
from app.state import latest_observations, load_state
from app.store import db
from tests.conftest import UTC_ZONE
from tests.ingest.csvtext import BOOKING_HEADER, OBS_HEADER, csv_bytes

BASE = datetime(2026, 3, 1, tzinfo=UTC)
STAY_HEADER = "stay_id,unit,admitted_at,discharged_at,admission_type,outcome,age"
CENSUS_HEADER = "taken_at,unit,bed,stay_id,admitted_at,admission_type,age"


def ts(hours: float) -> str:
    return (BASE + timedelta(hours=hours)).isoformat()


stay_strategy = st.tuples(
    st.integers(0, 240),                      # admitted, hours after BASE
    st.one_of(st.none(), st.integers(1, 300)),  # length of stay in hours, None: still in
    st.sampled_from(["emergency", "elective"]),
    st.integers(18, 95),
    st.lists(st.tuples(st.integers(0, 200), st.integers(0, 24), st.integers(0, 48),
                       st.one_of(st.none(), st.tuples(st.integers(1, 48), st.integers(0, 24))),
                       # a withdrawal, hours after the first entry (0: at the same instant)
                       st.one_of(st.none(), st.integers(0, 48))),
             max_size=4),
)
booking_strategy = st.tuples(st.integers(0, 240), st.integers(0, 15),
                             st.one_of(st.none(), st.integers(0, 200)))


def build_files(stays, bookings, cut: float | None) -> dict[str, object]:
    """CSV files of the history; with ``cut`` only what was known ``cut`` hours after BASE.

    Withdrawals have no CSV column (they are entered on the page): they come back under
    "withdrawals" as (stay, observed_at, recorded_at) for ``make_db`` to enter."""
    stay_rows, obs_rows, census_rows, booking_rows = [], [], [], []
    withdrawals: list[tuple[str, datetime, datetime]] = []
    for i, (adm, los, kind, age, observations) in enumerate(stays):
        if cut is not None and adm > cut:
            continue
        dis = None if los is None else adm + los
        if cut is not None and dis is not None and dis > cut:
            dis = None
        outcome = "home" if dis is not None else ""
        stay_rows.append(f"S-{i},U-T,{ts(adm)},{'' if dis is None else ts(dis)},{kind},{outcome},{age}")
        # The importer refuses two values for one stay, time and name recorded at the same
        # instant in one file (its lines have no order of entry): keep the first of a pair.
        recorded_pairs: set[tuple[int, int]] = set()
        for off, value, delay, correction, *withdrawal in observations:
            observed = adm + off
            if los is not None and observed > adm + los:
                continue
            entries = [(value, observed + delay)]
            if correction is not None:
                entries.append((correction[1], observed + delay + correction[0]))
            for v, recorded in entries:
                if (observed, recorded) in recorded_pairs:
                    continue
                recorded_pairs.add((observed, recorded))
                if cut is not None and (observed > cut or recorded > cut):
                    continue
                obs_rows.append(f"S-{i},{ts(observed)},sofa,{v},{ts(recorded)}")
            if withdrawal and withdrawal[0] is not None and (observed, observed + delay) in (
                    recorded_pairs) and not any(w[:2] == (f"S-{i}", BASE + timedelta(
                        hours=observed)) for w in withdrawals):
                withdrawn_at = observed + delay + withdrawal[0]
                if cut is None or withdrawn_at <= cut:
                    withdrawals.append((f"S-{i}", BASE + timedelta(hours=observed),
                                        BASE + timedelta(hours=withdrawn_at)))
        for day in range(1, 14):
            at = day * 24
            if cut is not None and at > cut:
                break
            if adm <= at and (los is None or adm + los > at):
                census_rows.append(f"{ts(at)},U-T,,S-{i},{ts(adm)},{kind},{age}")
    for j, (booked, planned, cancel) in enumerate(bookings):
        if cut is not None and booked > cut:
            continue
        cancelled = None if cancel is None else booked + cancel
        if cut is not None and cancelled is not None and cancelled > cut:
            cancelled = None
        day = (BASE + timedelta(days=planned)).date().isoformat()
        booking_rows.append(f"B-{j},U-T,{ts(booked)},{day},x,y,{'' if cancelled is None else ts(cancelled)}")
    return {
        "units": b"unit,beds,valid_from,census_time\nU-T,8,,00:00\n",
        "stays": csv_bytes(STAY_HEADER, *stay_rows),
        "census": csv_bytes(CENSUS_HEADER, *census_rows),
        "observations": csv_bytes(OBS_HEADER, *obs_rows),
        "bookings": csv_bytes(BOOKING_HEADER, *booking_rows),
        "withdrawals": withdrawals,
    }


def make_db(template: Path, folder: Path, name: str, files: dict[str, object]) -> str:
    path = folder / f"{name}.db"
    shutil.copy(template, path)
    url = f"sqlite:///{path}"
    with db.session_scope(url) as session:
        for kind in ("units", "stays", "census", "observations", "bookings"):
            import_file(session, kind, files[kind], f"{kind}.csv", tz=UTC_ZONE)
        for stay, observed, recorded in files["withdrawals"]:  # type: ignore[attr-defined]
            # NothingToWithdraw: already withdrawn, or its entry was left out
            with contextlib.suppress(NothingToWithdraw):
                withdraw(session, stay, "sofa", observed, recorded_at=recorded, actor="test")
    return url


def state_frames(url: str, at: datetime) -> dict[str, pd.DataFrame]:
    with db.session_scope(url) as session:
        state = load_state(session, "U-T", at, UTC_ZONE)
    db.release_engine(url)
    return {"stays": state.stays, "observations": state.observations,
            "bookings": state.bookings, "snapshots": state.snapshots,
            "current": state.current_stays(), "open_bookings": state.open_bookings(),
            "history": state.history()}


@settings(max_examples=25, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(stays=st.lists(stay_strategy, min_size=1, max_size=8),
       bookings=st.lists(booking_strategy, max_size=4),
       cut=st.integers(0, 300))
def test_state_from_everything_equals_state_from_what_was_known(
        migrated_template, tmp_path_factory, stays, bookings, cut) -> None:
    folder = tmp_path_factory.mktemp("asof")
    full = make_db(migrated_template, folder, "full", build_files(stays, bookings, None))
    known = make_db(migrated_template, folder, "known", build_files(stays, bookings, cut))
    at = BASE + timedelta(hours=cut)
    a, b = state_frames(full, at), state_frames(known, at)
    for name in a:
        pd.testing.assert_frame_equal(a[name], b[name], obj=name)


def test_latest_observation_takes_corrections_only_once_recorded() -> None:
    t = pd.Timestamp
    obs = pd.DataFrame({
        "stay_id": ["S-1"] * 3,
        "observed_at": [t("2026-03-01T07:00Z"), t("2026-03-02T07:00Z"), t("2026-03-02T07:00Z")],
        "name": ["sofa"] * 3,
        "value": [10.0, 8.0, 6.0],
        "recorded_at": [t("2026-03-01T07:00Z"), t("2026-03-02T07:00Z"), t("2026-03-02T12:00Z")],
    })
    before = latest_observations(obs, t("2026-03-02T09:00Z")).iloc[0]
    assert (before["value"], before["previous"]) == (8.0, 10.0)
    after = latest_observations(obs, t("2026-03-02T13:00Z")).iloc[0]
    assert (after["value"], after["previous"]) == (6.0, 10.0)
    assert latest_observations(obs, t("2026-03-01T06:00Z")).empty


def test_current_stays_carry_latest_score_change_and_age(migrated_template, tmp_path) -> None:
    files = build_files([(0, None, "emergency", 70, [(6, 11, 0, None), (30, 8, 1, (2, 7))])],
                        [], None)
    url = make_db(migrated_template, tmp_path, "one", files)
    with db.session_scope(url) as session:
        state = load_state(session, "U-T", BASE + timedelta(hours=40), UTC_ZONE)
    row = state.current_stays().iloc[0]
    assert row["stay_id"] == "S-0" and row["days_in"] == pytest.approx(40 / 24)
    assert (row["sofa"], row["sofa_change"], row["sofa_hours"]) == (7.0, -4.0, 10.0)


def test_demo_occupancy_from_stays_matches_every_census_snapshot(demo_db: str) -> None:
    """Two independent records of the demo (stays and snapshots) agree at every census instant."""
    with db.session_scope(demo_db) as session:
        from app.store.repo import list_units

        for unit in list_units(session):
            state = load_state(session, unit.code, datetime(2026, 11, 30, 8, tzinfo=UTC),
                               UTC_ZONE)
            assert len(state.snapshots) >= 50
            for taken_at, occupancy in state.snapshots.itertuples(index=False):
                assert state.occupancy_at(taken_at) == occupancy, (unit.code, taken_at)


def test_a_withdrawn_latest_entry_leaves_no_value_from_its_recorded_at(
        migrated_template, tmp_path) -> None:
    """DATA_CONTRACT.md "observations.csv": append-only, an entry counts from its recorded_at.
    A withdrawal (observation.withdrawn, migration 0008) is such an entry: before it the
    value counts, after it that measurement has none and the one before it is the latest;
    a value entered after the withdrawal counts again. Worked by hand."""
    files = build_files([(0, None, "emergency", 70, [(6, 11, 0, None), (30, 8, 1, None)])],
                        [], None)
    url = make_db(migrated_template, tmp_path, "withdrawn", files)
    observed = BASE + timedelta(hours=30)

    def sofa_at(hours: float) -> tuple[float, float]:
        with db.session_scope(url) as session:
            row = load_state(session, "U-T", BASE + timedelta(hours=hours),
                             UTC_ZONE).current_stays().iloc[0]
        return row["sofa"], row["sofa_hours"]

    with db.session_scope(url) as session:
        withdraw(session, "S-0", "sofa", observed, recorded_at=BASE + timedelta(hours=35),
                 actor="nurse")
    assert sofa_at(34) == (8.0, 4.0)
    assert sofa_at(36) == (11.0, 30.0)  # the 8 is withdrawn: the value observed at 6 h is latest
    with db.session_scope(url) as session, pytest.raises(NothingToWithdraw):
        withdraw(session, "S-0", "sofa", observed, recorded_at=BASE + timedelta(hours=36),
                 actor="nurse")
    with db.session_scope(url) as session:
        import_file(session, "observations", csv_bytes(
            OBS_HEADER, f"S-0,{ts(30)},sofa,8,{ts(37)}"), "again.csv", tz=UTC_ZONE)
    assert sofa_at(38) == (8.0, 8.0)  # entered again after the withdrawal: counts again
