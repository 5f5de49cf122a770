"""A real Morrow server in a child process that a test can kill -9 and start again, and the
writers that work through it (a nurse entering scores, a scheduler booking, a bed manager
uploading small observation files), each recording every write the server confirmed.

Used by test_crash_writes.py (kill -9 at random moments) and test_writes_under_load.py
(many writers, no kills). Every write carries a value of its own (a score name, a booking's
procedure, a file name and score name), so the database can be asked afterwards whether
each confirmed write is there exactly once and nothing is there twice. Invented unit,
stays and accounts.
"""

from __future__ import annotations

import os
import random
import re
import signal
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from pathlib import Path
from urllib.parse import parse_qs, urlsplit

import httpx2 as httpx
from sqlalchemy import func, select, text

from app.store import db
from app.store.models import AuditEvent, Booking, ImportBatch, Observation
from tests.reliability.small_unit import unit_with_patients
from tests.security.fixtures import make_user, sign_in_form

TREE = Path(__file__).resolve().parents[2]  # the checkout these tests (and its app/) are in
UNIT = "U-KILL"
STAYS = 24
PASSWORD = "a long crash-test password"
ACCOUNTS = {"score": ("crash.nurse", "nurse_in_charge"),
            "booking": ("crash.scheduler", "scheduler"),
            "upload": ("crash.manager", "bed_manager")}
UPLOAD_ROWS = 200
SCORE_PREFIX, UPLOAD_PREFIX, BOOKING_PREFIX = "cw", "up", "bp"
_CSRF = re.compile(r'name="csrf_token" value="([^"]+)"')
_BOOKED = re.compile(r"^booked (B-[0-9a-f]+) for ")


def seed(url: str, writers: int = 1) -> None:
    """The unit, its current stays (admitted two days ago) and ``writers`` accounts of each
    kind (``crash.nurse``, ``crash.nurse1``, ...)."""
    admitted = (datetime.now(UTC) - timedelta(days=2)).replace(microsecond=0)
    unit_with_patients(url, UNIT, 30, [f"S-K{i:02d}" for i in range(STAYS)], admitted)
    for username, role in ACCOUNTS.values():
        for w in range(writers):
            make_user(url, account(username, w), role, PASSWORD)
    db.release_engine(url)


def account(username: str, writer: int) -> str:
    return username if writer == 0 else f"{username}{writer}"


class ServerProcess:
    """Morrow's server (uvicorn on ``create_app``, one process, as `morrow serve` runs it) on
    a fixed free loopback port, killed and started again at will. The processes are forked
    from ``server_zygote``, which imported the app once (a restart then takes a fraction of
    a second instead of seconds)."""

    def __init__(self, url: str, log: Path) -> None:
        self.url, self.log = url, log
        self.port = port_outside_ephemeral_range()
        self.base = f"http://127.0.0.1:{self.port}"
        self.pid: int | None = None
        self._zygote: subprocess.Popen[str] | None = None

    def _fork(self) -> int:
        if self._zygote is None:
            with open(self.log, "ab") as err:
                self._zygote = subprocess.Popen(
                    [sys.executable, "-m", "tests.reliability.server_zygote", self.url,
                     str(self.port)], cwd=TREE, stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                    stderr=err, text=True,
                    env={**os.environ, "MORROW_TIMEZONE": "UTC", "OPENBLAS_NUM_THREADS": "1"})
        assert self._zygote.stdin is not None and self._zygote.stdout is not None
        self._zygote.stdin.write("start\n")
        self._zygote.stdin.flush()
        answer = self._zygote.stdout.readline()
        assert answer.strip().isdigit(), self.log.read_text(errors="replace")[-3000:]
        return int(answer)

    def start(self, timeout_s: float = 60.0) -> float:
        """Start it and wait until /health answers; returns the seconds that took."""
        began = time.monotonic()
        self.pid = self._fork()
        while True:
            assert _alive(self.pid), self.log.read_text(errors="replace")[-3000:]
            try:
                if httpx.get(f"{self.base}/health", timeout=2).status_code == 200:
                    return time.monotonic() - began
            except httpx.TransportError:
                pass
            assert time.monotonic() - began < timeout_s, \
                f"the server did not start in {timeout_s:g} s"
            time.sleep(0.02)

    def kill(self, sig: int = signal.SIGKILL) -> None:
        """kill -9 by default: no shutdown handler, no commit, no flush runs."""
        assert self.pid is not None
        os.kill(self.pid, sig)
        deadline = time.monotonic() + 30
        while _alive(self.pid):
            assert time.monotonic() < deadline, f"process {self.pid} outlived signal {sig}"
            time.sleep(0.01)
        self.pid = None

    def stop(self) -> None:
        if self.pid is not None and _alive(self.pid):
            self.kill(signal.SIGTERM)
        if self._zygote is not None:
            assert self._zygote.stdin is not None and self._zygote.stdout is not None
            self._zygote.stdin.close()
            self._zygote.wait(timeout=30)
            self._zygote.stdout.close()
            self._zygote = None


def port_outside_ephemeral_range() -> int:
    """A free loopback port below the kernel's range for outgoing connections. While the
    server is down, the writers keep connecting to its port; one from that range can be
    handed to such a connection as its own source port (TCP connects it to itself), and
    the server could not listen there again."""
    low = int(Path("/proc/sys/net/ipv4/ip_local_port_range").read_text().split()[0])
    rng = random.Random()
    for _ in range(200):
        port = rng.randrange(max(1024, low - 12_000), low)
        with socket.socket() as sock:
            try:
                sock.bind(("127.0.0.1", port))
            except OSError:
                continue
            return port
    raise AssertionError(f"no free port found below {low}")


def _alive(pid: int) -> bool:
    """Whether ``pid`` still runs (a killed child is reaped at once, see server_zygote)."""
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except OSError:
        return False
    return state != "Z"


@dataclass
class Record:
    """What the writers saw: every confirmed write, every answer that was neither a
    confirmation nor a lost connection, and the latency of each answered write."""

    scores: list[str] = field(default_factory=list)
    bookings: dict[str, str] = field(default_factory=dict)  # booking id -> procedure
    uploads: list[str] = field(default_factory=list)
    failures: list[str] = field(default_factory=list)
    latencies_ms: list[float] = field(default_factory=list)
    lost_connections: int = 0
    lock: threading.Lock = field(default_factory=threading.Lock)
    confirmed: threading.Condition = field(default_factory=threading.Condition)
    count: int = 0

    def confirm(self, kind: str, value: str, extra: str = "") -> None:
        with self.lock:
            if kind == "score":
                self.scores.append(value)
            elif kind == "booking":
                self.bookings[extra] = value
            else:
                self.uploads.append(value)
        with self.confirmed:
            self.count += 1
            self.confirmed.notify_all()

    def wait_for_confirmation(self, timeout_s: float) -> bool:
        """Until the next write is confirmed to its client (False after ``timeout_s``)."""
        with self.confirmed:
            seen = self.count
            return self.confirmed.wait_for(lambda: self.count > seen, timeout=timeout_s)


def sign_in(base: str, kind: str, writer: int = 0) -> tuple[httpx.Client, str]:
    """A client signed in as the ``writer``-th account for writes of ``kind``, and the CSRF
    token its forms carry (the session lives in the database: it outlives a restart)."""
    username = account(ACCOUNTS[kind][0], writer)
    client = httpx.Client(base_url=base, timeout=20.0, follow_redirects=False)
    answer = sign_in_form(client, username, PASSWORD)
    assert answer.status_code == 303, answer.text[:300]
    # A server that commits after answering may not have stored the session yet (that is
    # tested in test_commit_before_response.py); waiting a little for it here keeps these
    # tests about what they check.
    for _ in range(50):
        page = client.get("/data")
        if page.status_code == 200:
            break
        time.sleep(0.05)
    found = _CSRF.search(page.text)
    assert found is not None, f"{page.status_code} {page.text[:300]}"
    return client, found.group(1)


def _message(answer: httpx.Response) -> str:
    return parse_qs(urlsplit(answer.headers.get("location", "")).query).get("message", [""])[0]


def upload_file(tag: str) -> bytes:
    start = datetime.now(UTC).replace(microsecond=0) - timedelta(days=1)
    lines = ["stay_id,observed_at,name,value"]
    lines += [f"S-K{i % STAYS:02d},{(start + timedelta(minutes=i)).isoformat()},{tag},{i % 10}"
              for i in range(UPLOAD_ROWS)]
    return ("\n".join(lines) + "\n").encode()


def write_once(kind: str, client: httpx.Client, csrf: str, tag: str, k: int
               ) -> tuple[bool, str, str]:
    """One write of ``kind`` tagged ``tag``: (confirmed, what to record, the booking id)."""
    if kind == "score":
        answer = client.post(f"/units/{UNIT}/scores", data={
            "csrf_token": csrf, "stay_id": f"S-K{k % STAYS:02d}", "name": tag,
            "value": str(k % 10)})
        text = _message(answer)
        return answer.status_code == 303 and " recorded for " in text, text, ""
    if kind == "booking":
        planned = datetime.now(UTC).date() + timedelta(days=1 + k % 20)
        answer = client.post(f"/units/{UNIT}/booking", data={
            "csrf_token": csrf, "planned_date": planned.isoformat(), "age": "60",
            "specialty": "general-surgery", "procedure": tag})
        text = _message(answer)
        found = _BOOKED.match(text)
        return (answer.status_code == 303 and found is not None, text,
                found.group(1) if found else "")
    answer = client.post("/data/upload", data={"csrf_token": csrf, "kind": "observations"},
                         files={"file": (f"{tag}.csv", upload_file(tag), "text/csv")})
    confirmed = answer.status_code == 200 and f"{UPLOAD_ROWS} new" in answer.text
    return confirmed, f"{answer.status_code} {answer.text[:300]}", ""


def run_writer(kind: str, writer: int, signed_in: tuple[httpx.Client, str], record: Record,
               stop: threading.Event, pause: Callable[[], float] = lambda: 0.0, *,
               kills: bool = True) -> None:
    """Write until ``stop`` with a client from ``sign_in``. With ``kills`` a lost connection
    (the server was killed) is not a failure: the writer does not know whether that write
    was stored and moves on to a new value. Without, it is one (as is a request that timed
    out: the server stalled)."""
    username = account(ACCOUNTS[kind][0], writer)
    prefix = {"score": SCORE_PREFIX, "booking": BOOKING_PREFIX, "upload": UPLOAD_PREFIX}[kind]
    client, csrf = signed_in
    k = 0
    try:
        while not stop.is_set():
            k += 1
            tag = f"{prefix}{writer}x{k}"
            began = time.perf_counter()
            try:
                confirmed, what, booking_id = write_once(kind, client, csrf, tag, k)
            except httpx.TransportError as exc:
                with record.lock:
                    record.lost_connections += 1
                    if not kills:
                        record.failures.append(f"{username} {tag}: {exc!r}")
                time.sleep(0.02)
                continue
            with record.lock:
                record.latencies_ms.append((time.perf_counter() - began) * 1000)
            if confirmed:
                record.confirm(kind, tag, booking_id)
            else:
                with record.lock:
                    record.failures.append(f"{username} {tag}: {what}")
            time.sleep(pause())
    finally:
        client.close()


def stored_problems(url: str, record: Record) -> list[str]:
    """Every confirmed write in the database exactly once, nothing stored twice, every
    file whole or absent, and one audit event for every import batch."""
    problems: list[str] = []
    with db.session_scope(url) as session:
        scores = dict(session.execute(
            select(Observation.name, func.count())
            .where(Observation.name.like(f"{SCORE_PREFIX}%")).group_by(Observation.name)).all())
        uploads = dict(session.execute(
            select(Observation.name, func.count())
            .where(Observation.name.like(f"{UPLOAD_PREFIX}%")).group_by(Observation.name)).all())
        bookings = session.execute(
            select(Booking.procedure, Booking.booking_id).where(Booking.unit == UNIT)).all()
        batches = dict(session.execute(
            select(ImportBatch.filename, func.count()).group_by(ImportBatch.filename)).all())
        unaudited = session.scalar(
            select(func.count()).select_from(ImportBatch).where(~ImportBatch.id.in_(
                select(AuditEvent.batch_id).where(AuditEvent.action == "import",
                                                  AuditEvent.batch_id.is_not(None)))))
    problems += [f"confirmed score {t} stored {scores.get(t, 0)} times"
                 for t in record.scores if scores.get(t, 0) != 1]
    problems += [f"score {t} stored {n} times" for t, n in scores.items() if n > 1]
    by_procedure: dict[str | None, list[str]] = {}
    for procedure, booking_id in bookings:
        by_procedure.setdefault(procedure, []).append(booking_id)
    problems += [f"confirmed booking {b} ({p}) stored as {by_procedure.get(p, [])}"
                 for b, p in record.bookings.items() if by_procedure.get(p) != [b]]
    problems += [f"booking {p} stored {len(ids)} times" for p, ids in by_procedure.items()
                 if len(ids) > 1]
    problems += [f"confirmed file {t} has {uploads.get(t, 0)} of {UPLOAD_ROWS} rows"
                 for t in record.uploads if uploads.get(t, 0) != UPLOAD_ROWS]
    problems += [f"file {t} stored in part or twice: {n} rows" for t, n in uploads.items()
                 if n != UPLOAD_ROWS]
    problems += [f"file {name} has {n} import batches" for name, n in batches.items()
                 if name.startswith(UPLOAD_PREFIX) and n > 1]
    if unaudited:
        problems.append(f"{unaudited} import batches without their audit event")
    return problems


def integrity_problems(url: str) -> tuple[list[str], str]:
    """SQLite's own check of the file; on PostgreSQL amcheck over every B-tree index of the
    database when the extension can be made (else said in the second value)."""
    engine = db.get_engine(url)
    with engine.connect() as conn:
        if engine.dialect.name == "sqlite":
            rows = [r[0] for r in conn.exec_driver_sql("PRAGMA integrity_check")]
            return ([] if rows == ["ok"] else rows), "PRAGMA integrity_check"
        available = conn.scalar(text(
            "SELECT count(*) FROM pg_available_extensions WHERE name = 'amcheck'"))
        if not available:
            return [], "amcheck is not installed on this server: not checked"
        conn.execute(text("CREATE EXTENSION IF NOT EXISTS amcheck"))
        indexes = conn.scalars(text(
            "SELECT c.oid::regclass::text FROM pg_index i JOIN pg_class c ON c.oid = i.indexrelid"
            " JOIN pg_am a ON a.oid = c.relam JOIN pg_namespace n ON n.oid = c.relnamespace"
            " WHERE a.amname = 'btree' AND n.nspname = 'public'")).all()
        problems = []
        for index in indexes:
            try:
                conn.execute(text("SELECT bt_index_check(CAST(:i AS regclass), true)"),
                             {"i": index})
            except Exception as exc:  # amcheck reports corruption as an error
                problems.append(f"{index}: {exc}")
        conn.commit()
        return problems, f"amcheck bt_index_check (with heap) on {len(indexes)} indexes"
