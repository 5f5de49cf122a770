"""Two identical imports at the same moment: one stores the rows, the other reports them
unchanged; never a 500, never a raw database error; every row is stored once.

Through the server (identical uploads from threads) and through the command line
(`morrow import` of the same file in processes started together). Invented unit and
bookings. Runs on SQLite and PostgreSQL.
"""

from __future__ import annotations

import os
import subprocess
import sys
import threading
from datetime import UTC, datetime, timedelta
from pathlib import Path

import httpx2 as httpx
import pytest
from sqlalchemy import text

from app.config import PROJECT_ROOT
from tests.reliability.conftest import PASSWORD, ROLE_USERS, SecuredApp
from tests.reliability.live import UNIT, csrf_for, own_engine, seed_unit, serving, sign_in

pytestmark = pytest.mark.both_databases

ROWS = 2000
ROUNDS = 3
AT_ONCE = 2


def bookings_file(round_no: int) -> bytes:
    """ROWS bookings of the unit, ids unique to the round."""
    booked = (datetime.now(UTC) - timedelta(days=1)).strftime("%Y-%m-%dT%H:%M")
    today = datetime.now(UTC).date()
    rows = "".join(f"BK-{round_no}-{i:05d},{UNIT},{booked},{today + timedelta(days=1 + i % 30)},"
                   f"{20 + i % 60},orthopaedics\n" for i in range(ROWS))
    return f"booking_id,unit,booked_at,planned_date,age,specialty\n{rows}".encode()


def stored_bookings(url: str) -> tuple[int, int]:
    """How many bookings are stored, and how many distinct ids they have."""
    engine = own_engine(url)
    with engine.connect() as connection:
        total, distinct = connection.execute(text(
            "SELECT count(*), count(DISTINCT booking_id) FROM booking "
            "WHERE booking_id LIKE 'BK-%'")).one()
    engine.dispose()
    return int(total), int(distinct)


def outcome_problem(text_: str) -> str | None:
    """What is wrong with an answer that should say the rows were new or unchanged."""
    stored = f"{ROWS} new, 0 updated, 0 unchanged"
    unchanged = f"0 new, 0 updated, {ROWS} unchanged"
    if stored in text_ or unchanged in text_:
        return None
    return text_[-600:]


def test_identical_uploads_at_once_store_each_row_once(secured: SecuredApp) -> None:
    url, app = secured.db_url, secured.app
    seed_unit(url)
    problems: list[str] = []
    with serving(app) as base:
        clients = [httpx.Client(base_url=base, timeout=90) for _ in range(AT_ONCE)]
        try:
            for client in clients:
                assert sign_in(client, ROLE_USERS["bed_manager"], PASSWORD).status_code == 303
            for round_no in range(ROUNDS):
                data = bookings_file(round_no)
                start = threading.Barrier(AT_ONCE)

                def send(client: httpx.Client, data: bytes = data,
                         start: threading.Barrier = start, round_no: int = round_no) -> None:
                    form = {"csrf_token": csrf_for(app, client), "kind": "bookings"}
                    start.wait(timeout=30)
                    try:
                        answer = client.post("/data/upload", data=form, files={
                            "file": (f"bookings-{round_no}.csv", data, "text/csv")})
                    except httpx.HTTPError as exc:
                        problems.append(f"round {round_no}: no answer ({exc!r})")
                        return
                    wrong = outcome_problem(answer.text)
                    if answer.status_code != 200 or wrong is not None:
                        problems.append(f"round {round_no}: {answer.status_code} {wrong}")

                senders = [threading.Thread(target=send, args=(c,)) for c in clients]
                for sender in senders:
                    sender.start()
                for sender in senders:
                    sender.join(timeout=120)
        finally:
            for client in clients:
                client.close()
    assert not problems, "\n".join(problems)
    assert stored_bookings(url) == (ROUNDS * ROWS, ROUNDS * ROWS)


def test_identical_command_line_imports_at_once_store_each_row_once(
        secured: SecuredApp, tmp_path: Path) -> None:
    url = secured.db_url
    seed_unit(url)
    env = {**os.environ, "MORROW_TIMEZONE": "UTC"}
    problems: list[str] = []
    for round_no in range(ROUNDS):
        path = tmp_path / f"bookings-{round_no}.csv"
        path.write_bytes(bookings_file(round_no))
        imports = [subprocess.Popen(
            [sys.executable, "-m", "app.cli.main", "--db", url, "import", "bookings", str(path)],
            cwd=PROJECT_ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
            for _ in range(AT_ONCE)]
        for process in imports:
            out, err = process.communicate(timeout=180)
            said = (out + err).decode(errors="replace")
            wrong = outcome_problem(said)
            if process.returncode != 0 or wrong is not None or "Error" in said:
                problems.append(f"round {round_no}: exit {process.returncode}: {said[-600:]}")
    assert not problems, "\n".join(problems)
    assert stored_bookings(url) == (ROUNDS * ROWS, ROUNDS * ROWS)
