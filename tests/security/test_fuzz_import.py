"""Bad files never break the importer or the data: each is imported or refused, never crashes.

Hypothesis generates random bytes, text in the wrong encoding, huge fields, missing and
repeated headers and formula-like cells (bounded and derandomized, so every run is the
same). The property: ``import_file`` returns a result or raises ``ImportRefused`` with at
least one problem, and after a refusal the database holds exactly what it held before.
"""

from __future__ import annotations

import csv
import io

import pytest
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from app.ingest import KINDS, ImportRefused, import_file
from app.ingest.importer import _columns
from app.store import db
from app.store.models import Base
from tests.conftest import UTC_ZONE

FUZZ = settings(max_examples=60, deadline=None, derandomize=True, database=None,
                phases=[Phase.explicit, Phase.generate, Phase.shrink],
                suppress_health_check=[HealthCheck.function_scoped_fixture,
                                       HealthCheck.too_slow, HealthCheck.data_too_large])

COLUMNS = {kind: [c.name for c in _columns(kind, UTC_ZONE)] for kind in KINDS}
# csv's default field limit is 131,072 characters: one field below it, one above.
HUGE = ["x" * 70_000, "y" * 200_000]
NASTY = [
    "", " ", "=cmd|' /C calc'!A0", "+1+1", "-2+3", "@SUM(A1)", '"', '""', "a,b", "line\nbreak",
    "\r", "\ufeff", "\u202e", "9999-12-31T23:59:59-14:00", "0001-01-01T00:00+14:00",
    "2026-02-30", "2026-03-01T25:00", "NaN", "inf", "-inf", "1e309", "-0", "99999999999999999999",
    "S-1", "U-FZ", "emergency", "elective", "sofa", "news2", "fit_for_discharge", "2",
    "2026-03-01T10:00", "2026-03-01", "08:00", "24:00", "ward", "f",
]


@pytest.fixture
def seeded_db(db_url: str) -> str:
    """A unit and a stay, so generated rows can also pass the checks against the store."""
    with db.session_scope(db_url) as session:
        import_file(session, "units", b"unit,beds\nU-FZ,10\n", "units.csv", tz=UTC_ZONE)
        import_file(session, "stays", b"stay_id,unit,admitted_at,admission_type\n"
                    b"S-1,U-FZ,2026-01-01T00:00,emergency\n", "stays.csv", tz=UTC_ZONE)
    return db_url


def table_counts(session: Session) -> dict[str, int]:
    return {t.name: session.scalar(select(func.count()).select_from(t)) or 0
            for t in Base.metadata.sorted_tables}


def import_or_refuse(url: str, kind: str, data: bytes) -> None:
    session = Session(db.get_engine(url))
    try:
        before = table_counts(session)
        try:
            result = import_file(session, kind, data, "fuzz.csv", tz=UTC_ZONE, actor="fuzz")
        except ImportRefused as refused:
            assert refused.problems and "nothing was imported" in refused.summary()
            session.rollback()
            assert table_counts(session) == before
        else:
            assert result.rows == result.inserted + result.updated + result.unchanged or \
                kind == "census"
    finally:
        session.rollback()  # each example starts from the same database
        session.close()


def to_csv(header: list[str], rows: list[list[str]], quoted: bool) -> str:
    if quoted:
        out = io.StringIO()
        writer = csv.writer(out, lineterminator="\n")
        writer.writerow(header)
        writer.writerows(rows)
        return out.getvalue()
    # Joined without quoting: stray quotes and separators make malformed CSV.
    return "\n".join(",".join(r) for r in [header, *rows]) + "\n"


# NUL bytes refuse a whole file before its cells are read, so cells leave them out (the
# random-bytes test has them); otherwise few files would reach the cell parsers.
cells = st.one_of(st.sampled_from(NASTY + HUGE), st.sampled_from(NASTY),
                  st.text(st.characters(blacklist_categories=("Cs",), blacklist_characters="\x00"),
                          max_size=20))


# Plausible and boundary values per column, so complete rows reach every check: the
# parsers, the checks within the file and those against the stored unit and stay.
STAMPS = ["2026-03-01T10:00", "2026-03-02T10:00+02:00", "2026-03-29T02:30", "2026-02-30T00:00",
          "9999-12-31T23:59:59-14:00", "0001-01-01T00:00+14:00", "2025-12-31T23:00"]
DAYS = ["2026-03-10", "2026-02-30", "9999-12-31", "0001-01-01", "10/03/2026"]
BY_COLUMN = {
    "unit": ["U-FZ", "U-NEW", "=1+1"], "stay_id": ["S-1", "S-2", "@S", "S-" + "9" * 70],
    "booking_id": ["K-1", "K-2"], "bed": ["B1", "B2"], "beds": ["0", "10", "-1", "10001", "1e3"],
    "age": ["0", "120", "121", "-1", "4.5"], "value": ["0", "24", "25", "NaN", "1e309", "-0"],
    "name": ["sofa", "news2", "fit_for_discharge", "SOFA", "x" * 65, "my_score"],
    "census_time": ["08:00", "24:00", "8", "07:60"], "sex": ["f", "m", "x", "q"],
    "admission_type": ["emergency", "elective", "urgent"], "outcome": ["home", "died", "lost"],
    "valid_from": DAYS, "planned_date": DAYS,
}


def column_cells(column: str) -> st.SearchStrategy[str]:
    typical = STAMPS if column.endswith("_at") else BY_COLUMN.get(column, ["cardiology"])
    return st.one_of(st.sampled_from(typical), st.sampled_from(typical), cells)


@st.composite
def sheets(draw: st.DrawFn, kind: str) -> tuple[list[str], list[list[str]]]:
    names = st.sampled_from([*COLUMNS[kind], "junk", "", " Unit ", "STAY_ID"])
    # Half the headers are complete (any order, maybe with unknown extras) with one cell
    # per column; the other half miss or repeat columns and have rows of any length.
    if draw(st.booleans()):
        extras = st.lists(st.sampled_from(["junk", "", "notes"]), max_size=2, unique=True)
        header = [*draw(st.permutations(COLUMNS[kind])), *draw(extras)]
        row = st.tuples(*(column_cells(c) for c in header)).map(list)
        return header, draw(st.lists(row, min_size=1, max_size=6))
    header = draw(st.lists(names, max_size=12))
    return header, draw(st.lists(st.lists(cells, max_size=12), max_size=6))


@FUZZ
@given(kind=st.sampled_from(KINDS), data=st.binary(max_size=3000))
def test_random_bytes(seeded_db: str, kind: str, data: bytes) -> None:
    import_or_refuse(seeded_db, kind, data)


@settings(FUZZ, max_examples=120)
@given(data=st.data(), kind=st.sampled_from(KINDS), quoted=st.booleans())
def test_headers_and_cells(seeded_db: str, data: st.DataObject, kind: str, quoted: bool) -> None:
    header, rows = data.draw(sheets(kind))
    import_or_refuse(seeded_db, kind, to_csv(header, rows, quoted).encode("utf-8"))


@FUZZ
@given(data=st.data(), kind=st.sampled_from(KINDS),
       encoding=st.sampled_from(["utf-16", "utf-32", "latin-1", "cp1252", "utf-8-sig"]))
def test_wrong_encodings(seeded_db: str, data: st.DataObject, kind: str, encoding: str) -> None:
    rows = data.draw(st.lists(st.lists(st.sampled_from(
        ["S-1", "U-FZ", "réanimation", "Süd–Station", "2026-03-01T10:00", "emergency", "3"]),
        min_size=len(COLUMNS[kind]), max_size=len(COLUMNS[kind])), max_size=4))
    text = to_csv(COLUMNS[kind], rows, quoted=True)
    import_or_refuse(seeded_db, kind, text.encode(encoding, errors="replace"))


def test_formula_like_cells_are_stored_as_written(seeded_db: str) -> None:
    """A formula-like cell is text to the importer; exports neutralise it (test_audit)."""
    with db.session_scope(seeded_db) as session:
        result = import_file(session, "units", b"unit,beds\n=1+1,4\n", "f.csv", tz=UTC_ZONE)
    assert result.inserted == 1


@pytest.mark.parametrize("stamp", ["9999-12-31T23:59:59-14:00", "0001-01-01T00:00:00+14:00"])
def test_timestamp_beyond_the_calendar_is_refused_not_a_crash(seeded_db: str,
                                                              stamp: str) -> None:
    """Converting these to UTC leaves year 1..9999; the file must be refused by line."""
    data = f"stay_id,unit,admitted_at,admission_type\nS-9,U-FZ,{stamp},emergency\n".encode()
    with (pytest.raises(ImportRefused, match="line 2, column admitted_at"),
          db.session_scope(seeded_db) as session):
        import_file(session, "stays", data, "s.csv", tz=UTC_ZONE)
