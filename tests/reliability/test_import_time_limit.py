"""An import has a time limit of its own: one that runs past it is rolled back and the
person is told so in plain words; it is never stored after they were told it failed.

Invented unit and bookings. Runs on SQLite and PostgreSQL.
"""

from __future__ import annotations

import time
from typing import Any

import pytest
from sqlalchemy import text

from app.ingest import retried
from app.ingest.retried import ImportTimedOut, import_once
from app.web import pages
from tests.conftest import UTC_ZONE
from tests.reliability.conftest import PASSWORD, ROLE_USERS, SecuredApp
from tests.reliability.live import UNIT, own_engine, seed_unit
from tests.security.fixtures import csrf, signed_in_client

pytestmark = pytest.mark.both_databases

LIMIT_S = 0.2
BOOKINGS = (f"booking_id,unit,booked_at,planned_date\nBK-LATE-1,{UNIT},2026-11-30T08:00,"
            "2026-12-20\n").encode()


def slow_imports(monkeypatch: pytest.MonkeyPatch) -> None:
    """Each import does all its work, then takes longer than LIMIT_S before returning."""
    real = retried.import_file

    def late(*args: Any, **kwargs: Any) -> Any:
        result = real(*args, **kwargs)
        time.sleep(LIMIT_S * 2)
        return result

    monkeypatch.setattr(retried, "import_file", late)


def stored(url: str) -> tuple[int, int]:
    engine = own_engine(url)
    with engine.connect() as connection:
        bookings = connection.execute(text(
            "SELECT count(*) FROM booking WHERE booking_id = 'BK-LATE-1'")).scalar()
        batches = connection.execute(text(
            "SELECT count(*) FROM import_batch WHERE filename = 'late.csv'")).scalar()
    engine.dispose()
    return int(bookings or 0), int(batches or 0)


def test_an_import_past_its_limit_is_rolled_back(db_url: str,
                                                 monkeypatch: pytest.MonkeyPatch) -> None:
    seed_unit(db_url)
    slow_imports(monkeypatch)
    with pytest.raises(ImportTimedOut, match="nothing was stored"):
        import_once(db_url, "bookings", BOOKINGS, "late.csv", tz=UTC_ZONE, limit_s=LIMIT_S)
    assert stored(db_url) == (0, 0)


def test_an_upload_past_its_limit_is_answered_in_plain_words(
        secured: SecuredApp, monkeypatch: pytest.MonkeyPatch) -> None:
    seed_unit(secured.db_url)
    client = signed_in_client(secured.app, ROLE_USERS["bed_manager"], PASSWORD)
    slow_imports(monkeypatch)
    monkeypatch.setattr(pages, "IMPORT_TIME_LIMIT_S", LIMIT_S)
    answer = client.post("/data/upload", data={"csrf_token": csrf(client), "kind": "bookings"},
                         files={"file": ("late.csv", BOOKINGS, "text/csv")})
    assert answer.status_code == 503
    assert "took longer than 0.2 seconds and was stopped; nothing was stored" in answer.text
    assert "Error" not in answer.text
    assert stored(secured.db_url) == (0, 0)
