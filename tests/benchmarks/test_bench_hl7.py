"""HL7 v2 ADT throughput on SQLite: target at least 500 messages a second (issue 15), each
committed before its ACK; over MLLP from 4 senders at once, and straight through
``receive_hl7`` as ``morrow import hl7`` does.

Besides wall time each prints the process's CPU time (``time.process_time``, all its
threads: over MLLP that includes the senders), which a shared machine disturbs less, and
the file path prints the SQL statements per message."""

from __future__ import annotations

import threading
import time

from sqlalchemy import event

from app.feeds.listener import Listener
from app.store import db
from tests.benchmarks.conftest import timed
from tests.feeds.hl7_setup import MAPPING, PSEUDONYMISER, add_units, send
from tests.feeds.mllp_client import Sender, ack_code, running
from tests.feeds.test_hl7_listener import stream

TARGET_PER_S = 500
SENDERS, VISITS = 4, 250  # 2,000 ADT messages (A01 + A03 per visit)


def test_adt_messages_per_second_over_mllp(db_url: str) -> None:
    add_units(db_url)
    streams = [stream(s, VISITS) for s in range(SENDERS)]
    total = sum(len(s) for s in streams)
    out: dict[str, float] = {}
    codes: list[str] = []
    listener = Listener(db_url, MAPPING, PSEUDONYMISER, port=0)
    with running(listener) as port:
        def send_all(index: int) -> None:
            sender = Sender(port)
            for message in streams[index]:
                codes.append(ack_code(sender.send(message))[0])
            sender.close()

        threads = [threading.Thread(target=send_all, args=(i,)) for i in range(SENDERS)]
        cpu = time.process_time()
        with timed(f"{total} ADT messages over MLLP, 4 senders", total / TARGET_PER_S, out):
            for thread in threads:
                thread.start()
            for thread in threads:
                thread.join()
        cpu = time.process_time() - cpu
    seconds = next(iter(out.values()))
    print(f"BENCH   {total / seconds:.0f} ADT messages/s over MLLP (target {TARGET_PER_S}); "
          f"CPU {cpu:.2f} s with the senders: {total / cpu:.0f} messages per CPU second")
    assert codes.count("AA") == total


def test_adt_messages_per_second_from_a_file(db_url: str) -> None:
    add_units(db_url)
    messages = [m for s in range(SENDERS) for m in stream(s, VISITS)]
    out: dict[str, float] = {}
    statements = [0]

    def counted(*_args: object) -> None:
        statements[0] += 1

    engine = db.get_engine(db_url)
    event.listen(engine, "before_cursor_execute", counted)
    cpu = time.process_time()
    try:
        with timed(f"{len(messages)} ADT messages through receive_hl7",
                   len(messages) / TARGET_PER_S, out):
            statuses = [send(db_url, m).status for m in messages]
    finally:
        cpu = time.process_time() - cpu
        event.remove(engine, "before_cursor_execute", counted)
    seconds = next(iter(out.values()))
    print(f"BENCH   {len(messages) / seconds:.0f} ADT messages/s one by one "
          f"(target {TARGET_PER_S}); CPU {cpu:.2f} s: {len(messages) / cpu:.0f} messages per "
          f"CPU second; {statements[0] / len(messages):.1f} SQL statements per message")
    assert statuses.count("applied") == len(messages)
