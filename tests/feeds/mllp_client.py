"""A plain MLLP sender for the tests (HL7 v2.5.1 appendix C framing: VT message FS CR).

python-hl7's ``MLLPClient`` reads one ``recv`` and may stop mid-ACK; this one reads up to
the end of the block, and serves the listener tests and the benchmark alike.
"""

from __future__ import annotations

import socket
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager

import hl7

from app.feeds.listener import Listener

START, END = b"\x0b", b"\x1c\r"


class Sender:
    def __init__(self, port: int, host: str = "127.0.0.1", timeout: float = 60.0):
        self.sock = socket.create_connection((host, port), timeout=timeout)
        self.buffer = b""

    def send(self, message: str) -> str:
        """Send one message and wait for its acknowledgement (text)."""
        self.sock.sendall(START + message.encode("utf-8") + END)
        while END not in self.buffer:
            chunk = self.sock.recv(65536)
            if not chunk:
                raise ConnectionError("the listener closed the connection")
            self.buffer += chunk
        block, self.buffer = self.buffer.split(END, 1)
        assert block.startswith(START)
        return block[1:].decode("utf-8")

    def close(self) -> None:
        self.sock.close()


def ack_code(ack: str) -> tuple[str, str]:
    """MSA-1 and MSA-2 of an ACK, read with python-hl7."""
    msa = hl7.parse(ack).segment("MSA")
    return str(msa(1)), str(msa(2))


@contextmanager
def running(listener: Listener) -> Iterator[int]:
    """Run ``listener`` on an event loop in a thread; yield its port; stop it after."""
    import asyncio

    loop = asyncio.new_event_loop()
    ready = threading.Event()
    port: list[int] = []

    def run() -> None:
        asyncio.set_event_loop(loop)
        port.append(loop.run_until_complete(listener.start()))
        ready.set()
        loop.run_forever()

    thread = threading.Thread(target=run, daemon=True)
    thread.start()
    if not ready.wait(30):
        raise RuntimeError("the listener did not start")
    try:
        yield port[0]
    finally:
        asyncio.run_coroutine_threadsafe(listener.stop(), loop).result(60)
        loop.call_soon_threadsafe(loop.stop)
        thread.join(30)
        loop.close()


def free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


def wait_for_port(port: int, seconds: float = 60.0) -> None:
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        try:
            socket.create_connection(("127.0.0.1", port), timeout=1).close()
            return
        except OSError:
            time.sleep(0.05)
    raise RuntimeError(f"nothing listens on port {port}")
