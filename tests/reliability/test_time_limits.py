"""Long requests have a time limit, and the server stops on SIGTERM while one runs.

Failure 3: a planning request computed for 12+ minutes and SIGTERM could not stop the server.
Invented units: ``small_unit`` (TB-NORTH) and a busy one made here (BZ-EAST: about 26
emergency admissions a day, seeded), whose planning at the page's largest settings computes
for much longer than the few seconds the shutdown may take.
"""

from __future__ import annotations

import os
import signal
import subprocess
import threading
import time
from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from pathlib import Path

import httpx2 as httpx
import numpy as np
import pytest
from fastapi.testclient import TestClient

from app.cli.main import main
from app.config import get_settings
from app.forecast.service import train_model
from app.ingest import import_file
from app.store import db
from app.web.app import create_app
from tests.conftest import UTC_ZONE
from tests.reliability import small_unit
from tests.reliability.conftest import PASSWORD, ROLE_USERS
from tests.security.fixtures import form_csrf, issue_token, make_user, signed_in_client
from tests.web.served import start

BUSY_UNIT = "BZ-EAST"
BUSY_NOW = datetime(2026, 10, 5, 8, 0, tzinfo=UTC)  # a Monday morning
# The page's largest run (two years, 20 replications) with three times the admissions.
LONG_PLAN = ("target=5&years=2&replications=20&s1=arrivals&s1_type=all&s1_arrivals=200"
             "&s2=stay&s2_group=longest&s2_stay=100")
SHUTDOWN_WITHIN_S = 10.0


@pytest.fixture
def settings_env(monkeypatch: pytest.MonkeyPatch) -> Iterator[pytest.MonkeyPatch]:
    monkeypatch.setenv("MORROW_TIMEZONE", "UTC")
    get_settings.cache_clear()
    yield monkeypatch
    get_settings.cache_clear()


@pytest.mark.both_databases
def test_a_request_past_its_limit_is_stopped_with_a_plain_message(
        db_url: str, settings_env: pytest.MonkeyPatch) -> None:
    small_unit.load_unit(db_url)
    for role, name in ROLE_USERS.items():
        make_user(db_url, name, role, PASSWORD)
    settings_env.setenv("MORROW_NOW", small_unit.NOW.isoformat())
    settings_env.setenv("MORROW_REQUEST_SECONDS", "0.001")
    get_settings.cache_clear()
    app = create_app(db_url)
    client = signed_in_client(app, "view.test", PASSWORD)

    page = client.get(f"/units/{small_unit.UNIT}/planning?target=5&years=1&replications=10")
    assert page.status_code == 503, page.text[:300]
    assert "planning simulation took longer than its limit" in page.text
    assert "morrow plan" in page.text  # what to try instead
    assert "Traceback" not in page.text and "WorkCancelled" not in page.text

    bearer = {"Authorization": f"Bearer {issue_token(db_url, 'view.test')}"}
    answer = TestClient(app).get(f"/api/units/{small_unit.UNIT}/forecast", headers=bearer)
    assert answer.status_code == 503
    assert "took longer than its limit" in answer.json()["detail"]
    # Short requests are not affected by the limit.
    assert client.get("/health").status_code == 200
    assert TestClient(app).get("/api/whoami", headers=bearer).status_code == 200


def test_morrow_plan_past_its_limit_stops_with_a_plain_message(
        db_url: str, settings_env: pytest.MonkeyPatch,
        capsys: pytest.CaptureFixture[str]) -> None:
    small_unit.load_unit(db_url)
    settings_env.setenv("MORROW_NOW", small_unit.NOW.isoformat())
    settings_env.setenv("MORROW_COMMAND_SECONDS", "0.001")
    get_settings.cache_clear()
    capsys.readouterr()
    status = main(["--db", db_url, "plan", "--unit", small_unit.UNIT, "--years", "1",
                   "--replications", "10"])
    err = capsys.readouterr().err
    assert status == 1, err
    assert "planning simulation took longer than its limit" in err and "--years" in err
    assert "WorkCancelled" not in err


# -- SIGTERM while a long request runs ----------------------------------------------------------

def load_busy_unit(url: str, weeks: int = 8, seed: int = 29) -> None:
    """A busy invented unit: Poisson(26) emergency admissions a day, stays of about four
    days, a SOFA score at admission and each day after; trained at ``BUSY_NOW``."""
    rng = np.random.default_rng(seed)
    start_at = BUSY_NOW - timedelta(weeks=weeks)
    stays: list[list[object]] = []
    scores: list[list[object]] = []
    for day in range(weeks * 7):
        midnight = start_at + timedelta(days=day)
        for _ in range(int(rng.poisson(26))):
            number = len(stays) + 1
            admitted = midnight + timedelta(minutes=int(rng.integers(0, 24 * 60)))
            discharged = admitted + timedelta(hours=float(rng.lognormal(np.log(80), 0.6)))
            still_in = discharged > BUSY_NOW
            stays.append([f"BZ-S{number:05d}", BUSY_UNIT, small_unit.stamp(admitted),
                          "" if still_in else small_unit.stamp(discharged), "emergency",
                          "" if still_in else "home", int(rng.integers(18, 95)),
                          "f" if rng.random() < 0.5 else "m"])
            moment, sofa = admitted, int(rng.integers(0, 12))
            while moment < min(discharged, BUSY_NOW):
                scores.append([f"BZ-S{number:05d}", small_unit.stamp(moment), "sofa", sofa])
                sofa = int(np.clip(sofa + rng.integers(-2, 2), 0, 24))
                moment += timedelta(days=1)
    files = {
        "units": small_unit.csv_bytes(["unit", "beds", "census_time"], [[BUSY_UNIT, 90, "08:00"]]),
        "stays": small_unit.csv_bytes(["stay_id", "unit", "admitted_at", "discharged_at", "admission_type",
                       "outcome", "age", "sex"], stays),
        "observations": small_unit.csv_bytes(["stay_id", "observed_at", "name", "value"], scores),
    }
    with db.session_scope(url) as session:
        for kind, data in files.items():
            import_file(session, kind, data, f"{kind}.csv", tz=UTC_ZONE, actor="test-fixture")
    with db.session_scope(url) as session:
        train_model(session, BUSY_UNIT, BUSY_NOW, UTC_ZONE)
    db.release_engine(url)


def cpu_seconds(pid: int) -> float:
    """User plus system CPU time of a process (Linux /proc), in seconds."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def test_the_server_exits_soon_after_sigterm_while_a_long_request_runs(
        db_url: str, settings_env: pytest.MonkeyPatch) -> None:
    """On SQLite only: what keeps a server from stopping is the computation, not the
    database, and a second run on PostgreSQL would double the suite's longest test."""
    load_busy_unit(db_url)
    make_user(db_url, "view.test", "viewer", PASSWORD)
    served = start(db_url, workers_env={"MORROW_NOW": BUSY_NOW.isoformat(),
                                        "MORROW_REQUEST_SECONDS": "600"})
    process = served.process
    try:
        with httpx.Client(base_url=served.base, timeout=httpx.Timeout(120.0)) as client:
            took, answers = _sigterm_during_long_plan(client, process.pid, process)
        print(f"server exited {took:.2f} s after SIGTERM; the request got {answers}")
        assert took < SHUTDOWN_WITHIN_S
        assert answers and answers[0] != 200, answers  # stopped, not finished
    finally:
        if process.poll() is None:
            process.kill()
            process.wait(timeout=10)
        if process.stderr is not None:
            process.stderr.close()


def _sigterm_during_long_plan(client: httpx.Client, pid: int,
                              process: subprocess.Popen[bytes]) -> tuple[float, list[object]]:
    """Sign in, start the long planning request, SIGTERM the server while it computes;
    returns the seconds the server took to exit and what the request got."""
    page = client.get("/signin")
    signed = client.post("/signin", data={"username": "view.test", "password": PASSWORD,
                                          "csrf_token": form_csrf(page.text), "next": "/"})
    assert signed.status_code in (200, 303)
    answers: list[object] = []

    def plan() -> None:
        try:
            answers.append(client.get(f"/units/{BUSY_UNIT}/planning?{LONG_PLAN}").status_code)
        except httpx.HTTPError as exc:
            answers.append(type(exc).__name__)

    asking = threading.Thread(target=plan, daemon=True)
    used = cpu_seconds(pid)
    asking.start()
    # The request is under way once the server has computed for a few seconds on it.
    waited = time.monotonic() + 60
    while cpu_seconds(pid) < used + 4 and time.monotonic() < waited:
        asking.join(timeout=0.2)
    assert asking.is_alive(), f"the planning request ended too soon to test: {answers}"
    asked_to_stop = time.monotonic()
    process.send_signal(signal.SIGTERM)
    try:
        process.wait(timeout=SHUTDOWN_WITHIN_S)
    except subprocess.TimeoutExpired:
        pytest.fail(f"the server still ran {SHUTDOWN_WITHIN_S:g} s after SIGTERM")
    took = time.monotonic() - asked_to_stop
    asking.join(timeout=10)
    return took, answers
