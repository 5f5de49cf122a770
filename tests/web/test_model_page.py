"""The model page in plain words, fast: the track record, the cache, a backtest started from
the page (a process of its own, with progress, cancellable) and training runs cancelled.

References: the census count is checked against a hand-worked example and against the
project's own as-of rule (``UnitState.occupancy_at``), which tests/state/test_as_of.py checks;
the sentences against counts worked by hand.
"""

from __future__ import annotations

import json
import shutil
import time
from datetime import UTC, date, datetime, timedelta
from pathlib import Path

import pandas as pd
import pytest

from app.config import get_settings
from app.forecast import backtest_jobs, training_jobs
from app.forecast.models import newest_model
from app.ingest import import_file
from app.state import load_state
from app.store import db
from app.store.models import BacktestRun, TrainingRun
from app.web import model_page, model_track
from app.web.app import create_app
from tests.conftest import UTC_ZONE
from tests.security.fixtures import form_csrf, make_user, signed_in_client
from tests.web.served import trained_copy

PASSWORD = "a long test password"
DEMO_NOW = datetime(2026, 11, 30, 8, 0, tzinfo=UTC)


pytestmark = pytest.mark.usefixtures("utc_site")


def test_census_counts_by_hand(db_url: str) -> None:
    with db.session_scope(db_url) as session:
        import_file(session, "units", b"unit,beds\nU1,4\n", "units.csv", tz=UTC_ZONE)
        import_file(session, "stays", (
            b"stay_id,unit,admitted_at,discharged_at,admission_type\n"
            b"A,U1,2026-03-01T10:00:00+00:00,2026-03-03T09:00:00+00:00,emergency\n"
            b"B,U1,2026-03-02T12:00:00+00:00,,elective\n"
            b"C,U1,2026-03-02T23:00:00+00:00,2026-03-03T00:00:00+00:00,emergency\n"
        ), "stays.csv", tz=UTC_ZONE)
    at = [datetime(2026, 3, 2, 0, 0, tzinfo=UTC), datetime(2026, 3, 3, 0, 0, tzinfo=UTC),
          datetime(2026, 3, 4, 0, 0, tzinfo=UTC)]
    with db.session_scope(db_url) as session:
        # By hand: 2 Mar 00:00 only A; 3 Mar 00:00 A and B (C left at exactly 00:00, so it
        # is out: "discharged by the instant"); 4 Mar 00:00 only B.
        assert model_track.census_counts(session, "U1", at) == [1, 2, 1]


def test_census_counts_agree_with_the_state_on_the_demo(demo_db: str) -> None:
    instants = [DEMO_NOW - timedelta(days=d, hours=8) for d in range(1, 40, 3)]
    with db.session_scope(demo_db) as session:
        counts = model_track.census_counts(session, "KV-SURG", instants)
        state = load_state(session, "KV-SURG", DEMO_NOW, UTC_ZONE, with_history=True)
    assert counts == [state.occupancy_at(pd.Timestamp(t)) for t in instants]
    assert min(counts) > 0


def _past(inside: int, outside: int) -> list[model_track.PastForecast]:
    t = datetime(2026, 3, 1, tzinfo=UTC)
    return ([model_track.PastForecast(t, t, 10, 8, 12, 10)] * inside
            + [model_track.PastForecast(t, t, 10, 8, 12, 13)] * outside)


def test_sentences_count_by_hand() -> None:
    sentence = model_track.shown_sentence(_past(24, 6))
    assert sentence is not None
    assert "last 30 mornings' forecasts for tonight" in sentence
    assert "inside the 80% band 24 times" in sentence and "about 24 expected" in sentence
    assert model_track.shown_sentence([]) is None
    # A backtest of 30 mornings, 7 nights ahead; 0.8 of 30 is 24, 0.75 of 210 is 157.5.
    result = {"from": "2026-10-01", "to": "2026-10-30", "days": 7, "methods": {
        "morrow": {"by_horizon": [{"n": 30, "coverage_80": 0.8}],
                   "all": {"n": 210, "coverage_80": 0.75, "mae_median": 1.25, "crps": 1.5}},
        "yesterday": {"all": {"crps": 2.0}}, "time_series": {"all": {"crps": 1.6}}}}
    verdict = model_track.backtest_verdict(result)
    assert verdict is not None
    assert "Of 30 mornings replayed" in verdict.tonight and "band of the forecast 24 times" \
        in verdict.tonight
    assert "158 fell inside" in verdict.week or "157 fell inside" in verdict.week
    # Best baseline: time_series (1.6); (1.6 - 1.5) / 1.6 = 6.25%, shown as 6%.
    assert verdict.against is not None and "6% better" in verdict.against
    assert "seasonal time series" in verdict.against


@pytest.fixture
def demo_copy(demo_db: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> str:
    path = tmp_path / "demo.db"
    shutil.copy(demo_db.removeprefix("sqlite:///"), path)
    url = f"sqlite:///{path}"
    monkeypatch.setenv("MORROW_NOW", DEMO_NOW.isoformat())
    get_settings.cache_clear()
    make_user(url, "bm.model", "bed_manager", PASSWORD)
    make_user(url, "viewer.model", "viewer", PASSWORD)
    return url


def _store_done(url: str, unit: str, n: int, hits: int) -> int:
    result = {"unit": unit, "from": "2026-11-01", "to": "2026-11-14", "days": 7,
              "state": "done", "methods": {"morrow": {
                  "by_horizon": [{"n": n, "coverage_80": hits / n}],
                  "all": {"n": 7 * n, "coverage_80": 0.8, "mae_median": 1.0, "crps": 1.0,
                          "coverage_95": 0.95, "pit_80": 0.8, "pit_80_se": 0.031}}},
              "pit": {"morrow": [0.5] * n}}
    with db.session_scope(url) as session:
        row = BacktestRun(unit=unit, date_from=date(2026, 11, 1), date_to=date(2026, 11, 14),
                          days=7, result=json.dumps(result))
        session.add(row)
        session.flush()
        return row.id


def test_the_page_is_kept_and_follows_a_new_backtest(
        demo_copy: str, monkeypatch: pytest.MonkeyPatch) -> None:
    app = create_app(demo_copy)
    viewer = signed_in_client(app, "viewer.model", PASSWORD)
    builds: list[str] = []
    real = model_page._record_part
    monkeypatch.setattr(model_page, "_record_part",
                        lambda s, u, n: builds.append(u) or real(s, u, n))
    first = viewer.get("/units/KV-CRIT/model")
    again = viewer.get("/units/KV-CRIT/model")
    assert first.status_code == again.status_code == 200
    assert builds == ["KV-CRIT"]  # the second view was served from the cache
    assert "No track record yet" in first.text and "morrow backtest" not in first.text
    assert "Start a backtest" not in first.text  # a viewer may not start one
    _store_done(demo_copy, "KV-CRIT", 14, 11)
    after = viewer.get("/units/KV-CRIT/model")
    assert builds == ["KV-CRIT", "KV-CRIT"]
    assert "census that night fell inside the 80% band of the forecast 11 times" in after.text
    assert "80% ± 3%" in after.text  # the PIT share beside its standard error
    assert "too short for one" not in after.text
    for term in ("CRPS", "PIT", "Concordance", "Kaplan-Meier", "BIC", "80% band"):
        assert f"<dt>{term}</dt>" in after.text


def test_a_viewer_cannot_start_or_cancel_a_backtest(demo_copy: str) -> None:
    app = create_app(demo_copy)
    viewer = signed_in_client(app, "viewer.model", PASSWORD)
    page = viewer.get("/units/KV-CRIT/model")
    token = form_csrf(page.text)
    assert viewer.post("/units/KV-CRIT/backtests", data={"csrf_token": token, "mornings": 14},
                       follow_redirects=False).status_code == 403
    with db.session_scope(demo_copy) as session:
        assert session.query(BacktestRun).count() == 0


def test_one_backtest_at_a_time_and_a_queued_one_cancels(demo_copy: str) -> None:
    start, end = date(2026, 11, 9), date(2026, 11, 22)
    first = backtest_jobs.request_backtest(demo_copy, "KV-CRIT", "bm.model", start, end, 7)
    with pytest.raises(backtest_jobs.BacktestBusy):
        backtest_jobs.request_backtest(demo_copy, "KV-CRIT", "bm.model", start, end, 7)
    assert backtest_jobs.cancel_backtest(demo_copy, first, "bm.model")
    with db.session_scope(demo_copy) as session:
        row = session.get(BacktestRun, first)
        assert row is not None
        assert backtest_jobs.state_of(row)["state"] == "cancelled"
    assert backtest_jobs.run_job(demo_copy, first) == 1  # a cancelled run never starts
    second = backtest_jobs.request_backtest(demo_copy, "KV-CRIT", "bm.model", start, end, 7)
    assert second != first


def test_backtest_span_ends_when_the_last_week_has_passed() -> None:
    # Mon 30 Nov 08:00: the last morning whose 7 census nights have all passed is Sun 22 Nov
    # (its 7th census is Sun 29 Nov 00:00 or Sat 28 Nov 23:00); 14 mornings start Mon 9 Nov.
    assert backtest_jobs.backtest_span(DEMO_NOW, UTC_ZONE, 14) == (date(2026, 11, 9),
                                                                  date(2026, 11, 22))


@pytest.mark.slow
def test_the_page_starts_a_backtest_process_shows_progress_and_its_result(
        demo_copy: str) -> None:
    app = create_app(demo_copy)
    manager = signed_in_client(app, "bm.model", PASSWORD)
    page = manager.get("/units/KV-CRIT/model")
    assert "Start a backtest" in page.text
    answer = manager.post("/units/KV-CRIT/backtests",
                          data={"csrf_token": form_csrf(page.text), "mornings": 14},
                          follow_redirects=False)
    assert answer.status_code == 303 and "started" in answer.headers["location"]
    seen: set[str] = set()
    deadline = time.monotonic() + 300
    while time.monotonic() < deadline:
        view = manager.get("/units/KV-CRIT/model")
        with db.session_scope(demo_copy) as session:
            (run,) = backtest_jobs.views(session, "KV-CRIT")
        seen.add(run.state)
        if not run.active:
            break
        if run.state == "running":
            assert view.headers.get("refresh") == "3" and "<progress" in view.text
        time.sleep(1.0)
    assert run.state == "done", run
    assert "running" in seen or "queued" in seen
    final = manager.get("/units/KV-CRIT/model")
    assert "refresh" not in final.headers
    assert "Of 14 mornings replayed from 2026-11-09 to 2026-11-22" in final.text
    # One fortnight of mornings gives no standard error, and the page says why.
    assert "This backtest is too short for one" in final.text


def test_a_running_training_run_is_cancelled_at_its_next_beat(db_url: str) -> None:
    with db.session_scope(db_url) as session:
        import_file(session, "units", b"unit,beds\nU-TR,6\n", "units.csv", tz=UTC_ZONE)
    run_id = training_jobs.request_training(db_url, "U-TR", "bm", DEMO_NOW)
    with db.session_scope(db_url) as session:
        run = session.get(TrainingRun, run_id)
        assert run is not None
        run.status, run.started_at = "running", datetime.now(UTC)
    assert training_jobs._beat(db_url, run_id) == "running"
    assert training_jobs.cancel_training(db_url, run_id, "bm")
    assert training_jobs._beat(db_url, run_id) == "cancelled"  # the process exits here
    with db.session_scope(db_url) as session:
        run = session.get(TrainingRun, run_id)
        assert run is not None
        assert (run.status, run.active_unit) == ("cancelled", None)
        assert run.message == "cancelled by bm"
    assert not training_jobs.cancel_training(db_url, run_id, "bm")  # already ended
    # The unit is free for a new run.
    assert training_jobs.request_training(db_url, "U-TR", "bm", DEMO_NOW) != run_id


def test_without_a_model_the_page_names_the_step_in_words(demo_copy: str) -> None:
    manager = signed_in_client(create_app(demo_copy), "bm.model", PASSWORD)
    page = manager.get("/units/KV-CRIT/model")  # the demo copy holds no trained model
    assert page.status_code == 200
    assert "No model has been trained for KV-CRIT yet" in page.text
    assert "/units/KV-CRIT/training" in page.text and "morrow train" not in page.text


def test_the_page_says_how_the_yardstick_was_chosen(
        demo_db: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    url = trained_copy(demo_db, tmp_path, ("KV-CRIT",))
    monkeypatch.setenv("MORROW_NOW", DEMO_NOW.isoformat())
    get_settings.cache_clear()
    make_user(url, "viewer.model", "viewer", PASSWORD)
    with db.session_scope(url) as session:
        found = newest_model(session, "KV-CRIT", DEMO_NOW)
    assert found is not None
    metrics = found[2]["metrics"]
    settings, gap = metrics["ensemble_settings"], metrics["ensemble_gap"]["ibs_1_14"]
    page = signed_in_client(create_app(url), "viewer.model", PASSWORD).get(
        "/units/KV-CRIT/model")
    assert page.status_code == 200
    assert (f"{metrics['ensemble_iterations']} rounds at learning rate "
            f"{settings['learning_rate']}, up to {settings['max_leaf_nodes']} leaves of at "
            f"least {settings['min_samples_leaf']} patient-days") in page.text
    assert (f"the tree is {abs(gap) * 100:.1f}% {'worse' if gap > 0 else 'better'} "
            "than it") in page.text
