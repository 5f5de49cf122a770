"""An upload never stalls the server: while a 50 MB file is being refused and a small one
waits for the write lock another program holds, /health and a page still answer at once.

SQLite only: the held lock is SQLite's (BEGIN IMMEDIATE from a connection of the test's
own). The 200 ms p95 target is measured in tests/benchmarks/test_bench_upload_stall.py;
here the bound is generous (2 s, against 7 s and more when the import ran on the event
loop): on a busy two-core machine, the garbage collector's pauses while the refused file's
million rows are parsed in the worker thread reach close to a second.
"""

from __future__ import annotations

import sqlite3
import threading
import time
from collections.abc import Callable
from typing import Any

import httpx2 as httpx
import pytest
from sqlalchemy import text

from app.ingest import parse
from tests.reliability.conftest import PASSWORD, ROLE_USERS, SecuredApp
from tests.reliability.live import UNIT, csrf_for, own_engine, seed_unit, serving, sign_in

BIG_BYTES = 50_000_000
PROBES = 12
BOUND_S = 2.0


def refused_big_file() -> bytes:
    """About 50 MB of stays whose every row has more cells than the header: refused."""
    row = f"S-90000,{UNIT},2026-11-30T08:00,emergency,surplus,cells\n".encode()
    header = b"stay_id,unit,admitted_at,admission_type\n"
    return header + row * ((BIG_BYTES - len(header)) // len(row))


def small_file() -> bytes:
    rows = "".join(f"S-2{i:02d},{UNIT},2026-11-30T08:00,elective\n" for i in range(20))
    return f"stay_id,unit,admitted_at,admission_type\n{rows}".encode()


def watch_parsing(monkeypatch: pytest.MonkeyPatch) -> dict[str, threading.Event]:
    """An event per file name, set when the server starts parsing that file."""
    started = {"big.csv": threading.Event(), "small.csv": threading.Event()}
    real: Callable[..., Any] = parse.read_sheet

    def read_sheet(data: bytes, filename: str, columns: Any) -> Any:
        if filename in started:
            started[filename].set()
        return real(data, filename, columns)

    monkeypatch.setattr(parse, "read_sheet", read_sheet)
    return started


def test_health_and_a_page_answer_during_a_big_upload_and_a_held_lock(
        secured: SecuredApp, monkeypatch: pytest.MonkeyPatch) -> None:
    url, app = secured.db_url, secured.app
    seed_unit(url)
    started = watch_parsing(monkeypatch)
    answers: dict[str, httpx.Response | BaseException] = {}

    def upload(client: httpx.Client, name: str, data: bytes) -> None:
        try:
            answers[name] = client.post("/data/upload", data={
                "csrf_token": csrf_for(app, client), "kind": "stays"},
                files={"file": (name, data, "text/csv")})
        except BaseException as exc:  # reported by the assertions below
            answers[name] = exc

    slow: list[str] = []
    timings: list[float] = []
    with (serving(app) as base,
          httpx.Client(base_url=base, timeout=120) as big_sender,
          httpx.Client(base_url=base, timeout=120) as small_sender,
          httpx.Client(base_url=base, timeout=BOUND_S * 3, follow_redirects=False) as viewer):
        for client, role in ((big_sender, "bed_manager"), (small_sender, "bed_manager"),
                             (viewer, "viewer")):
            assert sign_in(client, ROLE_USERS[role], PASSWORD).status_code == 303
        holder = sqlite3.connect(url.removeprefix("sqlite:///"), isolation_level=None)
        holder.execute("BEGIN IMMEDIATE")
        # The small upload first: it then waits for the lock while the big one arrives.
        senders = [threading.Thread(target=upload, args=(small_sender, "small.csv",
                                                         small_file())),
                   threading.Thread(target=upload, args=(big_sender, "big.csv",
                                                         refused_big_file()))]
        try:
            for sender, name in zip(senders, ("small.csv", "big.csv"), strict=True):
                sender.start()
                if not started[name].wait(timeout=60):
                    slow.append(f"the server did not start on {name} within 60 s")
            for k in range(PROBES):
                path = "/health" if k % 2 == 0 else "/data"
                begun = time.perf_counter()
                try:
                    answer = viewer.get(path)
                    took = time.perf_counter() - begun
                    timings.append(took)
                    if answer.status_code != 200 or took > BOUND_S:
                        slow.append(f"{path}: {answer.status_code} after {took:.2f} s")
                except httpx.TimeoutException:
                    slow.append(f"{path}: no answer within {BOUND_S * 3:g} s")
                    break  # the event loop is stuck; more probes would only wait longer
            if "small.csv" in answers:
                # It should still be waiting for the lock, and succeed once it is free.
                slow.append(f"the small upload gave up while locked out: {answers['small.csv']}")
        finally:
            holder.rollback()
            holder.close()
            for sender in senders:
                sender.join(timeout=180)

    assert not slow, ("requests stalled while an upload was in progress: " + "; ".join(slow)
                      + f" (all: {[round(t, 3) for t in timings]})")
    small, big = answers["small.csv"], answers["big.csv"]
    assert isinstance(big, httpx.Response) and big.status_code == 422, big
    assert isinstance(small, httpx.Response) and small.status_code == 200, small
    assert "20 new" in small.text
    engine = own_engine(url)
    with engine.connect() as connection:
        stored = connection.execute(text(
            "SELECT count(*) FROM stay WHERE stay_id LIKE 'S-2__'")).scalar()
    engine.dispose()
    assert stored == 20
