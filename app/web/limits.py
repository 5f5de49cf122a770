"""Every request runs under a time limit; work past it is cancelled and answered with a 503.

The limit (``MORROW_REQUEST_SECONDS``) is set around the whole request by an ASGI middleware;
the context variable it sets reaches the worker thread a synchronous route runs in (AnyIO
copies the context), where the long loops check it (``app.time_limits``). A cancelled request
gets a plain message saying what took too long and what to try. When the server shuts down
(uvicorn's lifespan end, after its graceful-shutdown wait) ``app.state.stopping`` is set and
every request still computing stops at its next checkpoint, so the process can exit.
"""

from __future__ import annotations

import re
import threading
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager

from fastapi import FastAPI, Request
from fastapi.responses import HTMLResponse, JSONResponse, Response
from starlette.types import ASGIApp, Receive, Scope, Send

from app.config import get_settings
from app.time_limits import WorkCancelled, time_limit
from app.web.security import _message_page, is_api_path

# What a long request computes, by path, and what to try when it takes too long.
_WORK = (
    (re.compile(r"/planning$"), "The planning simulation",
     "Try one year, 10 replications or smaller changes; larger runs belong to `morrow plan` "
     "on the command line."),
    (re.compile(r"/booking$"), "The booking check", "Try again in a minute."),
    (re.compile(r"/model$"), "The model page", "Try again in a minute."),
    (re.compile(r"/forecast$"), "The forecast", "Try fewer days, or again in a minute."),
)
RETRY_AFTER_S = 60


def _work(path: str) -> tuple[str, str]:
    for pattern, what, advice in _WORK:
        if pattern.search(path):
            return what, advice
    return "This request", "Try again in a minute."


class TimeLimitMiddleware:
    """Puts each HTTP request under the configured time limit."""

    def __init__(self, app: ASGIApp, *, seconds: float, stopping: threading.Event) -> None:
        self.app = app
        self.seconds = seconds
        self.stopping = stopping

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        what, advice = _work(scope.get("path", ""))
        with time_limit(self.seconds, what, advice, stopping=self.stopping):
            await self.app(scope, receive, send)


async def _on_work_cancelled(request: Request, exc: Exception) -> Response:
    assert isinstance(exc, WorkCancelled)
    headers = {"Retry-After": str(RETRY_AFTER_S)}
    if is_api_path(request.url.path):
        return JSONResponse({"detail": exc.message}, status_code=503, headers=headers)
    return HTMLResponse(_message_page("Took too long", exc.message), status_code=503,
                        headers=headers)


@asynccontextmanager
async def lifespan(app: FastAPI) -> AsyncIterator[None]:
    """At shutdown, stop the requests still computing (see the module docstring)."""
    yield
    stopping = getattr(app.state, "stopping", None)
    if isinstance(stopping, threading.Event):
        stopping.set()


def install(app: FastAPI) -> None:
    """Add the time limit and its 503 answer to ``app``."""
    app.state.stopping = threading.Event()
    app.add_exception_handler(WorkCancelled, _on_work_cancelled)
    app.add_middleware(TimeLimitMiddleware, seconds=get_settings().request_seconds,
                       stopping=app.state.stopping)
