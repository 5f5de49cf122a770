"""The real app under uvicorn in a background thread, on a free loopback port, and a way
to read the database from a connection of the test's own (invented unit, stays, users).

In-process, so a test can slow a commit down (monkeypatch) and see what a client is told
before the commit ends.
"""

from __future__ import annotations

import socket
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import UTC, datetime, timedelta
from pathlib import Path

import httpx2 as httpx
import pytest
import uvicorn
from fastapi import FastAPI
from sqlalchemy import Engine, create_engine
from sqlalchemy.engine import make_url
from sqlalchemy.pool import NullPool

from app.web.security import SESSION_COOKIE, _token
from tests.reliability.small_unit import unit_with_patients
from tests.security.fixtures import sign_in_form as sign_in  # noqa: F401  (re-exported)

UNIT = "RW-EAST"
STAYS = 30


@contextmanager
def serving(app: FastAPI) -> Iterator[str]:
    """``app`` answering on 127.0.0.1; yields its base URL, stops it on leaving."""
    sock = socket.socket()
    sock.bind(("127.0.0.1", 0))
    # Listening before uvicorn starts: a client's first connection waits in the backlog.
    sock.listen(128)
    port = sock.getsockname()[1]
    server = uvicorn.Server(uvicorn.Config(app, log_level="warning", lifespan="off"))
    thread = threading.Thread(target=server.run, kwargs={"sockets": [sock]}, daemon=True)
    thread.start()
    try:
        yield f"http://127.0.0.1:{port}"
    finally:
        server.should_exit = True
        thread.join(timeout=30)
        sock.close()


def own_engine(url: str) -> Engine:
    """An engine of the test's own (not the server's pooled one): its reads see only what
    another connection would see, that is, what is committed."""
    parsed = make_url(url)
    if parsed.drivername == "postgresql":
        parsed = parsed.set(drivername="postgresql+psycopg")
    return create_engine(parsed, poolclass=NullPool)


def seed_unit(url: str) -> datetime:
    """A unit with STAYS patients in it now; returns the admission time used."""
    admitted = (datetime.now(UTC) - timedelta(days=2)).replace(minute=0, second=0,
                                                              microsecond=0)
    unit_with_patients(url, UNIT, 40, [f"S-{i:03d}" for i in range(STAYS)], admitted)
    return admitted


def csrf_for(app: FastAPI, client: httpx.Client) -> str:
    """The CSRF token a page would render for this client's session."""
    cookie = client.cookies.get(SESSION_COOKIE)
    assert cookie, "the client is not signed in"
    return _token(app.state.csrf_key, "session", cookie)


def feed_setup(tmp_path: Path, monkeypatch: pytest.MonkeyPatch, unit: str) -> None:
    """A site secret and a mapping file for ``POST /api/feeds/fhir`` that sends the FHIR
    example's ward (``ICU-B``, tests/feeds/fhir_examples.py) and its codes to ``unit``."""
    secret = tmp_path / "feed_secret"
    secret.write_text("e" * 64 + "\n")
    secret.chmod(0o600)
    mapping = tmp_path / "feeds.toml"
    mapping.write_text(
        f'[units]\n"ICU-B" = "{unit}"\n[admission_types]\n"103391001" = "emergency"\n'
        '[outcomes]\n"306689006" = "home"\n[scores]\n"http://loinc.org|9269-2" = "gcs"\n')
    monkeypatch.setenv("MORROW_FEED_SECRET_FILE", str(secret))
    monkeypatch.setenv("MORROW_FEED_MAPPING", str(mapping))
