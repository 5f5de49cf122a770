"""Cooperative cancellation of long numerical work.

A thread cannot be stopped from outside, so long loops (the planning simulation's
replications and arrivals, the forecast's census instants) call :func:`checkpoint` now and
then. The caller decides what a checkpoint does, through :func:`checked_by`: typically it
raises once a time limit has passed or the server is shutting down (``app.time_limits``).
Without a caller's check a checkpoint does nothing, so the numerics stay usable on their own
and this package knows nothing of servers or clocks.

The check lives in a context variable: each thread (each web request's worker thread) sees
only the check its own caller installed.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from contextlib import contextmanager
from contextvars import ContextVar

__all__ = ["checked_by", "checkpoint"]

_check: ContextVar[Callable[[], None] | None] = ContextVar("morrow_cancel_check", default=None)


def checkpoint() -> None:
    """Run the caller's check (which raises to cancel the work); nothing when there is none."""
    check = _check.get()
    if check is not None:
        check()


@contextmanager
def checked_by(check: Callable[[], None]) -> Iterator[None]:
    """Make every :func:`checkpoint` in this context call ``check``."""
    token = _check.set(check)
    try:
        yield
    finally:
        _check.reset(token)
