"""Training from the model page: recorded by the web process, done by a process of its own.

- Who may start a run, one run at a time per unit (also when requests race on both
  databases), the audit event, and a dead run being ended and making way.
- End to end on the demo hospital (invented): the page starts a real training process,
  keeps answering while it runs, shows its progress, and the model it stored is the one
  the forecasts then use.
"""

from __future__ import annotations

import html
import json
import shutil
import threading
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import select

from app.config import get_settings
from app.forecast import training_jobs
from app.forecast.models import newest_model
from app.forecast.training_jobs import TrainingBusy, request_training
from app.ingest import import_file
from app.store import db
from app.store.models import AuditEvent, TrainedModel, TrainingRun
from app.web.app import create_app
from tests.conftest import UTC_ZONE
from tests.security.fixtures import form_csrf, make_user, signed_in_client

pytestmark = [pytest.mark.both_databases, pytest.mark.usefixtures("utc_site")]

PASSWORD = "a long test password"
UNIT = "U-TR"
T0 = datetime(2026, 3, 2, 8, 0, tzinfo=UTC)


def seeded(url: str) -> str:
    with db.session_scope(url) as session:
        import_file(session, "units", f"unit,beds\n{UNIT},6\n".encode(), "units.csv",
                    tz=UTC_ZONE)
    make_user(url, "bm.train", "bed_manager", PASSWORD)
    make_user(url, "viewer.train", "viewer", PASSWORD)
    return url


def runs(url: str) -> list[TrainingRun]:
    with db.session_scope(url) as session:
        return list(session.scalars(select(TrainingRun).order_by(TrainingRun.id)))


def test_only_a_bed_manager_starts_one_run_at_a_time(db_url: str,
                                                     monkeypatch: pytest.MonkeyPatch) -> None:
    started: list[int] = []
    # No process here (the end-to-end test starts real ones): record what would be started.
    monkeypatch.setattr("app.web.routes_training.start_process",
                        lambda url, run_id: started.append(run_id))
    app = create_app(seeded(db_url))
    viewer = signed_in_client(app, "viewer.train", PASSWORD)
    page = viewer.get(f"/units/{UNIT}/training")
    assert page.status_code == 200 and "Train now" not in page.text
    denied = viewer.post(f"/units/{UNIT}/training", data={"csrf_token": form_csrf(page.text)},
                         follow_redirects=False)
    assert denied.status_code == 403 and runs(db_url) == [] and started == []

    manager = signed_in_client(app, "bm.train", PASSWORD)
    page = manager.get(f"/units/{UNIT}/training")
    assert "Train now" in page.text and "Refresh" not in page.headers
    token = form_csrf(page.text)
    answer = manager.post(f"/units/{UNIT}/training", data={"csrf_token": token},
                          follow_redirects=False)
    assert answer.status_code == 303 and "started" in answer.headers["location"]
    (run,) = runs(db_url)
    assert (run.status, run.active_unit, run.requested_by) == ("queued", UNIT, "bm.train")
    assert started == [run.id]
    again = manager.post(f"/units/{UNIT}/training", data={"csrf_token": token})
    assert "already queued or running" in again.text and len(runs(db_url)) == 1
    assert again.headers["refresh"] == "3" and "Train now" not in again.text
    with db.session_scope(db_url) as session:
        event = session.scalar(select(AuditEvent).where(AuditEvent.entity == "training_run"))
        assert event is not None and (event.actor, event.entity_id) == ("bm.train", str(run.id))
    assert manager.post("/units/NOPE/training", data={"csrf_token": token}).status_code == 404
    listed = manager.get(f"/api/units/{UNIT}/training").json()
    assert [(r["id"], r["status"]) for r in listed] == [(run.id, "queued")]


def test_requests_at_the_same_moment_make_one_run(db_url: str) -> None:
    seeded(db_url)
    start = threading.Barrier(6)
    made: list[int] = []
    busy: list[TrainingBusy] = []
    errors: list[BaseException] = []

    def ask(n: int) -> None:
        try:
            start.wait(timeout=30)
            made.append(request_training(db_url, UNIT, f"bm{n}", T0))
        except TrainingBusy as exc:
            busy.append(exc)
        except BaseException as exc:  # collected: a thread's failure must fail the test
            errors.append(exc)

    threads = [threading.Thread(target=ask, args=(n,)) for n in range(6)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=60)
    assert not errors, errors
    assert len(made) == 1 and len(busy) == 5
    assert [r.id for r in runs(db_url)] == made


def test_a_run_whose_process_died_is_ended_and_makes_way(db_url: str) -> None:
    seeded(db_url)
    now = datetime.now(UTC)
    first = request_training(db_url, UNIT, "bm.train", T0, now=now - timedelta(minutes=10))
    with db.session_scope(db_url) as session:  # it started, then its beat stopped
        run = session.get(TrainingRun, first)
        assert run is not None
        run.status, run.started_at = "running", now - timedelta(minutes=9)
        run.heartbeat_at = now - training_jobs.STALE_AFTER - timedelta(seconds=1)
    app = create_app(db_url)
    manager = signed_in_client(app, "bm.train", PASSWORD)
    page = manager.get(f"/units/{UNIT}/training")
    assert "stopped" in page.text and "Refresh" not in page.headers  # not shown as going
    second = request_training(db_url, UNIT, "bm.train", T0, now=now)
    old, new = runs(db_url)
    assert (old.id, old.status, old.active_unit) == (first, "failed", None)
    assert "stopped without finishing" in (old.message or "")
    assert (new.id, new.status) == (second, "queued")


def test_a_run_of_a_unit_without_enough_history_fails_with_a_reason(db_url: str) -> None:
    seeded(db_url)
    run_id = request_training(db_url, UNIT, "bm.train", T0)
    assert training_jobs.run_training(db_url, run_id) == 1
    (run,) = runs(db_url)
    assert (run.status, run.active_unit, run.model_id) == ("failed", None, None)
    assert run.message and run.finished_at is not None and run.started_at is not None
    assert training_jobs.run_training(db_url, run_id) == 1  # an ended run is not run again


@pytest.mark.slow
def test_the_page_starts_a_real_training_process_and_shows_it(
        demo_db: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """On SQLite only (a copy of the demo): the steps are the same SQL the tests above run
    on both databases."""
    path = tmp_path / "demo.db"
    shutil.copy(demo_db.removeprefix("sqlite:///"), path)
    url = f"sqlite:///{path}"
    demo_now = datetime(2026, 11, 30, 8, 0, tzinfo=UTC)  # the demo's last census morning
    monkeypatch.setenv("MORROW_NOW", demo_now.isoformat())
    get_settings.cache_clear()
    make_user(url, "bm.train", "bed_manager", PASSWORD)
    app = create_app(url)
    manager = signed_in_client(app, "bm.train", PASSWORD)
    model_page = manager.get("/units/KV-CRIT/model")
    assert "/units/KV-CRIT/training" in model_page.text
    page = manager.get("/units/KV-CRIT/training")
    answer = manager.post("/units/KV-CRIT/training", data={"csrf_token": form_csrf(page.text)},
                          follow_redirects=False)
    assert answer.status_code == 303
    seen: set[str] = set()
    pages_while_running = 0
    deadline = time.monotonic() + 600
    while time.monotonic() < deadline:
        (latest,) = manager.get("/api/units/KV-CRIT/training").json()
        seen.add(latest["status"])
        if latest["status"] not in ("queued", "running"):
            break
        if latest["status"] == "running":  # the page answers while the fit runs elsewhere
            running_page = manager.get("/units/KV-CRIT/training")
            assert running_page.status_code == 200
            # Asked after the page: still running then means it ran while the page was made
            # (a run never goes back to running); the fit may also have ended in between.
            (after,) = manager.get("/api/units/KV-CRIT/training").json()
            if after["status"] == "running":
                assert "reading the history" in running_page.text
                assert running_page.headers["refresh"] == "3"
                pages_while_running += 1
        time.sleep(1.0)
    assert latest["status"] == "done", latest
    assert "running" in seen and pages_while_running >= 1
    with db.session_scope(url) as session:
        run = session.get(TrainingRun, latest["id"])
        assert run is not None and run.heartbeat_at is not None and run.started_at is not None
        assert run.started_at <= run.heartbeat_at <= run.finished_at
        stored = session.get(TrainedModel, latest["model_id"])
        assert stored is not None and stored.trained_until == demo_now
        found = newest_model(session, "KV-CRIT", demo_now)
        assert found is not None and found[0] == latest["model_id"]  # what forecasts now use
        terms = json.loads(stored.payload)["arrivals"]["emergency"]["terms"]
    # The new model's page says which demand patterns were chosen, and on what evidence.
    shown = manager.get("/units/KV-CRIT/model").text
    assert "Emergency demand: which patterns the forecast uses" in shown
    assert "Chosen by replaying the last 13 weeks" in shown
    assert "is measured on the same 91 replayed days" in shown  # the held-out dispersion
    # ... and whether the days forecast from one morning miss together (shared variance).
    assert "forecast from one morning" in shown and "miss together" in shown
    # The yearly pattern chosen, as the stored model has it; the hospital's is among the
    # candidates scored (the demo's two units hold more than the year and a half it needs).
    text = html.unescape(shown)
    assert {False: "no yearly pattern", True: "the unit's own yearly pattern",
            "hospital": "the hospital's yearly pattern"}[terms["seasonal"]] in text
    assert any(row["seasonal"] == "hospital" for row in terms["scores"])
    assert "<td>the hospital's</td>" in text
    done_page = TestClient(app).get("/units/KV-CRIT/training", follow_redirects=False)
    assert done_page.status_code == 303  # signed out: sent to sign in, nothing shown
    db.release_engine(url)
