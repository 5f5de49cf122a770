"""Import a FHIR R4 Bundle in one transaction: all of it or nothing, like a CSV file.

``morrow import fhir FILE`` and ``POST /api/feeds/fhir`` both call ``import_bundle_once``.
The Bundle is validated and translated first (``app.feeds.fhir``); then its entries'
messages are applied through ``app.feeds.apply.apply_message`` in the order they became
known, inside one transaction, with the census snapshots they cross taken on the way
(``app.feeds.census``). If any entry is refused, every problem found is reported by entry
and element, the transaction is rolled back (nothing of the Bundle is stored) and only the
refusal itself is recorded, in a transaction of its own, for the data page. An entry whose
point of care or code the mapping does not name is kept as a dead letter (as for HL7 v2),
to be applied once the mapping names it.
"""

from __future__ import annotations

import hashlib
import time
from dataclasses import dataclass, field
from datetime import UTC, datetime
from zoneinfo import ZoneInfo

from sqlalchemy import select
from sqlalchemy.orm import Session

from app.feeds.apply import apply_message, record_refusal
from app.feeds.census import CensusClock
from app.feeds.fhir import SOURCE, BundleProblem, BundleRefused, translate_bundle
from app.feeds.mapping import FeedMapping
from app.feeds.pseudonym import Pseudonymiser
from app.ingest.retried import IMPORT_TIME_LIMIT_S, ImportTimedOut
from app.store.models import Observation
from app.store.retry import run_transaction


@dataclass
class FhirImportResult:
    filename: str
    entries: int
    messages: int = 0
    applied: int = 0
    duplicates: int = 0
    ignored: int = 0
    dead_letters: list[str] = field(default_factory=list)
    census_snapshots: int = 0
    notes: list[str] = field(default_factory=list)

    def summary(self) -> str:
        text = (f"{self.filename}: {self.entries} entries, {self.messages} used; "
                f"{self.applied} applied, {self.duplicates} already received, "
                f"{self.ignored} ignored, {len(self.dead_letters)} kept as dead letters")
        if self.census_snapshots:
            text += f"; {self.census_snapshots} census snapshots taken"
        return text

    def as_json(self) -> dict[str, object]:
        return {"entries": self.entries, "messages": self.messages, "applied": self.applied,
                "duplicates": self.duplicates, "ignored": self.ignored,
                "dead_letters": self.dead_letters, "census_snapshots": self.census_snapshots,
                "notes": self.notes}


def import_bundle(session: Session, data: bytes, filename: str, *, received_at: datetime,
                  mapping: FeedMapping, pseudonymiser: Pseudonymiser, tz: ZoneInfo,
                  actor: str = "fhir") -> FhirImportResult:
    """Apply one Bundle; flush only. Raises ``BundleRefused`` (the caller rolls back)."""
    known_scores = set(session.scalars(select(Observation.name).distinct()))
    translated = translate_bundle(data, pseudonymiser=pseudonymiser, mapping=mapping, tz=tz,
                                  known_scores=known_scores)
    result = FhirImportResult(filename, translated.entries, len(translated.messages),
                              notes=translated.notes)
    order = sorted(enumerate(translated.messages),
                   key=lambda pair: (pair[1].message.known_at(received_at), pair[0]))
    clock = CensusClock(tz)
    problems: list[BundleProblem] = []
    for _, entry in order:
        # Never a census instant after the receipt (a sent time may be a little ahead).
        clock.before(session, min(entry.message.known_at(received_at), received_at))
        outcome = apply_message(session, entry.message, received_at=received_at,
                                mapping=mapping, actor=actor)
        if outcome.status == "refused":
            problems.append(BundleProblem(entry.path, outcome.reason or "refused"))
        elif outcome.status == "duplicate":
            result.duplicates += 1
        elif outcome.status == "ignored":
            result.ignored += 1
        elif outcome.status == "dead_letter":
            result.dead_letters.append(f"{entry.path}: {outcome.reason}")
        else:
            result.applied += 1
    if problems:
        raise BundleRefused(sorted(problems, key=lambda p: _entry_number(p.path)))
    result.census_snapshots = len(clock.taken)
    return result


def _entry_number(path: str) -> int:
    try:
        return int(path.split("[", 1)[1].split("]", 1)[0])
    except (IndexError, ValueError):
        return -1


def _record_refusal(url: str, data: bytes, refused: BundleRefused, received_at: datetime) -> None:
    """Note a refused Bundle (its digest and first reason, no content) for the data page."""
    digest = hashlib.sha256(data).hexdigest()
    reason = str(refused.problems[0]) if refused.problems else "refused"

    def work(session: Session) -> None:
        record_refusal(session, kind="fhir", source=SOURCE, control_id=f"refused/{digest}",
                       message_type="Bundle", digest=digest, sent_at=None,
                       received_at=received_at, reason=reason)

    run_transaction(url, work)


def import_bundle_once(url: str, data: bytes, filename: str, *, mapping: FeedMapping,
                       pseudonymiser: Pseudonymiser, tz: ZoneInfo, actor: str = "fhir",
                       received_at: datetime | None = None,
                       limit_s: float = IMPORT_TIME_LIMIT_S) -> FhirImportResult:
    """Import ``data`` and commit it before returning; run again if the database was busy.

    Raises ``BundleRefused`` (nothing stored but the note of the refusal) or
    ``ImportTimedOut`` (nothing stored).
    """
    received = (received_at or datetime.now(UTC)).astimezone(UTC)
    deadline = time.monotonic() + limit_s

    def work(session: Session) -> FhirImportResult:
        if time.monotonic() >= deadline:
            raise ImportTimedOut(limit_s)
        result = import_bundle(session, data, filename, received_at=received, mapping=mapping,
                               pseudonymiser=pseudonymiser, tz=tz, actor=actor)
        if time.monotonic() >= deadline:
            raise ImportTimedOut(limit_s)
        return result

    try:
        return run_transaction(url, work, retry_conflicts=True, deadline=deadline)
    except BundleRefused as refused:
        _record_refusal(url, data, refused, received)
        raise
