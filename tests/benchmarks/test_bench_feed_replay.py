"""The whole demo hospital through the HL7 v2 listener, against its CSV files (the feeds
issue's first done-when; minutes, so a benchmark: `make bench`).

The demo (loaded from its CSV files) is written out as an ADT/ORU stream in the order things
became known (`morrow feeds export-hl7`); a second database gets only the units and the
bookings from CSV and every stay and score from that stream, sent message by message to
`morrow listen` over MLLP. Then the two databases must hold the same stays, scores and census
snapshots at census times (the feed's taken as messages cross them, the last ones by
`morrow feeds census`), and one model trained on the CSV database must give the same forecast
pmfs from both (to 1e-12). The throughput is printed beside it.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from sqlalchemy import select

from app.cli.feeds import read_messages
from app.feeds.events import stay_id_for
from app.feeds.pseudonym import Pseudonymiser, load_secret
from app.feeds.replay import visit_numbers
from app.forecast.service import forecast, train_model
from app.store import db
from app.store.models import CensusRow, CensusSnapshot, Observation, Stay, TrainedModel
from tests.conftest import DEMO_DIR, UTC_ZONE
from tests.feeds.mllp_client import Sender, ack_code, free_port, wait_for_port

ANCHOR = datetime(2026, 11, 30, 8, 0, tzinfo=UTC)
STAY_FIELDS = ("unit", "admitted_at", "discharged_at", "admission_type", "outcome", "age",
               "sex", "specialty", "source", "booking_id")


def _morrow(*args: str, env: dict[str, str]) -> None:
    command = [str(Path(sys.executable).with_name("morrow")), *args]
    done = subprocess.run(command, env=env, capture_output=True, text=True, check=False)
    assert done.returncode == 0, (args, done.stderr[-2000:])


def _stays(url: str, rename: dict[str, str]) -> dict[str, tuple[Any, ...]]:
    with db.session_scope(url) as session:
        return {rename.get(s.stay_id, s.stay_id): tuple(getattr(s, f) for f in STAY_FIELDS)
                for s in session.scalars(select(Stay))}


def _scores(url: str, rename: dict[str, str]) -> list[tuple[Any, ...]]:
    with db.session_scope(url) as session:
        return sorted((rename.get(o.stay_id, o.stay_id), o.observed_at, o.name, o.value,
                       o.recorded_at) for o in session.scalars(select(Observation)))


def _snapshots(url: str, rename: dict[str, str]) -> dict[tuple[str, datetime], list[Any]]:
    out = {}
    with db.session_scope(url) as session:
        for snap in session.scalars(select(CensusSnapshot)):
            rows = session.scalars(select(CensusRow).where(CensusRow.snapshot_id == snap.id))
            out[(snap.unit, snap.taken_at)] = sorted(
                (rename.get(r.stay_id, r.stay_id), r.admitted_at, r.admission_type)
                for r in rows)
    return out


@pytest.mark.slow
def test_the_whole_demo_over_mllp_gives_the_csv_answers(demo_db: str, tmp_path: Path) -> None:
    secret = tmp_path / "feed_secret"
    env = {**os.environ, "MORROW_TIMEZONE": "UTC", "MORROW_FEED_SECRET_FILE": str(secret)}
    csv_url = f"sqlite:///{tmp_path / 'csv.db'}"
    feed_url = f"sqlite:///{tmp_path / 'feed.db'}"
    shutil.copy(demo_db.removeprefix("sqlite:///"), tmp_path / "csv.db")
    stream = tmp_path / "replay" / "stream.hl7"
    _morrow("--db", csv_url, "feeds", "export-hl7", "--out", str(stream), env=env)
    _morrow("--db", feed_url, "db", "upgrade", env=env)
    for kind in ("units", "bookings"):
        _morrow("--db", feed_url, "import", kind, str(DEMO_DIR / f"{kind}.csv"), env=env)
    messages = read_messages(stream)
    port = free_port()
    log = (tmp_path / "listener.log").open("w")  # read it if the listener never answers
    listener = subprocess.Popen(
        [str(Path(sys.executable).with_name("morrow")), "--db", feed_url, "listen", "--port",
         str(port), "--mapping", str(stream.parent / "feeds.toml")],
        env=env, stdout=log, stderr=subprocess.STDOUT)
    codes: dict[str, int] = {}
    try:
        wait_for_port(port)
        sender = Sender(port)
        began = time.perf_counter()
        for message in messages:
            code, _ = ack_code(sender.send(message))
            codes[code] = codes.get(code, 0) + 1
        elapsed = time.perf_counter() - began
        sender.close()
    finally:
        listener.terminate()
        listener.wait(60)
        log.close()
    print(f"\nBENCH whole demo over MLLP: {len(messages)} messages in {elapsed:.0f} s "
          f"({len(messages) / elapsed:.0f}/s, one sender); answers {codes}")
    assert codes == {"AA": len(messages)}
    _morrow("--db", feed_url, "feeds", "census", "--until", ANCHOR.isoformat(), env=env)

    keys = Pseudonymiser(load_secret(secret))
    with db.session_scope(csv_url) as session:
        every = list(session.scalars(select(Stay)))
        admitted = {s.stay_id: s.admitted_at for s in every}
        # A step-down is replayed as a transfer within its critical-care stay's visit.
        visit = visit_numbers(every)
    rename = {stay_id_for(keys.visit(visit[sid]), at): sid for sid, at in admitted.items()}
    assert _stays(feed_url, rename) == _stays(csv_url, {})
    assert _scores(feed_url, rename) == _scores(csv_url, {})
    # census.csv also holds a snapshot at the demo's last morning (08:00, not a census time).
    at_census = {k: v for k, v in _snapshots(csv_url, {}).items() if k[1] != ANCHOR}
    feed_snapshots = _snapshots(feed_url, rename)
    assert all(feed_snapshots.get(k) == v for k, v in at_census.items())
    print(f"BENCH stays {len(admitted)}, census snapshots at census times {len(at_census)}: "
          "equal")
    worst = 0.0
    for unit in ("KV-CRIT", "KV-SURG"):
        with db.session_scope(csv_url) as session:
            model_id, _ = train_model(session, unit, ANCHOR - timedelta(days=3), UTC_ZONE)
            row = session.get(TrainedModel, model_id)
            stored = {c.name: getattr(row, c.name) for c in TrainedModel.__table__.columns}
        with db.session_scope(feed_url) as session:
            session.add(TrainedModel(**stored))
        for back in (3, 2, 1, 0):
            answers = []
            for url in (csv_url, feed_url):
                with db.session_scope(url) as session:
                    answers.append(forecast(session, unit, ANCHOR - timedelta(days=back),
                                            UTC_ZONE))
            for ours, theirs in zip(answers[0]["days"], answers[1]["days"], strict=True):
                assert len(ours["pmf"]) == len(theirs["pmf"])
                worst = max(worst, float(np.max(np.abs(np.subtract(ours["pmf"],
                                                                   theirs["pmf"])))))
    print(f"BENCH forecast pmfs, 2 units x 4 mornings x 7 nights: largest difference {worst}")
    assert worst <= 1e-12
    for url in (csv_url, feed_url):
        db.release_engine(url)
