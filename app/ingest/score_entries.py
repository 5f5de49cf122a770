"""A stay's score entries one at a time: the history, the latest entry, and a withdrawal.

The observation table is append-only (DEVELOPERS.md, "Corrections"): a correction is a new
row (the importer gives it the next revision when its recorded_at equals the last one's), and
a withdrawal is a new row with ``withdrawn=True`` holding the value it withdrew, so both stay
on record. ``app.state.load`` treats a measurement whose latest entry is a withdrawal as
having no value.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from app.store.audit import record_audit
from app.store.models import ImportBatch, Observation
from app.timeutil import as_utc

# The batch a withdrawal is written in: kind "observations", so the page's forecast cache
# treats it as a score change (app/store/repo.data_markers), not a change of stays.
WITHDRAWAL_BATCH = "score withdrawal form"


class NothingToWithdraw(LookupError):
    """No value is stored for that stay, score and time (or it is already withdrawn)."""


@dataclass(frozen=True)
class Entry:
    """One stored row: a value entered, a correction, or a withdrawal."""

    stay_id: str
    name: str
    observed_at: datetime
    value: float
    recorded_at: datetime
    revision: int
    withdrawn: bool
    actor: str | None


def entries(session: Session, stay_id: str, name: str | None = None,
            observed_at: datetime | None = None) -> list[Entry]:
    """Every row of a stay (of one score, of one measurement), in the order entered."""
    query = (select(Observation.stay_id, Observation.name, Observation.observed_at,
                    Observation.value, Observation.recorded_at, Observation.revision,
                    Observation.withdrawn, ImportBatch.actor)
             .outerjoin(ImportBatch, Observation.batch_id == ImportBatch.id)
             .where(Observation.stay_id == stay_id))
    if name is not None:
        query = query.where(Observation.name == name)
    if observed_at is not None:
        query = query.where(Observation.observed_at == as_utc(observed_at))
    rows = session.execute(query.order_by(Observation.observed_at, Observation.name,
                                          Observation.recorded_at, Observation.revision))
    return [Entry(r.stay_id, r.name, as_utc(r.observed_at), float(r.value),
                  as_utc(r.recorded_at), int(r.revision), bool(r.withdrawn), r.actor)
            for r in rows]


def latest(session: Session, stay_id: str, name: str, observed_at: datetime) -> Entry | None:
    """The latest entry of one measurement (a withdrawal included), or None."""
    found = entries(session, stay_id, name, observed_at)
    return found[-1] if found else None


def measurements(session: Session, stay_id: str) -> list[dict[str, Any]]:
    """Each (name, observed_at) of the stay, newest first: its current value (None when
    withdrawn) and every entry that led to it, oldest first."""
    grouped: dict[tuple[str, datetime], list[Entry]] = {}
    for entry in entries(session, stay_id):
        grouped.setdefault((entry.name, entry.observed_at), []).append(entry)
    out = [{"name": name, "observed_at": observed_at, "entries": rows,
            "value": None if rows[-1].withdrawn else rows[-1].value}
           for (name, observed_at), rows in grouped.items()]
    out.sort(key=lambda m: (m["observed_at"], m["name"]), reverse=True)
    return out


def withdraw(session: Session, stay_id: str, name: str, observed_at: datetime, *,
             recorded_at: datetime, actor: str, details: dict[str, Any] | None = None) -> Entry:
    """Withdraw the value of one measurement: a new row, audited; nothing is deleted.

    ``details`` (the unit and bed, say) go into the audit event beside the key. The caller
    owns the transaction, as with ``import_file``.
    """
    observed_at, recorded_at = as_utc(observed_at), as_utc(recorded_at)
    known = [e for e in entries(session, stay_id, name, observed_at)
             if e.recorded_at <= recorded_at]
    if not known or known[-1].withdrawn:
        raise NothingToWithdraw(f"no value of {name} observed at {observed_at.isoformat()} "
                                f"is stored for {stay_id}")
    before = known[-1]
    revision = session.scalar(select(func.max(Observation.revision)).where(
        Observation.stay_id == stay_id, Observation.name == name,
        Observation.observed_at == observed_at, Observation.recorded_at == recorded_at))
    key = {"stay_id": stay_id, "name": name, "observed_at": observed_at.isoformat()}
    batch = ImportBatch(kind="observations", filename=WITHDRAWAL_BATCH,
                        sha256=hashlib.sha256(json.dumps(
                            {**key, "recorded_at": recorded_at.isoformat()},
                            sort_keys=True).encode()).hexdigest(),
                        rows=1, inserted=1, updated=0, unchanged=0, actor=actor[:100])
    session.add(batch)
    session.flush()
    session.add(Observation(stay_id=stay_id, observed_at=observed_at, name=name,
                            value=before.value, recorded_at=recorded_at,
                            revision=0 if revision is None else revision + 1,
                            withdrawn=True, batch_id=batch.id))
    record_audit(session, actor, "withdraw", "observation",
                 f"{stay_id} {name} {observed_at.isoformat()}", {**key, "value": before.value},
                 {**key, **(details or {}), "withdrawn": True}, batch_id=batch.id)
    return Entry(stay_id, name, observed_at, before.value, recorded_at,
                 0 if revision is None else revision + 1, True, actor)
