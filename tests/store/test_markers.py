"""The data markers the page's forecast cache is keyed by change with every committed write,
also when writers on PostgreSQL commit in another order than they were given their ids.
Invented unit and stays."""

from __future__ import annotations

import pytest
from sqlalchemy import select

from app.ingest import import_file
from app.store import db, repo
from app.store.audit import form_batch
from app.store.models import ImportBatch
from tests.conftest import UTC_ZONE
from tests.databases import PostgresDatabases

pytestmark = pytest.mark.both_databases


def markers(url: str) -> repo.DataMarkers:
    with db.session_scope(url) as session:
        return repo.data_markers(session)


def test_every_write_moves_the_markers(db_url: str) -> None:
    empty = markers(db_url)
    assert (empty.latest, empty.structure, empty.written_at) == (0, 0, None)
    with db.session_scope(db_url) as session:
        import_file(session, "units", b"unit,beds\nU-MK,4\n", "units.csv", tz=UTC_ZONE)
        import_file(session, "stays", b"stay_id,unit,admitted_at,admission_type\n"
                    b"S-1,U-MK,2026-03-01T10:00,emergency\n", "stays.csv", tz=UTC_ZONE)
    after_stays = markers(db_url)
    assert (after_stays.latest, after_stays.structure) == (2, 2)
    assert after_stays.written_at is not None
    with db.session_scope(db_url) as session:
        import_file(session, "observations", b"stay_id,observed_at,name,value\n"
                    b"S-1,2026-03-02T08:00,sofa,3\n", "obs.csv", tz=UTC_ZONE)
    after_score = markers(db_url)
    # A score changes the data, not the structure (stays, bookings, units, beds).
    assert (after_score.latest, after_score.structure) == (3, 2)


def test_a_lower_id_committed_last_still_moves_the_marker(
        postgres_databases: PostgresDatabases) -> None:
    """PostgreSQL gives ids when rows are inserted, not when they are committed."""
    with postgres_databases.fresh() as url:
        factory = db.session_factory(url)
        first, second = factory(), factory()
        try:
            early = form_batch(first, "writer.a", "POST /test")  # takes the lower id
            late = form_batch(second, "writer.b", "POST /test")
            assert early.id < late.id
            second.commit()
            seen = markers(url)
            first.commit()
            now = markers(url)
        finally:
            first.close()
            second.close()
        assert now.latest == seen.latest + 1
        with db.session_scope(url) as session:
            stored = session.scalars(select(ImportBatch.id).order_by(ImportBatch.id)).all()
        assert stored == [early.id, late.id]
