"""A real server on loopback with the demo hospital and a trained model, for browser and
latency tests. The page's "now" is fixed at the demo's last morning (MORROW_NOW)."""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import sys
import time
import urllib.request
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

from app.forecast.service import train_model
from app.store import db
from tests.conftest import UTC_ZONE
from tests.security.fixtures import make_user

DEMO_NOW = datetime(2026, 11, 30, 8, 0, tzinfo=UTC)
PASSWORD = "browser-test-pass-1"


@dataclass
class Served:
    base: str
    db_url: str
    process: subprocess.Popen[bytes]


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def trained_copy(demo_db: str, folder: Path, units: tuple[str, ...]) -> str:
    path = folder / "served.db"
    shutil.copy(demo_db.removeprefix("sqlite:///"), path)
    url = f"sqlite:///{path}"
    for unit in units:
        with db.session_scope(url) as session:
            train_model(session, unit, DEMO_NOW, UTC_ZONE)
    for username, role in (("manager", "bed_manager"), ("scheduler", "scheduler"),
                           ("nurse", "nurse_in_charge"), ("viewer", "viewer")):
        make_user(url, username, role, PASSWORD)
    db.release_engine(url)
    return url


def start(url: str, *, workers_env: dict[str, str] | None = None) -> Served:
    port = free_port()
    env = {**os.environ, "MORROW_TIMEZONE": "UTC", "MORROW_NOW": DEMO_NOW.isoformat(),
           **(workers_env or {})}
    script = Path(sys.executable).parent / "morrow"
    process = subprocess.Popen([str(script), "--db", url, "serve", "--port", str(port)],
                               env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    base = f"http://127.0.0.1:{port}"
    deadline = time.monotonic() + 90
    while time.monotonic() < deadline:
        if process.poll() is not None:
            raise RuntimeError(f"server exited: {process.stderr.read().decode()[-2000:]}")
        try:
            with urllib.request.urlopen(base + "/health", timeout=2) as response:
                if response.status == 200:
                    return Served(base, url, process)
        except OSError:
            time.sleep(0.5)
    process.kill()
    process.wait(timeout=10)
    if process.stderr is not None:
        process.stderr.close()
    raise RuntimeError("server did not answer /health within 90 s")


def stop(served: Served) -> None:
    served.process.terminate()
    try:
        served.process.wait(timeout=10)
    except subprocess.TimeoutExpired:
        served.process.kill()
        served.process.wait(timeout=10)
    if served.process.stderr is not None:
        served.process.stderr.close()
