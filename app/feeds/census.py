"""Census snapshots taken from a feed's state, so a unit fed by HL7 v2 or FHIR needs no export.

At each census instant T of a unit that a feed serves (a unit with stays made from feed
messages), the stays in the unit at T (admitted by T, not discharged by T) are stored as a
census snapshot, exactly like an imported one: a ``census_snapshot`` with its ``census_row``s
and an ``import_batch`` of kind ``census`` whose file name says it came from the feed. The
rows carry the stays' admission details; a feed gives no bed label, so ``bed`` is blank.
Discharges are not inferred from these snapshots (``repo.infer_census_discharges`` is not
run): the feed gives each discharge its exact time, and the snapshot is built from it.

When it runs, and why there
---------------------------
A snapshot must show what the feed had said by T, not what it said later. So it is taken
lazily, in the same transaction as the message that crosses the instant: before a message
known at K is applied, every census instant T < K not yet taken is taken (``CensusClock``).
Messages known at or before T are in by then, later ones are not; a replayed history (where
known-at times are in the past) gets the snapshots it would have had live, whatever the
wall clock says, and no scheduler is needed while messages flow. When a unit is quiet no
message crosses its instant, so ``morrow feeds census`` (from cron, e.g. a few minutes after
each census time) takes the instants due up to now; a later message would take them too.
Both skip instants already stored, so running both never doubles a snapshot.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import cast
from zoneinfo import ZoneInfo

from sqlalchemy import Table, func, insert, select
from sqlalchemy.orm import Session

from app.feeds.apply import new_id
from app.store.models import (
    AuditEvent,
    CensusRow,
    CensusSnapshot,
    FeedStay,
    ImportBatch,
    Stay,
    Unit,
)
from app.timeutil import as_utc, census_instants_after, parse_clock

CENSUS_FIELDS = ("admitted_at", "admission_type", "age", "sex", "specialty", "source",
                 "booking_id")
# A catch-up never takes more than this many instants per unit in one call (about 10 years).
MAX_INSTANTS = 3700


@dataclass(frozen=True)
class TakenSnapshot:
    unit: str
    taken_at: datetime
    occupancy: int


def fed_units(session: Session) -> dict[str, datetime]:
    """Units with stays made from a feed, and the earliest admission among those stays."""
    rows = session.execute(
        select(Stay.unit, func.min(Stay.admitted_at))
        .join(FeedStay, FeedStay.stay_id == Stay.stay_id).group_by(Stay.unit)).all()
    return {unit: as_utc(first) for unit, first in rows}


def _due(session: Session, unit: Unit, first: datetime, until: datetime, tz: ZoneInfo, *,
         inclusive: bool) -> list[datetime]:
    latest = session.scalar(select(func.max(CensusSnapshot.taken_at))
                            .where(CensusSnapshot.unit == unit.code))
    start = max(as_utc(latest), first) if latest is not None else first - timedelta(seconds=1)
    if until <= start:
        return []
    clock = parse_clock(unit.census_time)
    # One instant per local day, at least 23 hours apart (a spring-forward day): no more
    # than this many fall in (start, until], so no more are worked out.
    count = min(MAX_INSTANTS, (until - start) // timedelta(hours=23) + 2)
    out = []
    for instant in census_instants_after(start, clock, tz, count):
        if instant > until or (instant == until and not inclusive):
            break
        out.append(instant)
    return out


def record_due(session: Session, until: datetime, tz: ZoneInfo, *, inclusive: bool = True,
               actor: str = "feed census") -> list[TakenSnapshot]:
    """Take every census instant of a fed unit after its latest snapshot, up to ``until``.

    Flush only (the caller commits). ``inclusive=False`` leaves an instant equal to
    ``until`` for later: a message known at that very instant still belongs in it.
    """
    until = as_utc(until)
    taken: list[TakenSnapshot] = []
    batch: ImportBatch | None = None
    units = {u.code: u for u in session.scalars(select(Unit))}
    for code, first in sorted(fed_units(session).items()):
        unit = units.get(code)
        if unit is None:
            continue
        for instant in _due(session, unit, first, until, tz, inclusive=inclusive):
            if batch is None:
                batch = ImportBatch(kind="census", filename="census taken from the feed",
                                    sha256="", rows=0, actor=actor[:100])
                session.add(batch)
                session.flush()
            taken.append(_take(session, code, instant, batch))
    if batch is not None:
        batch.rows = batch.inserted = sum(t.occupancy for t in taken)
        batch.sha256 = f"{len(taken)} snapshots"[:64]
        session.add(AuditEvent(actor=actor[:100], action="import", entity="census",
                               entity_id="feed", before=None,
                               after={"snapshots": len(taken), "rows": batch.rows},
                               batch_id=batch.id))
        session.flush()
    return taken


def _take(session: Session, unit: str, instant: datetime, batch: ImportBatch) -> TakenSnapshot:
    stays = session.execute(
        select(Stay.stay_id, *[getattr(Stay, f) for f in CENSUS_FIELDS])
        .where(Stay.unit == unit, Stay.admitted_at <= instant,
               Stay.discharged_at.is_(None) | (Stay.discharged_at > instant))
        .order_by(Stay.admitted_at, Stay.stay_id)).all()
    snapshot_id = new_id(session.connection().execute(
        insert(cast(Table, CensusSnapshot.__table__)),
        {"unit": unit, "taken_at": instant, "batch_id": batch.id}))
    if stays:
        # Core's executemany: the ORM's bulk insert costs more per row than the row itself.
        session.connection().execute(insert(cast(Table, CensusRow.__table__)), [
            {"snapshot_id": snapshot_id, "stay_id": row.stay_id, "bed": None,
             **{f: getattr(row, f) for f in CENSUS_FIELDS}} for row in stays])
    return TakenSnapshot(unit, instant, len(stays))


class CensusClock:
    """Takes due snapshots before each message of a stream; cheap between census instants.

    ``before(session, known_at)`` looks at the database only when ``known_at`` has passed
    the next census instant of some unit (about once per unit and day); ``record_due`` then
    takes everything due before ``known_at``, in the caller's transaction. One clock may
    serve a whole stream of transactions (a file import, the listener): it keeps only the
    next instant to look at, and a snapshot already stored is never taken twice.
    """

    def __init__(self, tz: ZoneInfo, actor: str = "feed census"):
        self.tz, self.actor = tz, actor
        self._next: datetime | None = None
        self.taken: list[TakenSnapshot] = []

    def _next_instant(self, session: Session, after: datetime) -> datetime | None:
        instants = [census_instants_after(after, parse_clock(u.census_time), self.tz, 1)[0]
                    for u in session.scalars(select(Unit))]
        return min(instants) if instants else None

    def before(self, session: Session, known_at: datetime) -> list[TakenSnapshot]:
        """Take the instants due before ``known_at``; the snapshots taken now."""
        known_at = as_utc(known_at)
        if self._next is not None and known_at <= self._next:
            return []
        taken = record_due(session, known_at, self.tz, inclusive=False, actor=self.actor)
        self.taken += taken
        # Instants before known_at are taken (or not due: no fed stay yet); the next one
        # that may come due is the first at or after known_at.
        self._next = self._next_instant(session, known_at - timedelta(microseconds=1))
        return taken

    def forget(self) -> None:
        """After a rolled-back transaction: what it took was not stored."""
        self._next = None
