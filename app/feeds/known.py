"""What a feed remembers between messages: the unit codes of each database.

Every message asks which units Morrow has (a point of care maps to one of them). Units are
added rarely (units.csv) and never deleted while a feed runs, so the codes are read once and
kept for ``KEEP_S`` seconds per process; a code not among those kept is looked up again at
once (``fresh=True``), so a unit added a moment ago is found by the next message that names
it. A restored database (``morrow restore``) is seen within ``KEEP_S`` seconds; ``forget``
drops everything kept (after a transaction that failed, say).
"""

from __future__ import annotations

import threading
import time

from sqlalchemy import select
from sqlalchemy.orm import Session

from app.store.models import Unit

KEEP_S = 10.0

_UNIT_CODES = select(Unit.code)


class UnitCodes:
    """Unit codes per database, kept for ``keep_s`` seconds."""

    def __init__(self, keep_s: float = KEEP_S):
        self.keep_s = keep_s
        self._kept: dict[str, tuple[float, frozenset[str]]] = {}
        self._lock = threading.Lock()

    def codes(self, session: Session, *, fresh: bool = False) -> frozenset[str]:
        key = repr(session.get_bind().engine.url)
        now = time.monotonic()
        with self._lock:
            kept = self._kept.get(key)
        if kept is not None and not fresh and now - kept[0] < self.keep_s:
            return kept[1]
        codes = frozenset(session.scalars(_UNIT_CODES))
        with self._lock:
            self._kept[key] = (now, codes)
        return codes

    def forget(self) -> None:
        with self._lock:
            self._kept.clear()


UNITS = UnitCodes()
