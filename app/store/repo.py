"""Queries shared by the layers above: every read and write of the store goes through here."""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any, TypeVar

from sqlalchemy import insert, select, update
from sqlalchemy.orm import Session

from app.store.models import AuditEvent, CensusRow, CensusSnapshot, Stay, Unit, UnitBeds
from app.timeutil import as_utc

T = TypeVar("T")


def chunked(items: Sequence[T], size: int) -> Iterator[Sequence[T]]:
    """Slices of at most ``size``: keeps IN lists and bulk inserts under database limits."""
    for start in range(0, len(items), size):
        yield items[start : start + size]


def infer_census_discharges(session: Session, unit: str, *, actor: str,
                            batch_id: int | None) -> int:
    """Diff a unit's snapshots into discharges; returns how many stays changed.

    A stay present in one snapshot and absent from the next is discharged at the later
    snapshot's time. An exact ``discharged_at`` from a stays file always wins, so stays whose
    discharge came from a stays file are never touched here.
    """
    snapshots = session.execute(
        select(CensusSnapshot.id, CensusSnapshot.taken_at)
        .where(CensusSnapshot.unit == unit).order_by(CensusSnapshot.taken_at)).all()
    if not snapshots:
        return 0
    order = {snap_id: i for i, (snap_id, _) in enumerate(snapshots)}
    last_seen: dict[str, int] = {}
    rows = session.execute(
        select(CensusRow.stay_id, CensusRow.snapshot_id)
        .join(CensusSnapshot, CensusRow.snapshot_id == CensusSnapshot.id)
        .where(CensusSnapshot.unit == unit))
    for stay_id, snap_id in rows:
        i = order[snap_id]
        if last_seen.get(stay_id, -1) < i:
            last_seen[stay_id] = i
    changed = 0
    audits: list[dict[str, Any]] = []
    for part in chunked(sorted(last_seen), 500):
        for stay in session.scalars(select(Stay).where(Stay.stay_id.in_(part))):
            if stay.discharge_source == "stays":
                continue
            i = last_seen[stay.stay_id]
            inferred = snapshots[i + 1][1] if i + 1 < len(snapshots) else None
            source = "census" if inferred is not None else None
            if stay.discharged_at == inferred and stay.discharge_source == source:
                continue
            audits.append({
                "actor": actor, "batch_id": batch_id, "action": "update", "entity": "stay",
                "entity_id": stay.stay_id,
                "before": {"discharged_at": _iso(stay.discharged_at),
                           "discharge_source": stay.discharge_source},
                "after": {"discharged_at": _iso(inferred), "discharge_source": source}})
            session.execute(update(Stay).where(Stay.stay_id == stay.stay_id)
                            .values(discharged_at=inferred, discharge_source=source))
            changed += 1
    if audits:
        session.execute(insert(AuditEvent), audits)
    return changed


def _iso(value: Any) -> str | None:
    return None if value is None else value.isoformat()


def list_units(session: Session) -> list[Unit]:
    return list(session.scalars(select(Unit).order_by(Unit.code)))


def get_unit(session: Session, code: str) -> Unit | None:
    return session.get(Unit, code)


def bed_plan(session: Session, unit: str) -> list[tuple[Any, int]]:
    """(valid_from or None, beds) of a unit, oldest first; None (always) sorts first."""
    rows = session.execute(select(UnitBeds.valid_from, UnitBeds.beds)
                           .where(UnitBeds.unit == unit)).all()
    return sorted(((v, b) for v, b in rows), key=lambda r: (r[0] is not None, r[0]))


def latest_beds(session: Session, unit: str, stay_ids: Sequence[str]) -> dict[str, str]:
    """The bed each stay had in the latest census snapshot that lists it."""
    from sqlalchemy import func

    if not stay_ids:
        return {}
    latest = (select(CensusRow.stay_id, func.max(CensusSnapshot.taken_at).label("taken_at"))
              .join(CensusSnapshot, CensusRow.snapshot_id == CensusSnapshot.id)
              .where(CensusSnapshot.unit == unit, CensusRow.stay_id.in_(list(stay_ids)))
              .group_by(CensusRow.stay_id).subquery())
    rows = session.execute(
        select(CensusRow.stay_id, CensusRow.bed)
        .join(CensusSnapshot, CensusRow.snapshot_id == CensusSnapshot.id)
        .join(latest, (latest.c.stay_id == CensusRow.stay_id)
              & (latest.c.taken_at == CensusSnapshot.taken_at))
        .where(CensusSnapshot.unit == unit))
    return {stay_id: bed for stay_id, bed in rows if bed}


@dataclass(frozen=True)
class DataMarkers:
    """Where the stored data stands: every write is an import batch (one file or one form).

    The markers count committed batches rather than take the newest id: on PostgreSQL
    several writers run at once, and a batch given a lower id can commit after one with a
    higher id, which would leave the newest id unchanged. Batches are never deleted, so a
    count changes with every commit, whatever the order.
    """

    latest: int  # how many batches of any kind are stored
    structure: int  # how many batches that may change stays, bookings, units or bed plans
    written_at: datetime | None  # when the newest batch was stored


def data_markers(session: Session) -> DataMarkers:
    """The data markers, in one query."""
    from sqlalchemy import case, func

    from app.store.models import ImportBatch

    latest, structure, written_at = session.execute(select(
        func.count(ImportBatch.id),
        func.count(case((ImportBatch.kind != "observations", ImportBatch.id))),
        func.max(ImportBatch.created_at))).one()
    return DataMarkers(int(latest or 0), int(structure or 0),
                       None if written_at is None else as_utc(written_at))


def data_marker(session: Session) -> int:
    """Changes whenever data is written (every write goes through an import batch)."""
    return data_markers(session).latest


def stay_in_unit(session: Session, unit: str, stay_id: str, at: datetime) -> bool:
    """Whether the stay is in the unit at ``at`` (admitted by then, not discharged by then)."""
    found = session.scalar(select(Stay.stay_id).where(
        Stay.stay_id == stay_id, Stay.unit == unit, Stay.admitted_at <= at,
        Stay.discharged_at.is_(None) | (Stay.discharged_at > at)))
    return found is not None


def latest_snapshot_at(session: Session, unit: str) -> Any:
    from sqlalchemy import func

    return session.scalar(select(func.max(CensusSnapshot.taken_at))
                          .where(CensusSnapshot.unit == unit))
