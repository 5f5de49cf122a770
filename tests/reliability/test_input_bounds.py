"""Every input has a bound: a value outside it is refused at once, in plain words, never a 500.

Reproduces failures 3 (a planning scenario or forecast so large that it occupies the server
or the command line for minutes) and 5 (dates outside what the code can hold reaching pandas
or Python's calendar). Runs that could hang on code without the bounds go to a child
process with a time and memory limit, so a failing check ends instead of stalling the suite.
"""

from __future__ import annotations

import os
import re
import resource
import shutil
import subprocess
import sys
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import func, select

from app.cli.main import main
from app.ingest import ImportRefused, import_file
from app.store import db
from app.store.models import Booking, Stay
from tests.conftest import UTC_ZONE
from tests.reliability.conftest import SecuredApp
from tests.reliability.small_unit import UNIT, load_unit
from tests.security.fixtures import issue_token

pytestmark = pytest.mark.both_databases

ROOT = Path(__file__).resolve().parents[2]
# A child that has not answered by then is stuck (the refusal takes about a second, start-up
# included); the memory cap keeps a runaway one from starving the machine.
CHILD_SECONDS = 40
CHILD_BYTES = 3 * 1024**3
RAW_ERROR = re.compile(r"Traceback|\b[A-Z]\w*(Error|Exception)\b|OutOfBounds")


def plain(text: str) -> str:
    """``text``, after checking it names no Python exception (what a user must never see)."""
    assert not RAW_ERROR.search(text), text
    return text


def _limit_memory() -> None:
    resource.setrlimit(resource.RLIMIT_AS, (CHILD_BYTES, CHILD_BYTES))


def run_child(args: list[str]) -> tuple[int | None, str]:
    """Run ``python args`` from the project root: (exit status, or None if killed; output)."""
    env = {**os.environ, "MORROW_TIMEZONE": "UTC"}
    env.pop("MORROW_NOW", None)
    with subprocess.Popen([sys.executable, *args], cwd=ROOT, env=env, text=True,
                          stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                          preexec_fn=_limit_memory) as child:
        try:
            output, _ = child.communicate(timeout=CHILD_SECONDS)
        except subprocess.TimeoutExpired:
            child.kill()
            output, _ = child.communicate()
            return None, output
    return child.returncode, output


@pytest.fixture
def trained(secured: SecuredApp) -> SecuredApp:
    """The signed-in app with the small invented unit imported and its model trained."""
    load_unit(secured.db_url)
    return secured


@pytest.fixture
def child_db(migrated_template: Path, tmp_path: Path) -> str:
    """SQLite only, for the checks run in a child process: what they check (a refusal before
    any work) does not touch the database, and each child costs seconds to start."""
    path = tmp_path / "child.db"
    shutil.copy(migrated_template, path)
    url = f"sqlite:///{path}"
    load_unit(url)
    db.release_engine(url)
    return url


@pytest.fixture
def unit_loaded(secured: SecuredApp) -> SecuredApp:
    """The signed-in app with the small invented unit's files imported (no model)."""
    load_unit(secured.db_url, train=False)
    return secured


def client_as(app: SecuredApp, username: str) -> TestClient:
    token = issue_token(app.db_url, username)
    return TestClient(app.app, raise_server_exceptions=False,
                      headers={"Authorization": f"Bearer {token}"})


# -- failure 3: work without a limit ----------------------------------------------------------

PLANNING_PAGE = """
import sys
from fastapi.testclient import TestClient
from app.web.app import create_app
from tests.security.fixtures import acting_as
app = create_app(sys.argv[1])
acting_as(app, "viewer")
answer = TestClient(app, raise_server_exceptions=False).get(sys.argv[2])
print(answer.status_code)
print(answer.text)
"""


def test_planning_page_refuses_a_huge_arrivals_factor_at_once(child_db: str) -> None:
    query = (f"/units/{UNIT}/planning?target=5&years=1&replications=10&s1=arrivals"
             "&s1_type=emergency&s1_arrivals=100000")
    status, output = run_child(["-c", PLANNING_PAGE, child_db, query])
    assert status is not None, f"the page did not answer within {CHILD_SECONDS} s"
    assert status == 0, output[-2000:]
    code, _, page = output.partition("\n")
    assert code == "422", page[-2000:]
    assert "arrivals factor: 1001 (+100000%) is outside the allowed range" in page
    assert "+200%" in page
    plain(page)


def test_plan_command_refuses_a_huge_arrivals_factor(child_db: str) -> None:
    status, output = run_child([
        "-m", "app.cli.main", "--db", child_db, "plan", "--unit", UNIT, "--years", "1",
        "--replications", "4", "--scale-arrivals", "emergency=+100000%"])
    assert status is not None, f"morrow plan was still running after {CHILD_SECONDS} s"
    assert status == 2, output[-2000:]
    assert "arrivals factor: 1001 (+100000%) is outside the allowed range" in plain(output)


def test_plan_command_refuses_runs_beyond_its_bounds(
        secured: SecuredApp, capsys: pytest.CaptureFixture[str]) -> None:
    # In-process: each is refused before the unit is read (here it is not even known), so
    # code without the bounds fails fast on the unknown unit instead.
    for option, value, shown in (
            ("--years", "1000", "years: 1000 years (365000 days) is outside the allowed range"),
            ("--replications", "100000", "replications: 100000 is outside the allowed range"),
            ("--beds", "1-1000000000", "--beds '1-1000000000': bed counts must be from 1 to "
                                       "1000")):
        started = time.monotonic()
        status = main(["--db", secured.db_url, "plan", "--unit", UNIT, "--years", "1",
                       "--replications", "4", option, value])
        err = capsys.readouterr().err
        assert (status, time.monotonic() - started < 10) == (2, True), err
        assert shown in plain(err), option


def test_forecast_command_refuses_400_days(child_db: str) -> None:
    status, output = run_child(["-m", "app.cli.main", "--db", child_db, "forecast",
                                   "--unit", UNIT, "--days", "400", "--json"])
    assert status is not None, f"morrow forecast was still running after {CHILD_SECONDS} s"
    assert status == 2, output[-2000:]
    assert "--days: 400 is outside the allowed range, 1 to 28" in plain(output)


# -- failure 5: dates the code cannot hold -----------------------------------------------------

def test_command_line_refuses_dates_it_cannot_hold(
        trained: SecuredApp, capsys: pytest.CaptureFixture[str]) -> None:
    for args, shown in (
            (["forecast", "--unit", UNIT, "--as-of", "2300-01-01"],
             "--as-of: 2300-01-01 00:00 UTC is outside the allowed range, 1900-01-01 00:00 UTC"),
            (["train", "--unit", UNIT, "--until", "0001-01-01"],
             "--until: 0001-01-01 00:00 UTC is outside the allowed range"),
            (["backtest", "--unit", UNIT, "--from", "2026-10-20", "--to", "2026-10-01", "--json"],
             "--from/--to: the start 2026-10-20 is after the end 2026-10-01")):
        status = main(["--db", trained.db_url, *args])
        err = capsys.readouterr().err
        assert status == 2, (args, status, err)
        assert shown in plain(err), args


def test_backtest_refuses_a_span_beyond_its_bound(child_db: str) -> None:
    # A child: without the bound this would replay 46,000 mornings.
    status, output = run_child(["-m", "app.cli.main", "--db", child_db, "backtest",
                                   "--unit", UNIT, "--from", "1900-01-01", "--to", "2026-10-01",
                                   "--json"])
    assert status == 2, output[-2000:]
    assert "--from/--to: 46295 days from 1900-01-01 to 2026-10-01; at most 1098 days" in plain(
        output)


def _stays(admitted: str) -> bytes:
    return ("stay_id,unit,admitted_at,admission_type\n"
            f"TB-X0001,{UNIT},2026-10-01T10:00,emergency\n"
            f"TB-X0002,{UNIT},{admitted},emergency\n").encode()


def test_import_refuses_an_admission_outside_what_the_code_holds(
        unit_loaded: SecuredApp) -> None:
    url = unit_loaded.db_url
    with db.session_scope(url) as session:
        before = session.scalar(select(func.count()).select_from(Stay))
    for admitted in ("0001-01-01T00:00", "1899-12-31T23:00", "2300-01-01T00:00",
                     "9999-12-31T23:59"):
        with pytest.raises(ImportRefused) as refused, db.session_scope(url) as session:
            import_file(session, "stays", _stays(admitted), "stays.csv", tz=UTC_ZONE)
        (problem,) = refused.value.problems
        assert (problem.file, problem.line, problem.column, problem.value) == (
            "stays.csv", 3, "admitted_at", admitted)
        assert "expected a time from 1900-01-01 to a day after now" in plain(str(problem))
    with db.session_scope(url) as session:
        assert session.scalar(select(func.count()).select_from(Stay)) == before


def test_import_refuses_an_admission_after_tomorrow(unit_loaded: SecuredApp, tmp_path: Path,
                                                    capsys: pytest.CaptureFixture[str]) -> None:
    soon = datetime.now(UTC).replace(tzinfo=None)
    later = (soon + timedelta(days=2)).isoformat(timespec="minutes")
    path = tmp_path / "stays.csv"
    path.write_bytes(_stays(later))
    assert main(["--db", unit_loaded.db_url, "import", "stays", str(path)]) == 2
    err = plain(capsys.readouterr().err)
    assert f"stays.csv, line 3, column admitted_at (value '{later}')" in err
    # An admission an hour from now (a feeding system's clock ahead) still imports.
    path.write_bytes(_stays((soon + timedelta(hours=1)).isoformat(timespec="minutes")))
    assert main(["--db", unit_loaded.db_url, "import", "stays", str(path)]) == 0


def test_booking_form_refuses_dates_outside_its_horizon(unit_loaded: SecuredApp) -> None:
    client = client_as(unit_loaded, "sched.test")
    today = datetime.now(UTC).date()

    def bookings() -> int:
        with db.session_scope(unit_loaded.db_url) as session:
            return int(session.scalar(select(func.count()).select_from(Booking)) or 0)

    stored = bookings()
    for planned in ("0001-01-01", "2020-01-01", (today - timedelta(days=1)).isoformat(),
                    (today + timedelta(days=61)).isoformat(), "9999-12-31"):
        answer = client.post(f"/units/{UNIT}/booking", data={"planned_date": planned},
                             follow_redirects=False)
        assert answer.status_code == 422, (planned, answer.status_code, answer.text[:300])
        assert f"planned date: {planned} is outside the allowed range" in plain(answer.text)
    assert bookings() == stored
    answer = client.post(f"/units/{UNIT}/booking",
                         data={"planned_date": (today + timedelta(days=3)).isoformat()},
                         follow_redirects=False)
    assert answer.status_code == 303 and bookings() == stored + 1


def test_api_forecast_refuses_an_as_of_it_cannot_hold(trained: SecuredApp) -> None:
    client = client_as(trained, "view.test")
    for as_of in ("9999-12-31T00:00:00Z", "2262-04-03T00:00:00Z", "2262-04-11T00:00:00Z",
                  "0001-01-01T00:00:00Z"):
        answer = client.get(f"/api/units/{UNIT}/forecast", params={"as_of": as_of})
        assert answer.status_code == 422, (as_of, answer.status_code, answer.text[:300])
        detail = answer.json()["detail"]
        assert detail.startswith("as_of: ") and "is outside the allowed range" in plain(detail)


def test_audit_page_refuses_a_date_it_cannot_hold(secured: SecuredApp) -> None:
    client = client_as(secured, "bm.test")
    for query in ("until=9999-12-31", "since=0001-01-01", "until=2262-04-11"):
        for path in ("/audit", "/audit.csv"):
            answer = client.get(f"{path}?{query}")
            assert answer.status_code == 422, (path, query, answer.status_code)
            # A page answers with the site's page (issue 14, item 7), not JSON.
            assert answer.headers["content-type"].startswith("text/html")
            assert "is outside the allowed range" in plain(answer.text)
    assert client.get("/audit?since=2026-01-01&until=2027-12-31").status_code == 200
