"""``morrow listen``: messages over MLLP, each acknowledged after its commit; many senders at
once, each message applied exactly once; a listener killed with SIGKILL mid-stream and
restarted, the unacknowledged messages sent again: nothing lost, nothing doubled.

Message content: tests/feeds/hl7_messages.py (derived from the HL7 v2.5.1 ADT^A01 example).
Framing: HL7 v2.5.1 appendix C (minimal lower layer protocol).
"""

from __future__ import annotations

import hashlib
import os
import signal
import subprocess
import sys
import threading
from pathlib import Path

import pytest
from sqlalchemy import func, select

from app.config import PROJECT_ROOT
from app.feeds.listener import Listener
from app.store import db
from app.store.models import FeedMessage, Stay
from tests.feeds.hl7_messages import adt
from tests.feeds.hl7_setup import MAPPING, PSEUDONYMISER, add_units, count
from tests.feeds.mllp_client import Sender, ack_code, free_port, running, wait_for_port

SENDERS = 4
# Visits per sender (two messages each). The 20,000-message run is the same test
# with MORROW_FEED_RELIABILITY_VISITS=2500 (it takes minutes on SQLite).
VISITS = int(os.environ.get("MORROW_FEED_RELIABILITY_VISITS", "60"))


def stream(sender: int, visits: int) -> list[str]:
    """An admission and a discharge for each of ``visits`` visits, in time order."""
    messages = []
    for n in range(visits):
        day, minute = divmod(n, 600)
        hour, minute = divmod(minute, 60)
        admitted = f"202602{1 + day:02d}{hour:02d}{minute:02d}"
        left = f"202602{2 + day:02d}{hour:02d}{minute:02d}"
        visit = f"S{sender}V{n}"
        messages.append(adt("A01", f"{visit}-A01", occurred=admitted, sent=admitted,
                            visit=visit, location="2000"))
        messages.append(adt("A03", f"{visit}-A03", occurred=left, sent=left, visit=visit,
                            location="2000", disposition="01"))
    return messages


def stays_checksum(url: str) -> tuple[int, str]:
    """How many stays and a SHA-256 of their rows in id order (every column but batch)."""
    columns = [c for c in Stay.__table__.columns if c.name != "batch_id"]
    with db.session_scope(url) as session:
        rows = session.execute(select(*columns).order_by(Stay.stay_id)).all()
    digest = hashlib.sha256(repr([tuple(r) for r in rows]).encode()).hexdigest()
    return len(rows), digest


def test_messages_over_mllp_are_acknowledged_after_their_commit(db_url: str) -> None:
    add_units(db_url)
    listener = Listener(db_url, MAPPING, PSEUDONYMISER, port=0)
    with running(listener) as port:
        sender = Sender(port)
        ack = sender.send(adt("A01", "L1", occurred="202603010900"))
        # The stay is in the database (read on another connection) when the ACK arrives.
        assert ack_code(ack) == ("AA", "L1")
        assert count(db_url, Stay) == 1
        assert ack_code(sender.send(adt("A01", "L1", occurred="202603010900"))) == ("AA", "L1")
        bad = sender.send(adt("A01", "L2", occurred="2026-03-01"))
        assert ack_code(bad) == ("AE", "L2") and "EVN-6" in bad
        assert ack_code(sender.send(adt("A04", "L3"))) == ("AR", "L3")
        sender.close()
    assert count(db_url, Stay) == 1 and count(db_url, FeedMessage) == 3


def test_concurrent_senders_each_message_applied_exactly_once(db_url: str) -> None:
    add_units(db_url)
    streams = [stream(s, VISITS) for s in range(SENDERS)]
    acks: list[list[tuple[str, str]]] = [[] for _ in range(SENDERS)]
    listener = Listener(db_url, MAPPING, PSEUDONYMISER, port=0)
    with running(listener) as port:
        def send_all(index: int) -> None:
            sender = Sender(port)
            for message in streams[index]:
                acks[index].append(ack_code(sender.send(message)))
            sender.close()

        threads = [threading.Thread(target=send_all, args=(i,)) for i in range(SENDERS)]
        for thread in threads:
            thread.start()
        for thread in threads:
            thread.join(600)
    total = SENDERS * VISITS * 2
    assert sum(len(a) for a in acks) == total
    assert all(code == "AA" for a in acks for code, _ in a)
    assert count(db_url, FeedMessage) == total
    with db.session_scope(db_url) as session:
        assert session.scalar(select(func.sum(FeedMessage.repeats))) == 0
        open_stays = session.scalar(select(func.count()).select_from(Stay)
                                    .where(Stay.discharged_at.is_(None)))
    assert count(db_url, Stay) == SENDERS * VISITS and open_stays == 0


@pytest.mark.skipif(sys.platform == "win32", reason="SIGKILL")
def test_kill_restart_and_resend_loses_and_doubles_nothing(db_url: str, tmp_path: Path) -> None:
    add_units(db_url)
    messages = [m for s in range(2) for m in stream(s, VISITS)]
    # The same messages straight through receive_hl7: what the database must hold after.
    reference = f"sqlite:///{tmp_path / 'reference.db'}"
    db.upgrade(reference)
    add_units(reference)
    from tests.feeds.hl7_setup import send
    for message in messages:
        assert send(reference, message).status == "applied"

    secret = tmp_path / "secret"
    secret.write_text(PSEUDONYMISER.secret.decode() + "\n")
    secret.chmod(0o600)
    mapping = tmp_path / "feeds.toml"
    mapping.write_text('[units]\n"2000" = "KV-CRIT"\n"3000" = "KV-SURG"\n'
                       '[locations]\nignore = ["WARD-4"]\n'
                       '[outcomes]\n"01" = "home"\n"20" = "died"\n')
    env = {**os.environ, "MORROW_FEED_SECRET_FILE": str(secret), "MORROW_TIMEZONE": "UTC"}

    def start() -> tuple[subprocess.Popen[bytes], int]:
        port = free_port()
        process = subprocess.Popen(
            [sys.executable, "-m", "app.cli.main", "--db", db_url, "listen", "--port",
             str(port), "--mapping", str(mapping)], cwd=PROJECT_ROOT, env=env,
            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        wait_for_port(port)
        return process, port

    process, port = start()
    acknowledged = 0
    kill_at = len(messages) // 3
    try:
        sender = Sender(port, timeout=20)
        for message in messages:
            if acknowledged == kill_at:
                # Sent, not yet acknowledged, when the listener is killed.
                sender.sock.sendall(b"\x0b" + message.encode() + b"\x1c\r")
                process.send_signal(signal.SIGKILL)
                process.wait(30)
                break
            assert ack_code(sender.send(message))[0] == "AA"
            acknowledged += 1
        sender.close()
        process, port = start()
        sender = Sender(port)
        for message in messages[acknowledged:]:  # everything not acknowledged, again
            assert ack_code(sender.send(message))[0] == "AA"
        sender.close()
    finally:
        process.terminate()
        process.wait(30)
    assert count(db_url, FeedMessage) == len(messages)
    assert stays_checksum(db_url) == stays_checksum(reference)
    assert stays_checksum(db_url)[0] == 2 * VISITS
