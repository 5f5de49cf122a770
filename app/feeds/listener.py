"""``morrow listen``: HL7 v2 messages over MLLP, each acknowledged after its commit.

The TCP server is python-hl7's asyncio MLLP server (``hl7.mllp.start_hl7_server``); each
block (VT message FS CR, HL7 v2.5.1 appendix C) is handed to ``app.feeds.receive.receive_hl7``
in a worker thread, off the event loop, and its ACK written back only when that returns,
that is after the transaction is committed. A connection's messages are taken one at a time
in the order sent (the sender waits for each ACK: original-mode acknowledgement); several
connections are served at once. On SQLite one worker thread writes (one writer at a time
anyway); on PostgreSQL four.

If the listener dies between the commit and the ACK, the sender sends the message again;
its control id is then known and it is acknowledged without a second change, so a message
is applied exactly once however often it is sent.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import signal
import sys
from collections.abc import Awaitable, Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from datetime import UTC, datetime

from hl7.mllp import start_hl7_server
from hl7.mllp.exceptions import InvalidBlockError

from app.bounds import MAX_FEED_MESSAGE_BYTES
from app.config import get_settings
from app.feeds import hl7_v2
from app.feeds.census import CensusClock
from app.feeds.mapping import FeedMapping
from app.feeds.pseudonym import Pseudonymiser, site_pseudonymiser
from app.feeds.receive import Receipt, receive_hl7

log = logging.getLogger("morrow.feeds.listener")


def _decode(block: bytes) -> str:
    try:
        return block.decode("utf-8")
    except UnicodeDecodeError:
        return block.decode("latin-1")


@dataclass
class Listener:
    """The MLLP server for one database; ``start`` binds, ``stop`` closes and drains."""

    url: str
    mapping: FeedMapping
    pseudonymiser: Pseudonymiser
    host: str = "127.0.0.1"
    port: int = 2575
    workers: int = 0
    received: int = 0
    server: asyncio.base_events.Server | None = None
    _executor: ThreadPoolExecutor | None = None
    # Census snapshots at each unit's census time from the feed's state (app.feeds.census).
    census: CensusClock | None = None
    _connections: set[asyncio.Task[None]] = field(default_factory=set)

    async def start(self) -> int:
        """Start listening; the port bound (useful with port 0)."""
        count = self.workers or (1 if self.url.startswith("sqlite") else 4)
        self._executor = ThreadPoolExecutor(max_workers=count, thread_name_prefix="hl7")
        self.census = CensusClock(get_settings().tz, actor="hl7 listener")
        self.server = await start_hl7_server(self._client, self.host, self.port,
                                             limit=MAX_FEED_MESSAGE_BYTES)
        sock = self.server.sockets[0]
        return int(sock.getsockname()[1])

    async def stop(self) -> None:
        if self.server is not None:
            self.server.close()
            await self.server.wait_closed()
        for task in list(self._connections):
            task.cancel()
        for task in list(self._connections):
            with contextlib.suppress(asyncio.CancelledError, Exception):
                await task
        if self._executor is not None:
            self._executor.shutdown(wait=True)  # a message being stored is finished

    def _client(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter
                ) -> Awaitable[None]:
        task = asyncio.ensure_future(self._serve(reader, writer))
        self._connections.add(task)
        task.add_done_callback(self._connections.discard)
        return task

    async def _serve(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        peer = writer.get_extra_info("peername")
        loop = asyncio.get_running_loop()
        try:
            while True:
                try:
                    block = await reader.readblock()  # type: ignore[attr-defined]
                except asyncio.IncompleteReadError:
                    return  # the sender closed the connection
                except InvalidBlockError:
                    log.warning("MLLP block from %s without its start character: skipped",
                                peer)
                    continue
                except ValueError:  # longer than MAX_FEED_MESSAGE_BYTES
                    ack = hl7_v2.build_ack(hl7_v2.Header(), "AR", text=(
                        f"message longer than {MAX_FEED_MESSAGE_BYTES} bytes"),
                        error_code=hl7_v2.ERR_SEGMENT)
                    writer.writeblock(ack.encode("utf-8"))  # type: ignore[attr-defined]
                    await writer.drain()
                    continue
                text = _decode(block)
                receipt = await loop.run_in_executor(self._executor, self._receive, text)
                writer.writeblock(receipt.ack.encode("utf-8"))  # type: ignore[attr-defined]
                await writer.drain()
        except (ConnectionError, asyncio.CancelledError):
            return
        finally:
            writer.close()
            with contextlib.suppress(Exception):
                await writer.wait_closed()

    def _receive(self, text: str) -> Receipt:
        self.received += 1
        return receive_hl7(self.url, text, mapping=self.mapping,
                           pseudonymiser=self.pseudonymiser, tz=get_settings().tz,
                           received_at=datetime.now(UTC), actor="hl7 listener",
                           census=self.census)


def serve_forever(url: str, mapping: FeedMapping, *, host: str, port: int,
                  on_ready: Callable[[int], None] | None = None) -> int:
    """Run the listener until SIGTERM or SIGINT; exit status 0."""
    pseudonymiser = site_pseudonymiser()

    async def main() -> None:
        listener = Listener(url, mapping, pseudonymiser, host=host, port=port)
        bound = await listener.start()
        print(f"listening for HL7 v2 over MLLP on {host}:{bound}", flush=True)
        if on_ready is not None:
            on_ready(bound)
        stop = asyncio.Event()
        loop = asyncio.get_running_loop()
        for sig in (signal.SIGTERM, signal.SIGINT):
            with contextlib.suppress(NotImplementedError):
                loop.add_signal_handler(sig, stop.set)
        await stop.wait()
        await listener.stop()
        print(f"stopped after {listener.received} messages", file=sys.stderr)

    asyncio.run(main())
    return 0
