"""Time limits for long work: planning, forecasts, the booking check and the model page.

Work past its limit is cancelled where it stands (at the next ``app.stats.cancel``
checkpoint, a few milliseconds apart in the long loops) and :class:`WorkCancelled` says, in
plain words, what took too long and what to try instead. The same happens when the server
is shutting down (``stopping`` set), so a SIGTERM ends the process within seconds instead of
waiting for a simulation that could run for minutes; nothing keeps running in the background.

Limits nest: inner work keeps the earlier of its own deadline and its caller's.
"""

from __future__ import annotations

import math
import threading
import time
from collections.abc import Iterator
from contextlib import AbstractContextManager, contextmanager
from contextvars import ContextVar
from dataclasses import dataclass

from app.stats import cancel

__all__ = ["WorkCancelled", "check", "command_limit", "remaining", "time_limit"]


class WorkCancelled(Exception):
    """Long work stopped before it finished; the message says why and what to try."""

    def __init__(self, message: str, *, shutting_down: bool = False) -> None:
        super().__init__(message)
        self.message = message
        self.shutting_down = shutting_down


@dataclass(frozen=True)
class _Limit:
    deadline: float  # time.monotonic()
    seconds: float
    what: str
    advice: str
    stopping: threading.Event | None


_current: ContextVar[_Limit | None] = ContextVar("morrow_time_limit", default=None)


def _check() -> None:
    limit = _current.get()
    if limit is None:
        return
    if limit.stopping is not None and limit.stopping.is_set():
        raise WorkCancelled(f"{limit.what} was stopped because the server is shutting down; "
                            "try again in a minute", shutting_down=True)
    if time.monotonic() > limit.deadline:
        raise WorkCancelled(f"{limit.what} took longer than its limit of "
                            f"{limit.seconds:g} seconds and was stopped. {limit.advice}")


@contextmanager
def time_limit(seconds: float, what: str, advice: str = "Try a smaller request.", *,
               stopping: threading.Event | None = None) -> Iterator[None]:
    """Cancel the work done inside after ``seconds`` (or once ``stopping`` is set).

    ``what`` names the work for the message ("the planning simulation"); ``advice`` says
    what to try instead.
    """
    if not (math.isfinite(seconds) and seconds > 0):
        raise ValueError(f"a time limit must be a positive number of seconds, got {seconds!r}")
    outer = _current.get()
    deadline = time.monotonic() + seconds
    if outer is not None and outer.deadline < deadline:
        deadline, seconds = outer.deadline, outer.seconds
    limit = _Limit(deadline, seconds, what, advice,
                   stopping if stopping is not None else outer.stopping if outer else None)
    token = _current.set(limit)
    try:
        with cancel.checked_by(_check):
            yield
    finally:
        _current.reset(token)


def remaining() -> float | None:
    """Seconds left under the current limit (0 when past it); None without a limit."""
    limit = _current.get()
    return None if limit is None else max(0.0, limit.deadline - time.monotonic())


def check() -> None:
    """Raise :class:`WorkCancelled` if the current limit has passed (for waits and loops
    outside ``app.stats``)."""
    _check()


def command_limit(what: str, advice: str) -> AbstractContextManager[None]:
    """The command line's limit for long work (``MORROW_COMMAND_SECONDS``)."""
    from app.config import get_settings

    return time_limit(get_settings().command_seconds, what, advice)
