"""Request-level dependencies: one session per request; a write is committed before the answer.

FastAPI ends a yield dependency of the default ("request") scope after the response has
been sent, so a commit there could fail, or be lost with the process, after the client was
told "recorded". ``get_session`` therefore has scope "function": FastAPI ends it as soon as
the route function returns, before the response goes out (fastapi/routing.py runs the
function's exit stack, then awaits the response). A POST, PUT, PATCH or DELETE commits
there, and a commit that fails becomes an error answer, never a success (a busy database:
the 503 of ``app.web.busy``). A read (GET,
HEAD, OPTIONS) writes only bookkeeping (a session's last-seen time, the hourly stored
forecast): it commits after the answer, as before, so a page never waits for another
writer's lock just to note that someone looked.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Annotated

from fastapi import Depends, Path, Request
from sqlalchemy.orm import Session

from app.store import db

SAFE_METHODS = frozenset({"GET", "HEAD", "OPTIONS"})


def _request_session(request: Request) -> Iterator[Session]:
    """The session, closed (and rolled back on any error) after the response."""
    with db.session_scope(request.app.state.database_url) as session:
        yield session


def get_session(request: Request,
                session: Annotated[Session, Depends(_request_session)]) -> Iterator[Session]:
    yield session
    if request.method not in SAFE_METHODS:
        session.commit()


SessionDep = Annotated[Session, Depends(get_session, scope="function")]
# A row id in an address: what both databases' integer keys hold (larger ones are a 422).
RowId = Annotated[int, Path(ge=1, le=2**63 - 1)]
