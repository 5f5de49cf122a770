"""Applying one message's events to the stays, their feed rows, scores and the audit trail."""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any

from sqlalchemy import (
    Connection,
    delete,
    func,
    select,
)
from sqlalchemy.orm import Session

from app import bounds, score_names
from app.feeds.events import (
    FeedMessage,
    ScoreEvent,
    StayEvent,
    stay_id_for,
)
from app.feeds.feed_rows import (
    _INSERT_AUDIT,
    _INSERT_BATCH,
    _INSERT_FEED_STAY,
    _INSERT_STAY,
    _UPDATE_FEED_STAY,
    _UPDATE_STAY,
    _VISIT_STAYS,
    COVARIATES,
    Status,
    _DeadLetter,
    _Refused,
    _StayRow,
    new_id,
)
from app.feeds.known import UNITS
from app.feeds.mapping import KNOWN_SCORES, FeedMapping
from app.ingest.importer import OUTCOMES
from app.store.audit import jsonable
from app.store.models import (
    CensusRow,
    FeedStay,
    Observation,
    Stay,
)
from app.timeutil import as_utc


@dataclass
class _Work:
    session: Session
    mapping: FeedMapping
    actor: str
    now: datetime
    message_id: int
    batch: int | None = None  # the id of the message's import batch, once it has one
    note: str | None = None
    changed_visits: set[str] = field(default_factory=set)
    unmapped: dict[str, set[str]] = field(default_factory=dict)
    _units: frozenset[str] | None = None
    _score_names: set[str] | None = None
    # The stays of each visit read so far (forgotten when one is added or deleted).
    _visits: dict[str, list[_StayRow]] = field(default_factory=dict)
    _message: FeedMessage | None = None
    known_at: datetime = datetime.min.replace(tzinfo=UTC)
    conn: Connection = field(init=False)  # the session's, for the statements built once

    def __post_init__(self) -> None:
        self.conn = self.session.connection()

    # -- the message ---------------------------------------------------------------------

    def apply_all(self, message: FeedMessage, known_at: datetime) -> Status:
        """Apply the events; the caller runs this inside ``session.begin_nested()``."""
        self._message, self.known_at = message, known_at
        # The session starts its savepoint only when asked for the connection inside it:
        # ask now, as the statements below go to the connection straight (and must be in
        # the savepoint, or a refusal would not take them back).
        self.conn = self.session.connection()
        assert self.session.in_nested_transaction()
        if not message.events:
            raise _Refused("the message holds no event Morrow uses")
        results = []
        stays = [e for e in message.events if isinstance(e, StayEvent)]
        scores = [e for e in message.events if isinstance(e, ScoreEvent)]
        for event in stays:
            results.append(self._stay_event(event))
        if scores:
            results.append(self._scores(scores))
        if all(r == "ignored" for r in results):
            self.note = "only points of care the mapping ignores"
            return "ignored"
        return "applied"

    def unmapped_json(self) -> dict[str, Any] | None:
        return {k: sorted(v) for k, v in self.unmapped.items()} if self.unmapped else None

    def _unmapped(self, kind: str, code: str) -> None:
        self.unmapped.setdefault(kind, set()).add(code[:64])

    # -- lookups -------------------------------------------------------------------------

    def known_units(self, *, fresh: bool = False) -> frozenset[str]:
        if self._units is None or fresh:
            self._units = UNITS.codes(self.session, fresh=fresh)
        return self._units

    def unit(self, location: str | None) -> str | None:
        """The unit of a point of care; None if none given or ignored; dead letter if unmapped."""
        if not location or self.mapping.is_ignored(location):
            return None
        unit = self.mapping.unit_for(location, self.known_units())
        if unit is None or unit not in self.known_units():
            # Not among the units remembered: perhaps one added since (units.csv).
            unit = self.mapping.unit_for(location, self.known_units(fresh=True))
        if unit is None:
            self._unmapped("locations", location)
            raise _DeadLetter(f"point of care {location!r} is not mapped to a Morrow unit")
        if unit not in self.known_units():
            self._unmapped("locations", location)
            raise _DeadLetter(f"point of care {location!r} maps to unit {unit!r}, which Morrow "
                              "does not have (import it in units.csv)")
        return unit

    def instant(self, value: datetime | None, what: str) -> datetime:
        if value is None:
            raise _Refused(f"no {what} in the message")
        try:
            return bounds.check_instant(value.astimezone(UTC), what,
                                        latest=bounds.latest_event(self.now))
        except bounds.OutOfBounds as exc:
            raise _Refused(str(exc)) from None

    def visit_stays(self, visit: str) -> list[_StayRow]:
        cached = self._visits.get(visit)
        if cached is not None:
            return list(cached)
        self.session.flush()  # (nothing, mostly) scores added as objects
        stays = [_StayRow(**row._mapping) for row in
                 self.conn.execute(_VISIT_STAYS, {"visit": visit})]
        self._visits[visit] = stays
        return list(stays)

    def covariates(self, event: StayEvent, *, required: bool) -> dict[str, Any]:
        values: dict[str, Any] = {}
        if event.admission_class:
            kind = self.mapping.admission_type_for(event.admission_class)
            if kind is None:
                self._unmapped("admission_types", event.admission_class)
                raise _DeadLetter(f"admission type {event.admission_class!r} is not mapped to "
                                  "emergency or elective")
            values["admission_type"] = kind
        elif required:
            raise _Refused("no admission type (HL7 PV1-4, FHIR Encounter.class)")
        if event.age is not None:
            if not 0 <= event.age <= 120:
                raise _Refused(f"age at admission {event.age} is outside 0 to 120")
            values["age"] = event.age
        if event.sex is not None:
            if event.sex not in ("f", "m", "x"):
                raise _Refused(f"sex {event.sex!r} is not f, m or x")
            values["sex"] = event.sex
        specialty = self.mapping.specialty_for(event.specialty)
        if specialty:
            values["specialty"] = specialty
        source = self.mapping.source_for(event.admit_source)
        if source:
            values["source"] = source
        return values

    def outcome(self, event: StayEvent, default: str | None) -> str | None:
        code = event.disposition
        mapped = self.mapping.outcome_for(code)
        if mapped is None and code and code.strip().lower() in OUTCOMES:
            mapped = code.strip().lower()
        return mapped or default

    # -- writing -------------------------------------------------------------------------

    def batch_id(self) -> int:
        if self.batch is None:
            message = self._message
            assert message is not None
            only_scores = all(isinstance(e, ScoreEvent) for e in message.events)
            self.batch = new_id(self.conn.execute(_INSERT_BATCH, {
                "kind": "observations" if only_scores else message.kind,
                "filename": f"{message.kind} {message.message_type} {message.source} "
                            f"{message.control_id}"[:255],
                "sha256": message.digest, "rows": len(message.events),
                "actor": self.actor[:100]}))
        return self.batch

    def audit(self, action: str, stay_id: str, before: dict[str, Any] | None,
              after: dict[str, Any] | None) -> None:
        batch_id = self.batch_id()
        self.conn.execute(_INSERT_AUDIT, {
            "actor": self.actor[:100], "action": action, "entity": "stay",
            "entity_id": stay_id, "before": jsonable(before), "after": jsonable(after),
            "batch_id": batch_id})

    def insert_stay(self, event: StayEvent, unit: str, admitted_at: datetime,
                    values: dict[str, Any], *, from_unit: str | None) -> None:
        stay_id = stay_id_for(event.visit, admitted_at)
        # Ids are made from the visit: only a stay of the same visit can hold this one.
        clash = next((s for s in self.visit_stays(event.visit) if s.stay_id == stay_id), None)
        if clash is not None:
            raise _Refused(f"this visit already has a stay from {admitted_at:%Y-%m-%d %H:%M} "
                           f"UTC in unit {clash.unit}")
        fields = {"unit": unit, "admitted_at": admitted_at, "discharged_at": None,
                  "admission_type": values["admission_type"], "outcome": None,
                  "age": values.get("age"), "sex": values.get("sex"),
                  "specialty": values.get("specialty"), "source": values.get("source"),
                  "patient": event.patient, "from_unit": from_unit, "to_unit": None,
                  "booking_id": values.get("booking_id")}
        batch_id = self.batch_id()
        conn = self.conn
        conn.execute(_INSERT_STAY, {"stay_id": stay_id, "batch_id": batch_id,
                                    "discharge_source": None, **fields})
        conn.execute(_INSERT_FEED_STAY, {"stay_id": stay_id, "visit": event.visit,
                                         "known_at": self.known_at,
                                         "message_id": self.message_id})
        self._visits.pop(event.visit, None)
        self.audit("insert", stay_id, None, fields)
        self.changed_visits.add(event.visit)

    def change_stay(self, stay: _StayRow, visit: str, values: dict[str, Any], *,
                    only_if_newer: bool) -> bool:
        if only_if_newer and self.known_at < stay.feed_known_at:
            return False  # an older message arriving late: what is stored is newer
        changed = {k: v for k, v in values.items() if getattr(stay, k) != v}
        if not changed:
            return False
        if "discharged_at" in changed and changed["discharged_at"] is not None \
                and changed["discharged_at"] < stay.admitted_at:
            raise _Refused(f"discharge at {changed['discharged_at']:%Y-%m-%d %H:%M} UTC is "
                           f"before the admission at {stay.admitted_at:%Y-%m-%d %H:%M} UTC")
        before = {k: getattr(stay, k) for k in changed}
        conn = self.conn
        conn.execute(_UPDATE_STAY, {"b_stay_id": stay.stay_id, **changed})
        known_at = max(as_utc(stay.feed_known_at), self.known_at)
        conn.execute(_UPDATE_FEED_STAY, {"b_stay_id": stay.stay_id, "known_at": known_at,
                                         "message_id": self.message_id})
        for k, v in changed.items():  # the copy this message goes on with
            setattr(stay, k, v)
        stay.feed_known_at = known_at
        self.audit("update", stay.stay_id, before, changed)
        self.changed_visits.add(visit)
        return True

    def delete_stay(self, stay: _StayRow, visit: str) -> None:
        before = {k: getattr(stay, k) for k in ("unit", "admitted_at", "discharged_at",
                                                 *COVARIATES, "patient", "from_unit", "to_unit")}
        scores = self.session.scalar(select(func.count()).select_from(Observation)
                                     .where(Observation.stay_id == stay.stay_id)) or 0
        before["observations"] = int(scores)
        self.session.execute(delete(Observation).where(Observation.stay_id == stay.stay_id))
        self.session.execute(delete(CensusRow).where(CensusRow.stay_id == stay.stay_id))
        self.session.execute(delete(FeedStay).where(FeedStay.stay_id == stay.stay_id))
        self.session.execute(delete(Stay).where(Stay.stay_id == stay.stay_id))
        self._visits.pop(visit, None)
        self.audit("delete", stay.stay_id, before, None)
        self.changed_visits.add(visit)
        self.session.flush()

    # -- stay events ---------------------------------------------------------------------

    def _stay_event(self, event: StayEvent) -> str:
        handler = {
            "admit": self._admit, "transfer": self._transfer, "discharge": self._discharge,
            "update": self._update, "cancel_admit": self._cancel_admit,
            "cancel_transfer": self._cancel_transfer,
            "cancel_discharge": self._cancel_discharge,
        }[event.action]
        return handler(event)

    def _admit(self, event: StayEvent) -> str:
        if self.mapping.is_ignored(event.location):
            return "ignored"
        unit = self.unit(event.location)
        if unit is None:
            raise _Refused("no point of care (HL7 PV1-3, FHIR Encounter.location) for the "
                           "admission")
        at = self.instant(event.at, "admission time")
        values = self.covariates(event, required=True)
        if event.booking:  # the admission's booking (PV1-5); a transfer keeps none
            values["booking_id"] = event.booking.strip()[:64]
        stays = self.visit_stays(event.visit)
        same = [s for s in stays if s.unit == unit and s.admitted_at == at]
        if same:  # the same admission again (or known already from a later message)
            self.change_stay(same[0], event.visit, values, only_if_newer=True)
            return "applied"
        open_stays = [s for s in stays if s.discharged_at is None]
        if open_stays:
            raise _Refused(f"this visit is already in unit {open_stays[-1].unit} since "
                           f"{open_stays[-1].admitted_at:%Y-%m-%d %H:%M} UTC; a move between "
                           "units is a transfer")
        self.insert_stay(event, unit, at, values, from_unit=None)
        return "applied"

    def _transfer(self, event: StayEvent) -> str:
        at = self.instant(event.at, "transfer time")
        dest = self.unit(event.location)
        prior = self.unit(event.prior_location)
        if dest is None and prior is None and event.prior_location:
            return "ignored"  # from one point of care Morrow does not serve to another
        stays = self.visit_stays(event.visit)
        leaving = None
        if prior is not None or not event.prior_location:
            before = [s for s in stays if (prior is None or s.unit == prior)
                      and s.admitted_at < at and s.discharged_at in (None, at)]
            leaving = before[-1] if before else None
            if leaving is None and prior is not None:
                raise _DeadLetter(f"no stay of this visit in unit {prior} before "
                                  f"{at:%Y-%m-%d %H:%M} UTC is known yet")
        if leaving is not None and leaving.unit == dest:
            return "applied"  # a move within the unit (another bed): no new stay
        if leaving is not None:
            self.change_stay(leaving, event.visit, {
                "discharged_at": at, "discharge_source": "stays",
                "outcome": self.outcome(event, "transfer"),
                "to_unit": dest or (event.location or None)}, only_if_newer=False)
        if dest is not None and not any(s.unit == dest and s.admitted_at == at for s in stays):
            values = self.covariates(event, required=leaving is None)
            if leaving is not None:
                values = {**{k: getattr(leaving, k) for k in COVARIATES}, **values}
            self.insert_stay(event, dest, at, values,
                             from_unit=leaving.unit if leaving is not None else prior)
        return "applied"

    def _discharge(self, event: StayEvent) -> str:
        if self.mapping.is_ignored(event.location):
            return "ignored"
        unit = self.unit(event.location)
        at = self.instant(event.at, "discharge time")
        stays = [s for s in self.visit_stays(event.visit)
                 if (unit is None or s.unit == unit) and s.admitted_at <= at]
        if not stays:
            raise _DeadLetter(f"no stay of this visit in unit {unit or '(any)'} before "
                              f"{at:%Y-%m-%d %H:%M} UTC is known yet")
        stay = stays[-1]
        values = {"discharged_at": at, "discharge_source": "stays",
                  "outcome": self.outcome(event, None), "to_unit": None}
        # A stay still open takes the discharge; one already closed takes it as a correction
        # only from a message known later than its last change.
        self.change_stay(stay, event.visit, values,
                         only_if_newer=stay.discharged_at is not None)
        return "applied"

    def _update(self, event: StayEvent) -> str:
        at = self.instant(event.at, "event time")
        stays = self.visit_stays(event.visit)
        if not stays:
            if self.mapping.is_ignored(event.location):
                return "ignored"
            raise _DeadLetter("no stay of this visit is known yet")
        current = [s for s in stays if s.admitted_at <= at
                   and (s.discharged_at is None or s.discharged_at > at)]
        stay = current[-1] if current else stays[-1]
        values = self.covariates(event, required=False)
        self.change_stay(stay, event.visit, values, only_if_newer=True)
        return "applied"

    def _cancel_admit(self, event: StayEvent) -> str:
        if self.mapping.is_ignored(event.location):
            return "ignored"
        self.unit(event.location)  # an unmapped point of care waits for the mapping
        stays = self.visit_stays(event.visit)
        if not stays:
            raise _DeadLetter("no admission of this visit to cancel is known yet")
        for stay in reversed(stays):  # the admission cancelled: the visit never was
            self.delete_stay(stay, event.visit)
        return "applied"

    def _cancel_transfer(self, event: StayEvent) -> str:
        # PV1-3 is where the patient stays (the unit before the cancelled transfer), PV1-6
        # the location of the transfer cancelled (HL7 v2.5.1 3.3.12, from memory).
        back = self.unit(event.location)
        gone_to = self.unit(event.prior_location)
        stays = self.visit_stays(event.visit)
        if not stays:
            if back is None and gone_to is None:
                return "ignored"
            raise _DeadLetter("no transfer of this visit to cancel is known yet")
        last = stays[-1]
        if last.discharged_at is None and last.unit != back and (
                gone_to is None or last.unit == gone_to):
            came_from = last.admitted_at
            self.delete_stay(last, event.visit)
            earlier = [s for s in stays[:-1] if s.discharged_at == came_from]
            if earlier:
                self.change_stay(earlier[-1], event.visit, {
                    "discharged_at": None, "discharge_source": None, "outcome": None,
                    "to_unit": None}, only_if_newer=False)
            return "applied"
        if back is not None and last.unit == back and last.discharged_at is not None \
                and last.to_unit is not None:
            self.change_stay(last, event.visit, {
                "discharged_at": None, "discharge_source": None, "outcome": None,
                "to_unit": None}, only_if_newer=False)
            return "applied"
        raise _DeadLetter("no transfer of this visit to cancel is known yet")

    def _cancel_discharge(self, event: StayEvent) -> str:
        if self.mapping.is_ignored(event.location):
            return "ignored"
        unit = self.unit(event.location)
        stays = [s for s in self.visit_stays(event.visit)
                 if (unit is None or s.unit == unit) and s.discharged_at is not None
                 and s.to_unit is None]
        if not stays:
            raise _DeadLetter("no discharge of this visit to cancel is known yet")
        stay = max(stays, key=lambda s: s.discharged_at or s.admitted_at)
        self.change_stay(stay, event.visit, {"discharged_at": None, "discharge_source": None,
                                             "outcome": None}, only_if_newer=False)
        return "applied"

    # -- scores --------------------------------------------------------------------------

    def score_names(self) -> set[str]:
        if self._score_names is None:
            self._score_names = set(KNOWN_SCORES) | set(self.session.scalars(
                select(Observation.name).distinct()))
        return self._score_names

    def _score_name(self, event: ScoreEvent) -> str | None:
        name = self.mapping.score_for(event.code, event.system)
        if name is None and event.code.strip().lower() not in KNOWN_SCORES:
            name = self.mapping.score_for(event.code, event.system, self.score_names())
        return name

    def _scores(self, events: list[ScoreEvent]) -> str:
        mapped = []
        for event in events:
            name = self._score_name(event)
            if name is None:
                self._unmapped("codes", f"{event.system}|{event.code}" if event.system
                               else event.code)
            else:
                mapped.append((name, event))
        if not mapped:
            raise _DeadLetter("no observation code of the message is mapped to a score: "
                              + ", ".join(sorted(self.unmapped.get("codes", ()))))
        applied = False
        for name, event in mapped:
            if self.mapping.is_ignored(event.location):
                continue
            observed = self.instant(event.observed_at, "observation time")
            why = score_names.problem(name, event.value)
            if why is not None:
                raise _Refused(f"{why} (got {event.value:g})")
            stays = [s for s in self.visit_stays(event.visit) if s.admitted_at <= observed
                     and (s.discharged_at is None or s.discharged_at >= observed)]
            if not stays:
                raise _DeadLetter(f"no stay of this visit at {observed:%Y-%m-%d %H:%M} UTC is "
                                  "known yet")
            self._add_score(stays[-1], name, event, observed)
            applied = True
        return "applied" if applied else "ignored"

    def _add_score(self, stay: _StayRow, name: str, event: ScoreEvent, observed: datetime) -> None:
        recorded = max(self.known_at, observed)
        latest = self.session.execute(
            select(Observation.value, Observation.withdrawn).where(
                Observation.stay_id == stay.stay_id, Observation.observed_at == observed,
                Observation.name == name)
            .order_by(Observation.recorded_at.desc(), Observation.revision.desc()).limit(1)
        ).first()
        if latest is not None and latest.value == event.value \
                and bool(latest.withdrawn) == event.withdrawn:
            return  # the same value again (a replayed history)
        if latest is None and event.withdrawn:
            return  # nothing to withdraw
        revision = self.session.scalar(
            select(func.max(Observation.revision)).where(
                Observation.stay_id == stay.stay_id, Observation.observed_at == observed,
                Observation.name == name, Observation.recorded_at == recorded))
        self.session.add(Observation(
            stay_id=stay.stay_id, observed_at=observed, name=name, value=event.value,
            recorded_at=recorded, revision=0 if revision is None else revision + 1,
            withdrawn=event.withdrawn, batch_id=self.batch_id()))
        self.changed_visits.add(event.visit)
        self.session.flush()
