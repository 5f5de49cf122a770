"""The neutral events every feed translates into (HL7 v2 in ``hl7_v2``, FHIR R4 elsewhere).

A translator reads one message, replaces identifiers by their keyed hash
(``app.feeds.pseudonym``), drops names, addresses and dates of birth (keeping the age at
admission), and hands a ``FeedMessage`` to ``app.feeds.apply.apply_message``, which maps
the codes (``app.feeds.mapping``) and writes stays and observations. Events carry the codes
*as sent* (point of care, admission class, observation code): the mapping is applied when a
message is applied, so a message kept as a dead letter because a code was not mapped can be
applied again, unchanged, once the mapping file names it.

Rules the events follow
-----------------------
Visits and stays.
    ``visit`` is the keyed hash of the visit number (HL7 PV1-19, FHIR Encounter.identifier);
    ``patient`` the keyed hash of the person's identifier (PID-3, Patient.identifier). A
    Morrow stay is one patient's continuous time in one unit, so one visit gives one stay
    per unit it passes through: a transfer ends the stay in the unit the patient leaves
    (discharged at the transfer time, outcome ``transfer``, ``to_unit`` the unit entered)
    and starts a stay in the unit entered (admitted at the transfer time, ``from_unit`` the
    unit left). Its id is ``stay_id_for(visit, admitted_at)``: the visit key, ``-``, and the
    admission instant in UTC (``YYYYMMDDTHHMMSS``), 39 characters, the same whatever order
    the messages come in or however often a history is replayed; the unit is the stay's
    ``unit`` column (no visit is in two units at one instant). The link from a stay to its
    visit is kept in ``feed_stay`` so later messages of the visit find it.

Two times.
    ``at`` (and ``admitted_at`` / ``discharged_at`` / ``observed_at``) is *clinical* time:
    when it happened on the ward (HL7 EVN-6 "event occurred", else PV1-44 admit / PV1-45
    discharge date; OBX-14 for a score; FHIR Encounter.period / location.period and
    Observation.effective). It becomes the stay's ``admitted_at`` / ``discharged_at`` and
    the observation's ``observed_at``, so the as-of rule (DATA_CONTRACT.md, "What is known
    at a time") places it where it happened. ``FeedMessage.sent_at`` is *known-at* time:
    when the sending system said it (MSH-7, FHIR Bundle.timestamp), the receipt time where
    the message has none. It is the observation's ``recorded_at`` and orders updates of a
    stay: a message known earlier than the last one applied to the stay does not overwrite
    it, so late and out-of-order messages, and a replayed history, end in the same state.

All datetimes are aware and in UTC.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Literal

StayAction = Literal[
    "admit", "transfer", "discharge", "update",
    "cancel_admit", "cancel_transfer", "cancel_discharge",
]
STAY_ACTIONS: tuple[StayAction, ...] = (
    "admit", "transfer", "discharge", "update",
    "cancel_admit", "cancel_transfer", "cancel_discharge",
)
FeedKind = Literal["hl7v2", "fhir"]

# Length of the visit key kept in stay ids (hex characters of the keyed hash: 96 bits).
VISIT_KEY_LENGTH = 24


@dataclass(frozen=True)
class StayEvent:
    """Something that happened to a visit: an admission, transfer, discharge, change, cancel.

    ``location`` is the point of care the patient is in after the event (HL7 PV1-3.1,
    FHIR Encounter.location), ``prior_location`` the one before (PV1-6.1; for a transfer
    the unit left; for a cancelled transfer the unit the patient goes back to). Both are
    codes as sent, mapped to Morrow units when applied. ``at`` is the event's clinical time:
    the admission for ``admit``, the move for ``transfer``, the discharge for
    ``discharge``; for ``update`` the time the change refers to; for a cancel the time of
    the event cancelled (where the sender gives it).
    """

    action: StayAction
    visit: str
    at: datetime
    location: str | None = None
    prior_location: str | None = None
    patient: str | None = None
    # Visit-level times the message carries (PV1-44 / PV1-45, Encounter.period).
    admitted_at: datetime | None = None
    discharged_at: datetime | None = None
    # Codes as sent: PV1-4 admission type / Encounter.class; PV1-14 admit source;
    # PV1-10 hospital service; PV1-36 discharge disposition.
    admission_class: str | None = None
    admit_source: str | None = None
    specialty: str | None = None
    disposition: str | None = None
    # Age in whole years at admission (the date of birth itself is never kept); sex as
    # ``f``, ``m`` or ``x`` (other / not applicable), None when unknown.
    age: int | None = None
    sex: str | None = None
    # The booking an admission came from (HL7 PV1-5 preadmit number, FHIR Encounter.
    # hospitalization.preAdmissionIdentifier), as bookings.csv names it (added for the
    # replay check: a forecast leaves a booking out once a stay carries its id).
    booking: str | None = None

    def __post_init__(self) -> None:
        if self.action not in STAY_ACTIONS:
            raise ValueError(f"unknown stay action {self.action!r}")
        _aware("at", self.at)
        _aware("admitted_at", self.admitted_at)
        _aware("discharged_at", self.discharged_at)


@dataclass(frozen=True)
class ScoreEvent:
    """A coded observation of a visit (HL7 OBX, FHIR Observation) that may be a score.

    ``code`` is the observation identifier as sent (OBX-3.1, Observation.code.coding.code)
    and ``system`` its coding system (OBX-3.3, coding.system); the mapping says which
    Morrow score it is. ``withdrawn`` marks a value the sender deleted or declared wrong
    (OBX-11 ``D`` / ``W``, Observation.status ``entered-in-error``).
    """

    visit: str
    code: str
    value: float
    observed_at: datetime
    system: str | None = None
    location: str | None = None
    patient: str | None = None
    withdrawn: bool = False

    def __post_init__(self) -> None:
        _aware("observed_at", self.observed_at)


FeedEvent = StayEvent | ScoreEvent


@dataclass(frozen=True)
class FeedMessage:
    """One message (HL7 v2) or Bundle (FHIR) as translated: what it says, nothing identifying.

    ``source`` names the sending system (HL7 MSH-3/MSH-4 as ``app@facility``; FHIR: the
    Bundle's source or ``fhir``). ``control_id`` is unique per source (MSH-10; for FHIR the
    Bundle.identifier or, lacking one, the digest): a repeated (source, control_id) changes
    nothing. ``message_type`` is e.g. ``ADT^A01``, ``ORU^R01``, ``Bundle``. ``sent_at`` is the
    known-at time (MSH-7, Bundle.timestamp) or None (then the receipt time counts).
    ``digest`` is the SHA-256 of the message as received (kept instead of its text).
    ``text`` is the message with names, addresses and dates of birth blanked and identifiers
    replaced by their keyed hash: kept only when the message becomes a dead letter (so a
    reader may give ``make_text`` instead, which makes it only then: ``kept_text``).
    """

    kind: FeedKind
    source: str
    control_id: str
    message_type: str
    digest: str
    events: tuple[FeedEvent, ...] = ()
    sent_at: datetime | None = None
    text: str | None = None
    make_text: Callable[[], str] | None = field(default=None, compare=False, repr=False)

    def __post_init__(self) -> None:
        _aware("sent_at", self.sent_at)

    def kept_text(self) -> str | None:
        """The text a dead letter keeps (``text``, else made by ``make_text``)."""
        if self.text is None and self.make_text is not None:
            return self.make_text()
        return self.text

    def known_at(self, received_at: datetime) -> datetime:
        """The instant the message's content counts as known: sent time, else receipt."""
        return (self.sent_at or received_at).astimezone(UTC)


def stay_id_for(visit: str, admitted_at: datetime) -> str:
    """The Morrow stay id of the stay of ``visit`` that began at ``admitted_at``."""
    moment = admitted_at.astimezone(UTC)
    return f"{visit[:VISIT_KEY_LENGTH]}-{moment:%Y%m%dT%H%M%S}"


def _aware(name: str, value: datetime | None) -> None:
    if value is not None and (value.tzinfo is None or value.utcoffset() is None):
        raise ValueError(f"{name} must be an aware datetime")


# -- events as JSON (a dead letter keeps them so they can be applied again) ----------------------

def events_to_json(events: tuple[FeedEvent, ...]) -> list[dict[str, object]]:
    out: list[dict[str, object]] = []
    for event in events:
        values: dict[str, object] = {"type": "stay" if isinstance(event, StayEvent) else "score"}
        for name, value in vars(event).items():
            values[name] = value.astimezone(UTC).isoformat() if isinstance(value, datetime) \
                else value
        out.append(values)
    return out


_TIMES = ("at", "admitted_at", "discharged_at", "observed_at")


def events_from_json(items: list[dict[str, object]]) -> tuple[FeedEvent, ...]:
    events: list[FeedEvent] = []
    for item in items:
        values = {k: (datetime.fromisoformat(v) if k in _TIMES and isinstance(v, str) else v)
                  for k, v in item.items() if k != "type"}
        if item.get("type") == "stay":
            events.append(StayEvent(**values))  # type: ignore[arg-type]
        else:
            events.append(ScoreEvent(**values))  # type: ignore[arg-type]
    return tuple(events)
