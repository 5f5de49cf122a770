"""A database too busy to take a write is answered with a 503 and plain words, never a 500.

SQLite lets one writer in at a time; a writer waits for the lock up to the busy timeout
(``db.BUSY_TIMEOUT_MS``) and then fails with "database is locked". On SQLite that wait
happens at a request's first INSERT or UPDATE (the flush inside an import), not only at the
commit that ``app.web.deps`` already answers; PostgreSQL may abort one of two transactions
that wait on each other. Either way the transaction was rolled back, nothing was stored,
and sending the same request again is safe, which is what the answer says.
"""

from __future__ import annotations

from fastapi import FastAPI, Request
from fastapi.responses import HTMLResponse, JSONResponse, Response
from sqlalchemy.exc import OperationalError

from app.store.retry import is_busy
from app.web.security import _message_page, is_api_path

RETRY_AFTER_S = 5
MESSAGE = ("The database was busy with other changes and nothing was saved. "
           "Please send it again in a few seconds.")


async def _on_operational_error(request: Request, exc: Exception) -> Response:
    if not (isinstance(exc, OperationalError) and is_busy(exc)):
        raise exc  # a real failure: the server's error handling logs it and answers 500
    headers = {"Retry-After": str(RETRY_AFTER_S)}
    if is_api_path(request.url.path):
        return JSONResponse({"detail": MESSAGE}, status_code=503, headers=headers)
    return HTMLResponse(_message_page("Busy, nothing saved", MESSAGE), status_code=503,
                        headers=headers)


def install(app: FastAPI) -> None:
    """Answer a busy database with a 503 (see the module docstring)."""
    app.add_exception_handler(OperationalError, _on_operational_error)
