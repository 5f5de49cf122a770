"""Request-level dependencies: one session per request, committed on success."""

from __future__ import annotations

from collections.abc import Iterator
from typing import Annotated

from fastapi import Depends, Request
from sqlalchemy.orm import Session

from app.store import db


def get_session(request: Request) -> Iterator[Session]:
    with db.session_scope(request.app.state.database_url) as session:
        yield session


SessionDep = Annotated[Session, Depends(get_session)]
