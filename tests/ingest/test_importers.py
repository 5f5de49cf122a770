"""Each importer's good path, every validation rule, idempotent re-import, census diffing.

The files here are small invented examples; the rules they check are DATA_CONTRACT.md's.
"""

from __future__ import annotations

from datetime import UTC, datetime

import pytest
from sqlalchemy import func, select

from app.ingest import ImportRefused, import_file
from app.store import db
from app.store.models import (
    AuditEvent,
    Booking,
    CensusRow,
    CensusSnapshot,
    ImportBatch,
    Observation,
    Stay,
    UnitBeds,
)
from tests.conftest import UTC_ZONE
from tests.ingest.csvtext import (
    BOOKING_HEADER,
    CENSUS_HEADER,
    OBS_HEADER,
    STAY_HEADER,
    UNITS,
    csv_bytes,
)

pytestmark = pytest.mark.both_databases  # every importer on SQLite and PostgreSQL


def run(url: str, kind: str, data: bytes, name: str = "file.csv"):
    with db.session_scope(url) as session:
        return import_file(session, kind, data, name, tz=UTC_ZONE, actor="tester")


def refused(url: str, kind: str, data: bytes, name: str = "bad.csv") -> list:
    with pytest.raises(ImportRefused) as info:
        run(url, kind, data, name)
    return info.value.problems


def count(url: str, model) -> int:
    with db.session_scope(url) as session:
        return session.scalar(select(func.count()).select_from(model))


@pytest.fixture
def unit_db(db_url: str) -> str:
    run(db_url, "units", UNITS.encode())
    return db_url


GOOD_STAYS = csv_bytes(
    STAY_HEADER,
    "S-1,U-TEST,2026-03-01T10:00,2026-03-04T14:30,emergency,ward,67,f,cardiology,emergency-dept",
    "S-2,U-TEST,2026-03-02T15:00,,elective,,54,m,cardiac-surgery,theatre",
)


def test_units_good_path_keeps_bed_history(db_url: str) -> None:
    result = run(db_url, "units", UNITS.encode())
    assert (result.inserted, result.updated) == (2, 0)
    with db.session_scope(db_url) as session:
        plan = sorted((b.valid_from is not None, b.beds) for b in session.scalars(select(UnitBeds)))
    assert plan == [(False, 10), (True, 12)]


def test_stays_good_path_and_idempotent(unit_db: str) -> None:
    first = run(unit_db, "stays", GOOD_STAYS)
    assert (first.inserted, first.updated, first.unchanged) == (2, 0, 0)
    audit_before = count(unit_db, AuditEvent)
    again = run(unit_db, "stays", GOOD_STAYS)
    assert (again.inserted, again.updated, again.unchanged) == (0, 0, 2)
    assert count(unit_db, Stay) == 2
    # Only the batch-level "import" event is added; no row changed.
    assert count(unit_db, AuditEvent) == audit_before + 1
    with db.session_scope(unit_db) as session:
        s1 = session.get(Stay, "S-1")
        assert s1.discharged_at == datetime(2026, 3, 4, 14, 30, tzinfo=UTC)
        assert s1.discharge_source == "stays"
        assert s1.specialty == "cardiology"


def test_stay_update_is_audited_with_before_and_after(unit_db: str) -> None:
    run(unit_db, "stays", GOOD_STAYS)
    discharged = csv_bytes(
        STAY_HEADER,
        "S-2,U-TEST,2026-03-02T15:00,2026-03-06T11:00,elective,home,54,m,cardiac-surgery,theatre")
    result = run(unit_db, "stays", discharged)
    assert result.updated == 1
    with db.session_scope(unit_db) as session:
        event = session.scalars(select(AuditEvent).where(
            AuditEvent.entity == "stay", AuditEvent.entity_id == "S-2",
            AuditEvent.action == "update")).one()
        assert event.before == {"discharged_at": None, "outcome": None}
        assert event.after == {"discharged_at": "2026-03-06T11:00:00+00:00", "outcome": "home"}
        assert event.batch_id == result.batch_id and event.actor == "tester"


TRANSFER_HEADER = STAY_HEADER + ",patient,from_unit,to_unit"


def test_transfer_columns_are_stored_and_an_older_file_keeps_them(unit_db: str) -> None:
    # DATA_CONTRACT stays.csv: patient, from_unit and to_unit are optional; files without
    # them stay valid and mean "not known", so re-importing such a file keeps what is stored.
    moved = csv_bytes(
        TRANSFER_HEADER,
        "S-1,U-TEST,2026-03-01T10:00,2026-03-04T14:30,emergency,ward,67,f,cardiology,"
        "emergency-dept,P-77,,KV-WARD-9",
        "S-2,U-TEST,2026-03-02T15:00,,elective,,54,m,cardiac-surgery,theatre,P-78,U-TEST,")
    assert run(unit_db, "stays", moved).inserted == 2
    again = run(unit_db, "stays", GOOD_STAYS)  # the older layout, without the three columns
    assert (again.updated, again.unchanged) == (0, 2)
    with db.session_scope(unit_db) as session:
        s1, s2 = session.get(Stay, "S-1"), session.get(Stay, "S-2")
        assert (s1.patient, s1.from_unit, s1.to_unit) == ("P-77", None, "KV-WARD-9")
        assert (s2.patient, s2.from_unit, s2.to_unit) == ("P-78", "U-TEST", None)
    cleared = csv_bytes(
        TRANSFER_HEADER,
        "S-1,U-TEST,2026-03-01T10:00,2026-03-04T14:30,emergency,ward,67,f,cardiology,"
        "emergency-dept,P-77,,")
    assert run(unit_db, "stays", cleared).updated == 1  # a blank cell in the column clears it
    with db.session_scope(unit_db) as session:
        assert session.get(Stay, "S-1").to_unit is None
    problems = refused(unit_db, "stays", csv_bytes(
        TRANSFER_HEADER,
        "S-3,U-TEST,2026-03-02T15:00,,elective,,54,m,x,theatre,P-79,bad unit,"))
    assert [(q.line, q.column) for q in problems] == [(2, "from_unit")]


def _only(problems: list, column: str):
    matching = [p for p in problems if p.column == column]
    assert matching, f"no problem names column {column!r}: {problems}"
    return matching[0]


@pytest.mark.parametrize(
    ("row", "line", "column", "why"),
    [
        ("S-9,U-TEST,2026-03-05T10:00,2026-03-04T10:00,emergency,home,50,f,x,y",
         2, "discharged_at", "before admitted_at"),
        ("S-9,U-TEST,yesterday,,emergency,,50,f,x,y", 2, "admitted_at", "ISO 8601"),
        ("S-9,U-TEST,2026-03-05T10:00,,urgent,,50,f,x,y", 2, "admission_type", "one of"),
        ("S-9,U-TEST,2026-03-05T10:00,,emergency,,130,f,x,y", 2, "age", "0 to 120"),
        ("S-9,U-TEST,2026-03-05T10:00,,emergency,,fifty,f,x,y", 2, "age", "whole number"),
        ("S-9,U-TEST,2026-03-05T10:00,,emergency,,50,q,x,y", 2, "sex", "one of"),
        ("S-9,U-TEST,2026-03-05T10:00,,emergency,cured,50,f,x,y", 2, "outcome", "one of"),
        (",U-TEST,2026-03-05T10:00,,emergency,,50,f,x,y", 2, "stay_id", "blank"),
        ("S-9,NOWHERE,2026-03-05T10:00,,emergency,,50,f,x,y", 2, "unit", "not known"),
    ],
)
def test_stays_bad_rows_are_named_by_line_and_column(unit_db, row, line, column, why) -> None:
    problems = refused(unit_db, "stays", csv_bytes(STAY_HEADER, row))
    problem = _only(problems, column)
    assert problem.line == line and why in problem.why and problem.file == "bad.csv"
    assert count(unit_db, Stay) == 0


def test_refused_file_writes_nothing_even_with_good_rows(unit_db: str) -> None:
    data = csv_bytes(STAY_HEADER,
                     "S-1,U-TEST,2026-03-01T10:00,,emergency,,67,f,a,b",
                     "S-2,U-TEST,2026-03-01T10:00,,emergency,,67,f,a,b",
                     "S-3,U-TEST,2026-03-01T10:00,,sideways,,67,f,a,b")
    problems = refused(unit_db, "stays", data)
    assert [(p.line, p.column) for p in problems] == [(4, "admission_type")]
    assert count(unit_db, Stay) == 0
    assert count(unit_db, ImportBatch) == 1  # the units file only


def test_stay_id_twice_in_one_file(unit_db: str) -> None:
    data = csv_bytes(STAY_HEADER,
                     "S-1,U-TEST,2026-03-01T10:00,,emergency,,67,f,a,b",
                     "S-1,U-TEST,2026-03-02T10:00,,emergency,,67,f,a,b")
    problem = _only(refused(unit_db, "stays", data), "stay_id")
    assert problem.line == 3 and "twice" in problem.why and "line 2" in problem.why


def test_missing_required_column_and_repeated_header(unit_db: str) -> None:
    problems = refused(unit_db, "stays", b"stay_id,unit,unit,admitted_at\nS-1,U-TEST,U-TEST,2026-01-01\n")
    whys = {(p.line, p.column, p.why) for p in problems}
    assert (1, "unit", "this column appears twice in the header") in whys
    assert (1, "admission_type", "required column is missing from the header") in whys


def test_unknown_columns_warn_and_rows_are_kept(unit_db: str) -> None:
    data = csv_bytes(STAY_HEADER + ",ward_colour",
                     "S-1,U-TEST,2026-03-01T10:00,,emergency,,67,f,a,b,blue")
    result = run(unit_db, "stays", data)
    assert result.inserted == 1
    assert any("ward_colour" in w for w in result.warnings)


def test_not_utf8_and_empty_file(unit_db: str) -> None:
    latin1 = (STAY_HEADER + "\nS-1,U-TEST,2026-03-01T10:00,,emergency,,67,f,caf\xe9,b\n").encode("latin-1")
    problem = refused(unit_db, "stays", latin1)[0]
    assert problem.line == 2 and "UTF-8" in problem.why
    assert "empty" in refused(unit_db, "stays", b"")[0].why


def test_header_only_file_is_valid_and_imports_nothing(unit_db: str) -> None:
    result = run(unit_db, "stays", csv_bytes(STAY_HEADER))
    assert (result.rows, result.inserted) == (0, 0)


def test_naive_timestamps_are_site_local(unit_db: str) -> None:
    from zoneinfo import ZoneInfo

    with db.session_scope(unit_db) as session:
        import_file(session, "stays", csv_bytes(
            STAY_HEADER, "S-1,U-TEST,2026-07-01T10:00,,emergency,,67,f,a,b"), "s.csv",
            tz=ZoneInfo("Europe/Berlin"))
    with db.session_scope(unit_db) as session:
        # Berlin is UTC+2 in July (CEST).
        assert session.get(Stay, "S-1").admitted_at == datetime(2026, 7, 1, 8, 0, tzinfo=UTC)


# census ----------------------------------------------------------------------------------------

CENSUS = csv_bytes(
    CENSUS_HEADER,
    "2026-03-02T00:00,U-TEST,B1,S-1,2026-03-01T10:00,emergency,67,cardiology",
    "2026-03-02T00:00,U-TEST,B2,S-2,2026-03-01T18:00,elective,54,cardiac-surgery",
    "2026-03-03T00:00,U-TEST,B2,S-2,2026-03-01T18:00,elective,54,cardiac-surgery",
    "2026-03-03T00:00,U-TEST,B3,S-3,2026-03-02T09:00,emergency,80,",
    "2026-03-04T00:00,U-TEST,B3,S-3,2026-03-02T09:00,emergency,80,",
)


def test_census_is_diffed_into_admissions_and_discharges(unit_db: str) -> None:
    result = run(unit_db, "census", CENSUS)
    assert result.inserted == 5
    with db.session_scope(unit_db) as session:
        stays = {s.stay_id: s for s in session.scalars(select(Stay))}
    assert set(stays) == {"S-1", "S-2", "S-3"}
    # S-1 absent from the 03-03 snapshot: discharged at that snapshot's instant.
    assert stays["S-1"].discharged_at == datetime(2026, 3, 3, tzinfo=UTC)
    assert stays["S-1"].discharge_source == "census"
    assert stays["S-2"].discharged_at == datetime(2026, 3, 4, tzinfo=UTC)
    assert stays["S-3"].discharged_at is None  # in the latest snapshot
    assert stays["S-3"].admitted_at == datetime(2026, 3, 2, 9, tzinfo=UTC)
    again = run(unit_db, "census", CENSUS)
    assert (again.inserted, again.unchanged) == (0, 5)
    assert count(unit_db, CensusRow) == 5 and count(unit_db, CensusSnapshot) == 3


def test_exact_discharge_from_stays_wins_in_either_order(unit_db: str) -> None:
    exact = csv_bytes(STAY_HEADER, "S-1,U-TEST,2026-03-01T10:00,2026-03-02T16:20,emergency,ward,67,f,cardiology,ed")
    run(unit_db, "census", CENSUS)
    run(unit_db, "stays", exact)
    with db.session_scope(unit_db) as session:
        assert session.get(Stay, "S-1").discharged_at == datetime(2026, 3, 2, 16, 20, tzinfo=UTC)
    later = csv_bytes(CENSUS_HEADER, "2026-03-05T00:00,U-TEST,B3,S-3,2026-03-02T09:00,emergency,80,")
    run(unit_db, "census", later)  # re-diffing must not overwrite the exact time
    with db.session_scope(unit_db) as session:
        assert session.get(Stay, "S-1").discharged_at == datetime(2026, 3, 2, 16, 20, tzinfo=UTC)
        assert session.get(Stay, "S-3").discharged_at is None


def test_census_import_of_an_older_snapshot_rediffs(unit_db: str) -> None:
    newer = csv_bytes(CENSUS_HEADER, "2026-03-05T00:00,U-TEST,B3,S-3,2026-03-02T09:00,emergency,80,")
    run(unit_db, "census", CENSUS)
    run(unit_db, "census", newer)
    with db.session_scope(unit_db) as session:
        assert session.get(Stay, "S-3").discharged_at is None


def test_stay_in_two_beds_in_one_snapshot(unit_db: str) -> None:
    data = csv_bytes(CENSUS_HEADER,
                     "2026-03-02T00:00,U-TEST,B1,S-1,2026-03-01T10:00,emergency,67,",
                     "2026-03-02T00:00,U-TEST,B2,S-1,2026-03-01T10:00,emergency,67,")
    problem = _only(refused(unit_db, "census", data), "stay_id")
    assert problem.line == 3 and "two beds" in problem.why
    assert count(unit_db, CensusRow) == 0 and count(unit_db, Stay) == 0


def test_two_stays_in_one_bed(unit_db: str) -> None:
    data = csv_bytes(CENSUS_HEADER,
                     "2026-03-02T00:00,U-TEST,B1,S-1,2026-03-01T10:00,emergency,67,",
                     "2026-03-02T00:00,U-TEST,B1,S-2,2026-03-01T11:00,emergency,67,")
    problem = _only(refused(unit_db, "census", data), "bed")
    assert problem.line == 3 and "two stays" in problem.why


def test_admitted_at_differs_between_snapshots(unit_db: str) -> None:
    data = csv_bytes(CENSUS_HEADER,
                     "2026-03-02T00:00,U-TEST,B1,S-1,2026-03-01T10:00,emergency,67,",
                     "2026-03-03T00:00,U-TEST,B1,S-1,2026-03-01T11:00,emergency,67,")
    problem = _only(refused(unit_db, "census", data), "admitted_at")
    assert problem.line == 3 and "different admitted_at" in problem.why


def test_admitted_at_differs_from_stored_stay(unit_db: str) -> None:
    run(unit_db, "stays", GOOD_STAYS)
    data = csv_bytes(CENSUS_HEADER, "2026-03-02T00:00,U-TEST,B1,S-1,2026-03-01T09:00,emergency,67,")
    problem = _only(refused(unit_db, "census", data), "admitted_at")
    assert problem.line == 2 and "stored with admitted_at" in problem.why


def test_changed_snapshot_is_refused(unit_db: str) -> None:
    run(unit_db, "census", CENSUS)
    data = csv_bytes(CENSUS_HEADER, "2026-03-02T00:00,U-TEST,B1,S-1,2026-03-01T10:00,emergency,67,cardiology")
    problem = _only(refused(unit_db, "census", data), "taken_at")
    assert "already stored" in problem.why


# observations ---------------------------------------------------------------------------------

def test_observations_append_only_with_corrections(unit_db: str) -> None:
    run(unit_db, "stays", GOOD_STAYS)
    data = csv_bytes(OBS_HEADER,
                     "S-1,2026-03-02T07:00,sofa,9,",
                     "S-1,2026-03-02T07:00,sofa,8,2026-03-02T09:30",
                     "S-1,2026-03-02T07:00,fit_for_discharge,0,")
    assert run(unit_db, "observations", data).inserted == 3
    assert run(unit_db, "observations", data).inserted == 0
    assert count(unit_db, Observation) == 3
    with db.session_scope(unit_db) as session:
        first = session.scalars(select(Observation).where(Observation.value == 9)).one()
        assert first.recorded_at == first.observed_at  # recorded_at defaults to observed_at


@pytest.mark.parametrize(
    ("row", "column", "why"),
    [
        ("S-1,2026-03-02T07:00,sofa,25,", "value", "from 0 to 24"),
        ("S-1,2026-03-02T07:00,news2,21,", "value", "from 0 to 20"),
        ("S-1,2026-03-02T07:00,apache_ii,72,", "value", "from 0 to 71"),
        ("S-1,2026-03-02T07:00,fit_for_discharge,2,", "value", "flag"),
        # SOFA is a sum of six organ scores of 0-4 points each (Vincent et al. 1996): whole.
        ("S-1,2026-03-02T07:00,sofa,3.5,", "value", "SOFA must be a whole number from 0 to 24"),
        ("S-1,2026-03-02T07:00,sofa,nan,", "value", "finite"),
        ("S-1,2026-03-02T07:00,SOFA,3,", "name", "lower case"),
        ("S-404,2026-03-02T07:00,sofa,3,", "stay_id", "not known"),
        ("S-1,2026-03-02T07:00,sofa,3,2026-03-02T06:00", "recorded_at", "before observed_at"),
        ("S-1,2026-02-20T07:00,sofa,3,", "observed_at", "before the stay's admission"),
    ],
)
def test_observation_rules(unit_db, row, column, why) -> None:
    run(unit_db, "stays", GOOD_STAYS)
    problem = _only(refused(unit_db, "observations", csv_bytes(OBS_HEADER, row)), column)
    assert problem.line == 2 and why in problem.why


def test_observation_same_key_other_value_is_a_correction(unit_db: str) -> None:
    """A later entry with the same recorded_at supersedes (tests/reliability has the rule)."""
    run(unit_db, "stays", GOOD_STAYS)
    run(unit_db, "observations", csv_bytes(OBS_HEADER, "S-1,2026-03-02T07:00,sofa,9,"))
    assert run(unit_db, "observations",
               csv_bytes(OBS_HEADER, "S-1,2026-03-02T07:00,sofa,7,")).inserted == 1


# bookings -------------------------------------------------------------------------------------

def test_bookings_good_path_update_and_rules(unit_db: str) -> None:
    data = csv_bytes(BOOKING_HEADER,
                     "B-1,U-TEST,2026-02-20T09:00,2026-03-03,cardiac-surgery,cabg,",
                     "B-2,U-TEST,2026-02-21T09:00,2026-03-04,vascular,evar,2026-02-25T12:00")
    assert run(unit_db, "bookings", data).inserted == 2
    assert run(unit_db, "bookings", data).unchanged == 2
    cancel = csv_bytes(BOOKING_HEADER,
                       "B-1,U-TEST,2026-02-20T09:00,2026-03-03,cardiac-surgery,cabg,2026-03-01T08:00")
    assert run(unit_db, "bookings", cancel).updated == 1
    with db.session_scope(unit_db) as session:
        assert session.get(Booking, "B-1").cancelled_at == datetime(2026, 3, 1, 8, tzinfo=UTC)
    bad = csv_bytes(BOOKING_HEADER,
                    "B-3,U-TEST,2026-02-20T09:00,2026-03-03,x,y,2026-02-19T08:00",
                    "B-4,U-TEST,2026-02-20T09:00,03/03/2026,x,y,")
    problems = refused(unit_db, "bookings", bad)
    assert {(p.line, p.column) for p in problems} == {(2, "cancelled_at"), (3, "planned_date")}
    assert "cancelled before it was booked" in _only(problems, "cancelled_at").why


def test_units_rules(db_url: str) -> None:
    bad = b"unit,beds,valid_from,census_time\nU-A,-1,,00:00\nU-B,5,,25:00\nU-C,5,2026-01-01,\nU-C,6,2026-01-01,\n"
    problems = refused(db_url, "units", bad)
    assert {(p.line, p.column) for p in problems} == {(2, "beds"), (3, "census_time"), (5, "valid_from")}


def test_problem_list_is_capped_in_the_summary(unit_db: str) -> None:
    rows = [f"S-{i},U-TEST,2026-03-01T10:00,,nope,,67,f,a,b" for i in range(80)]
    with pytest.raises(ImportRefused) as info:
        run(unit_db, "stays", csv_bytes(STAY_HEADER, *rows))
    assert len(info.value.problems) == 80
    text = info.value.summary()
    assert "80 problem(s)" in text and "and 30 more" in text and "line 51" in text
