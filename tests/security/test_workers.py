"""Several server processes on one database: sessions, CSRF and writes work across them.

- Two app instances on one database stand for two workers (deterministic): a session made
  by one is honoured by the other, with the same CSRF token, and signing out anywhere ends it.
- Workers starting at once all read the same CSRF signing key (one row made, never two).
- The hardening issue's scenario through `morrow serve --workers 4` on PostgreSQL: 8 nurses
  entering scores and 2 bed managers uploading observation files at once, over plain
  loopback HTTP with a new connection per request, so that consecutive requests of one
  person land on different workers. Every write is stored exactly once.

Invented unit, stays and accounts.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import httpx2 as httpx
import pytest
from fastapi.testclient import TestClient
from sqlalchemy import func, select

from app.store import db
from app.store.models import AuditEvent, ImportBatch, Observation, SigningKey
from app.web.app import create_app
from app.web.security import SESSION_COOKIE, load_csrf_key
from tests.databases import PostgresDatabases
from tests.security.fixtures import form_csrf, make_user, sign_in_form, signed_in_client
from tests.security.test_concurrency import (
    FILES_EACH,
    IMPORTERS,
    ROWS_PER_FILE,
    SCORES_EACH,
    STAYS,
    WRITERS,
    observation_file,
    seed,
)

pytestmark = pytest.mark.both_databases

PASSWORD = "a long test password"
WORKERS = 4
UNIT = "U-CC"
_CSRF = re.compile(r'name="csrf_token" value="([^"]+)"')


def test_a_session_from_one_worker_is_honoured_by_another(db_url: str) -> None:
    seed(db_url)
    make_user(db_url, "nurse.x", "nurse_in_charge", PASSWORD)
    first, second = create_app(db_url), create_app(db_url)
    assert first.state.csrf_key == second.state.csrf_key  # both read the database's key
    on_first = signed_in_client(first, "nurse.x", PASSWORD)
    on_second = TestClient(second)
    on_second.cookies.set(SESSION_COOKIE, on_first.cookies[SESSION_COOKIE])
    page = on_second.get(f"/units/{UNIT}")
    assert page.status_code == 200, page.text
    token = form_csrf(on_first.get(f"/units/{UNIT}").text)  # a form rendered by the first
    answer = on_second.post(f"/units/{UNIT}/scores", follow_redirects=False, data={
        "csrf_token": token, "stay_id": "S-1", "name": "news2", "value": "4"})
    assert answer.status_code == 303 and "recorded" in answer.headers["location"]
    refused = on_second.post(f"/units/{UNIT}/scores", follow_redirects=False, data={
        "csrf_token": token[:-2] + "xx", "stay_id": "S-2", "name": "news2", "value": "4"})
    assert refused.status_code == 403
    assert on_first.post("/signout", data={"csrf_token": token},
                         follow_redirects=False).status_code == 303
    after = on_second.get(f"/units/{UNIT}", follow_redirects=False)
    assert after.status_code == 303 and after.headers["location"].startswith("/signin")
    with db.session_scope(db_url) as session:
        assert session.scalar(select(func.count()).select_from(Observation)) == 1


def test_workers_starting_together_share_one_signing_key(db_url: str) -> None:
    with db.session_scope(db_url) as session:
        assert session.get(SigningKey, "csrf") is None
    start = threading.Barrier(8)
    keys: list[bytes] = []
    errors: list[BaseException] = []

    def worker() -> None:
        try:
            start.wait(timeout=30)
            keys.append(load_csrf_key(db_url))
        except BaseException as exc:  # collected: a thread's failure must fail the test
            errors.append(exc)

    threads = [threading.Thread(target=worker) for _ in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=60)
    assert not errors, errors
    assert len(keys) == 8 and len(set(keys)) == 1 and len(keys[0]) == 32
    with db.session_scope(db_url) as session:
        assert session.scalar(select(func.count()).select_from(SigningKey)) == 1


# -- the concurrency scenario through `morrow serve --workers 4` ------------------------------

@dataclass
class Server:
    base: str
    process: subprocess.Popen[bytes]
    log: Path


def free_port() -> int:
    import socket

    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


@contextmanager
def serve(url: str, workers: int, log: Path, *, start_timeout_s: float = 90.0
          ) -> Iterator[Server]:
    """`morrow serve --workers N` in a child process on a free loopback port."""
    port = free_port()
    script = Path(sys.executable).parent / "morrow"
    with open(log, "wb") as err:
        process = subprocess.Popen(
            [str(script), "--db", url, "serve", "--port", str(port), "--workers", str(workers)],
            env={**os.environ, "MORROW_TIMEZONE": "UTC"}, stdout=subprocess.DEVNULL,
            stderr=err)
    base = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + start_timeout_s
        while True:
            assert process.poll() is None, log.read_text(errors="replace")
            try:
                if httpx.get(f"{base}/health", timeout=2).status_code == 200:
                    break
            except httpx.TransportError:
                pass
            assert time.monotonic() < deadline, \
                f"the server did not start in {start_timeout_s:g} s"
            time.sleep(0.2)
        yield Server(base, process, log)
    finally:
        process.terminate()
        try:
            process.wait(timeout=30)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait(timeout=10)


def worker_pids(parent: int) -> list[int]:
    """uvicorn's worker processes: children of the server started by multiprocessing."""
    found = []
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            stat = (entry / "stat").read_text()
            cmdline = (entry / "cmdline").read_bytes()
        except OSError:
            continue
        ppid = int(stat.rsplit(")", 1)[1].split()[1])
        if ppid == parent and b"spawn_main" in cmdline:
            found.append(int(entry.name))
    return sorted(found)


def cpu_ticks(pid: int) -> int:
    """User plus system CPU time of a process, in clock ticks (proc(5), fields 14 and 15)."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return int(fields[11]) + int(fields[12])


def one_shot_client(base: str) -> httpx.Client:
    """Every request on a new connection, so the kernel hands each to any worker."""
    return httpx.Client(base_url=base, timeout=60.0, follow_redirects=False,
                        limits=httpx.Limits(max_keepalive_connections=0))


def sign_in(client: httpx.Client, username: str) -> str:
    answer = sign_in_form(client, username, PASSWORD)
    assert answer.status_code == 303, answer.text[:300]
    page = client.get(f"/units/{UNIT}")
    assert page.status_code == 200, page.text[:300]
    found = _CSRF.search(page.text)
    assert found is not None
    return found.group(1)


@pytest.mark.slow
def test_scenario_through_four_server_workers_on_postgresql(
        postgres_databases: PostgresDatabases, tmp_path: Path) -> None:
    with postgres_databases.fresh() as url:
        seed(url)
        for w in range(WRITERS):
            make_user(url, f"nurse{w}", "nurse_in_charge", PASSWORD)
        for i in range(IMPORTERS):
            make_user(url, f"manager{i}", "bed_manager", PASSWORD)
        db.release_engine(url)
        with serve(url, WORKERS, tmp_path / "server.err") as server:
            workers = worker_pids(server.process.pid)
            assert len(workers) == WORKERS, workers
            ticks_before = {pid: cpu_ticks(pid) for pid in workers}
            failures = run_scenario(server.base)
            assert worker_pids(server.process.pid) == workers, (
                "a worker was replaced during the run: "
                + server.log.read_text(errors="replace")[-2000:])
            busy = sum(cpu_ticks(pid) - ticks_before[pid] >= 5 for pid in workers)
            print(f"\nworkers that served requests: {busy} of {WORKERS}")
            assert not failures, failures[:10]
            # Requests on new connections reach more than one worker: the session and the
            # CSRF token of one person were honoured by several processes.
            assert busy >= 2
            assert "Traceback" not in server.log.read_text(errors="replace")
        check_stored_once(url)
        db.release_engine(url)


def run_scenario(base: str) -> list[str]:
    start = threading.Barrier(WRITERS + IMPORTERS)
    failures: list[str] = []

    def writer(w: int) -> None:
        with one_shot_client(base) as client:
            token = sign_in(client, f"nurse{w}")
            start.wait(timeout=120)
            for k in range(SCORES_EACH):
                stay = f"S-{(w * SCORES_EACH + k) % STAYS}"
                answer = client.post(f"/units/{UNIT}/scores", data={
                    "csrf_token": token, "stay_id": stay, "name": f"nurse{w}",
                    "value": str(k % 10)})
                if answer.status_code != 303 or "recorded" not in answer.headers.get(
                        "location", ""):
                    failures.append(f"nurse{w} score {k}: {answer.status_code} "
                                    f"{answer.headers.get('location', answer.text[:200])}")

    def importer(i: int) -> None:
        with one_shot_client(base) as client:
            token = sign_in(client, f"manager{i}")
            start.wait(timeout=120)
            for f in range(FILES_EACH):
                name = f"obs-{i}-{f}.csv"
                answer = client.post("/data/upload", data={
                    "csrf_token": token, "kind": "observations"},
                    files={"file": (name, observation_file(i, f), "text/csv")})
                if answer.status_code != 200 or f"{ROWS_PER_FILE} new" not in answer.text:
                    failures.append(f"manager{i} {name}: {answer.status_code}")

    def guarded(target: Any, arg: int) -> None:
        try:
            target(arg)
        except BaseException as exc:  # collected: a thread's failure must fail the test
            failures.append(f"{type(exc).__name__}: {exc}")

    threads = [threading.Thread(target=guarded, args=(writer, w)) for w in range(WRITERS)]
    threads += [threading.Thread(target=guarded, args=(importer, i)) for i in range(IMPORTERS)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=300)
    assert not any(t.is_alive() for t in threads)
    return failures


def check_stored_once(url: str) -> None:
    with db.session_scope(url) as session:
        per_writer = dict(session.execute(
            select(Observation.name, func.count()).where(Observation.name.like("nurse%"))
            .group_by(Observation.name)).all())
        assert per_writer == {f"nurse{w}": SCORES_EACH for w in range(WRITERS)}
        imported = session.scalar(select(func.count()).select_from(Observation)
                                  .where(Observation.name == "sofa"))
        assert imported == IMPORTERS * FILES_EACH * ROWS_PER_FILE
        # One batch and one import event per form entry and per file, by the right person.
        entries = dict(session.execute(
            select(ImportBatch.actor, func.count()).where(ImportBatch.filename ==
                                                          "score entry form")
            .group_by(ImportBatch.actor)).all())
        assert entries == {f"nurse{w}": SCORES_EACH for w in range(WRITERS)}
        files = session.execute(select(ImportBatch.filename, ImportBatch.inserted)
                                .where(ImportBatch.filename.like("obs-%"))).all()
        assert sorted(files) == sorted((f"obs-{i}-{f}.csv", ROWS_PER_FILE)
                                       for i in range(IMPORTERS) for f in range(FILES_EACH))
        events = session.scalar(select(func.count()).select_from(AuditEvent)
                                .where(AuditEvent.action == "import",
                                       AuditEvent.entity == "observations"))
        assert events == WRITERS * SCORES_EACH + IMPORTERS * FILES_EACH
