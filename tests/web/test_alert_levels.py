"""A unit's alert levels through the page, the API and the command line: one bound, stored on
the unit, audited with the values before and after (app/store/unit_levels.py).

The bounds (1% to 99%, warning below alarm) are the project's own rule (app/bounds.py,
common practice, no source); the defaults 10% / 25% likewise (app/alert_levels.py)."""

from __future__ import annotations

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import select

from app.cli.main import main
from app.ingest import import_file
from app.store import db
from app.store.models import AuditEvent, Unit
from app.web.app import create_app
from tests.conftest import UTC_ZONE
from tests.security.fixtures import csrf, issue_token, make_user, signed_in_client

pytestmark = pytest.mark.both_databases
PASSWORD = "levels-test-password-1"
UNIT = "U-LVL"


def stored(db_url: str) -> tuple[float | None, float | None, list[AuditEvent]]:
    with db.session_scope(db_url) as session:
        unit = session.get(Unit, UNIT)
        assert unit is not None
        events = session.scalars(select(AuditEvent).where(
            AuditEvent.entity == "unit", AuditEvent.entity_id == UNIT,
            AuditEvent.action == "update").order_by(AuditEvent.id)).all()
        session.expunge_all()
        return unit.warning_level, unit.alarm_level, list(events)


def test_levels_by_page_api_and_cli_share_one_bound_and_are_audited(db_url: str) -> None:
    with db.session_scope(db_url) as session:
        import_file(session, "units", f"unit,beds\n{UNIT},12\n".encode(), "units.csv",
                    tz=UTC_ZONE)
    make_user(db_url, "lvl.manager", "bed_manager", PASSWORD)
    make_user(db_url, "lvl.scheduler", "scheduler", PASSWORD)
    app = create_app(db_url)
    manager = signed_in_client(app, "lvl.manager", PASSWORD)

    # Defaults until set.
    page = manager.get(f"/units/{UNIT}/levels")
    assert page.status_code == 200 and "The site's defaults (10% and 25%)" in page.text

    # The page takes percentages; a refusal is shown on the form, nothing stored.
    answer = manager.post(f"/units/{UNIT}/levels", follow_redirects=False,
                          data={"csrf_token": csrf(manager), "warning": "30", "alarm": "20"})
    assert answer.status_code == 422 and "must be below the alarm level" in answer.text
    assert 'class="flash"' not in answer.text
    assert stored(db_url)[:2] == (None, None)
    answer = manager.post(f"/units/{UNIT}/levels", follow_redirects=False,
                          data={"csrf_token": csrf(manager), "warning": "15", "alarm": "30"})
    assert answer.status_code == 303
    warning, alarm, events = stored(db_url)
    assert (warning, alarm) == (0.15, 0.30)
    assert events[-1].actor == "lvl.manager"
    assert events[-1].before == {"warning_level": None, "alarm_level": None}
    assert events[-1].after == {"warning_level": 0.15, "alarm_level": 0.30}

    # Only a bed manager sets them (the scheduler is refused by the same rule as the API).
    scheduler = signed_in_client(app, "lvl.scheduler", PASSWORD)
    assert "Save the levels" not in scheduler.get(f"/units/{UNIT}/levels").text
    refused = scheduler.post(f"/units/{UNIT}/levels",
                             data={"csrf_token": csrf(scheduler), "warning": "5", "alarm": "9"})
    assert refused.status_code == 403 and stored(db_url)[:2] == (0.15, 0.30)

    # The API takes chances; out of bounds is a 422 naming the range.
    api = TestClient(app)
    token = {"Authorization": f"Bearer {issue_token(db_url, 'lvl.manager')}"}
    bad = api.put(f"/api/units/{UNIT}/levels", headers=token, json={"warning": 0.0, "alarm": 0.2})
    assert bad.status_code == 422 and "1% to 99%" in bad.json()["detail"]
    good = api.put(f"/api/units/{UNIT}/levels", headers=token, json={"warning": 0.2, "alarm": 0.4})
    assert good.status_code == 200 and good.json()["warning"] == 0.2
    assert api.get(f"/api/units/{UNIT}/levels", headers=token).json()["alarm"] == 0.4

    # The command line, same bound and audit.
    assert main(["--db", db_url, "unit", "levels", "--unit", UNIT, "--warning", "0.5",
                 "--alarm", "1.5"]) == 2
    assert main(["--db", db_url, "unit", "levels", "--unit", UNIT, "--warning", "0.05",
                 "--alarm", "0.2"]) == 0
    warning, alarm, events = stored(db_url)
    assert (warning, alarm) == (0.05, 0.2) and len(events) == 3
    assert events[-1].before == {"warning_level": 0.2, "alarm_level": 0.4}
    assert events[-1].actor.startswith("cli:")
    db.release_engine(db_url)
