"""FHIR R4 Bundles in: validate, pseudonymise and translate into the feeds' neutral events.

A Bundle holds Encounter (a visit: its ``period`` and the history of its ``location``),
Observation (a coded value with its ``effective`` time) and the Location and Patient
resources they refer to. Everything is read with ``fhir.resources``' R4B models (the R4
resources Morrow reads are unchanged in R4B) and checked before anything is written; every
problem is named by the entry and element in FHIRPath-like form, e.g.
``Bundle.entry[3].resource.period.start``. ``app.feeds.fhir_import`` applies the result in
one transaction, so a Bundle is stored whole or not at all, like a CSV file.

How the elements become events (``app.feeds.events``)
-----------------------------------------------------
- ``Encounter.identifier`` (the first with a value; else ``Encounter.id``) is the visit
  number, replaced by its keyed hash; ``Encounter.subject`` names the Patient, whose
  ``identifier`` is hashed the same way, whose ``gender`` gives the sex and whose
  ``birthDate`` the age at admission (then dropped). Names and addresses are never read.
- The locations of ``Encounter.location`` (``planned`` and ``reserved`` ones left out), in
  order of their ``period.start``, are the points of care: the first admits the patient
  (at its start, else ``Encounter.period.start``), each later one is a transfer at its
  start. ``status`` ``finished`` with ``period.end`` discharges at that end; ``cancelled``
  and ``entered-in-error`` cancel the admission.
- A Location's code is its first ``identifier.value``, else its ``name``, else the id it is
  referred to by; a bed or room (``physicalType`` ``bd`` / ``ro``) counts as the ward it is
  ``partOf``. The mapping file (``app.feeds.mapping``) turns codes into Morrow units.
- ``Encounter.priority`` (else ``class``) is the admission type code,
  ``hospitalization.admitSource`` the source, ``serviceType`` the specialty,
  ``hospitalization.dischargeDisposition`` the discharge disposition: codes as sent, mapped
  when applied; ``hospitalization.preAdmissionIdentifier`` the booking the admission came
  from (as bookings.csv names it).
- An Observation's ``code.coding`` (system and code) says which score it is;
  ``valueQuantity.value`` / ``valueInteger`` / ``valueBoolean`` its value;
  ``effectiveDateTime`` (or ``effectivePeriod.start``, ``effectiveInstant``) when it was
  observed; ``encounter`` the visit; ``status`` ``entered-in-error`` withdraws it.

Two times, as for HL7 v2: clinical time from the elements above; *known-at* time per entry
from ``Observation.issued`` (when that value was made available), else the resource's
``meta.lastUpdated``, else ``Bundle.timestamp``, else the time of receipt. Each entry is one
``FeedMessage`` (control id: the Bundle's identifier, ``/`` and the entry's index), so a
Bundle carrying a day of history keeps each value's own known-at time, and sending a Bundle
again changes nothing.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Iterable
from dataclasses import dataclass, field
from datetime import UTC, date, datetime
from decimal import Decimal
from typing import Any
from zoneinfo import ZoneInfo

import pydantic
from fhir.resources.R4B import get_fhir_model_class
from fhir.resources.R4B.bundle import Bundle

from app.feeds.events import FeedEvent, FeedMessage, ScoreEvent, StayEvent
from app.feeds.mapping import FeedMapping
from app.feeds.pseudonym import Pseudonymiser

# The resources Morrow reads; other resource types are validated, then left out with a note.
USED_TYPES = ("Encounter", "Observation", "Location", "Patient")
ENCOUNTER_STATUSES = ("planned", "arrived", "triaged", "in-progress", "onleave", "finished",
                      "cancelled", "entered-in-error", "unknown")
OBSERVATION_STATUSES = ("registered", "preliminary", "final", "amended", "corrected",
                        "cancelled", "entered-in-error", "unknown")
# FHIR R4 administrative-gender: male | female | other | unknown.
GENDERS = {"female": "f", "male": "m", "other": "x", "unknown": None}
# Location.physicalType codes (R4 location-physical-type) that sit inside a ward.
INSIDE_A_WARD = ("bd", "ro")
SOURCE = "fhir"
MAX_ENTRIES = 100_000


@dataclass(frozen=True)
class BundleProblem:
    """One reason a Bundle was refused: where (FHIRPath-like) and why."""

    path: str
    why: str

    def __str__(self) -> str:
        return f"{self.path}: {self.why}"


class BundleRefused(Exception):
    """The Bundle was not imported; nothing was written."""

    def __init__(self, problems: list[BundleProblem]):
        self.problems = problems
        super().__init__(self.summary())

    def summary(self, limit: int = 50) -> str:
        lines = [f"{len(self.problems)} problem(s); nothing was imported:"]
        lines += [str(p) for p in self.problems[:limit]]
        if len(self.problems) > limit:
            lines.append(f"... and {len(self.problems) - limit} more")
        return "\n".join(lines)


@dataclass(frozen=True)
class EntryMessage:
    """The message one Bundle entry becomes, with the entry's path for refusals."""

    path: str
    message: FeedMessage


@dataclass
class TranslatedBundle:
    key: str
    digest: str
    entries: int
    messages: list[EntryMessage] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)


# -- reading and validating ----------------------------------------------------------------

def _fhirpath(loc: Iterable[Any]) -> str:
    """A pydantic error location as a FHIRPath-like path: ``Bundle.entry[3].resource.x``."""
    out = "Bundle"
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        elif part == "root" or part.startswith("function-"):
            continue
        else:
            name = str(part)
            if name.endswith("__ext"):
                name = "_" + name[: -len("__ext")]
            elif name.endswith("_fhir"):
                name = name[: -len("_fhir")]
            out += f".{name}"
    return out


def _validation_problems(error: pydantic.ValidationError, prefix: tuple[Any, ...]
                         ) -> list[BundleProblem]:
    problems = []
    for item in error.errors():
        why = str(item.get("msg", "not valid")).removeprefix("Value error, ")
        problems.append(BundleProblem(_fhirpath(prefix + tuple(item["loc"])), why))
    return problems


def parse_bundle(data: bytes) -> tuple[Bundle, list[Any]]:
    """The validated Bundle and its entries' resources (models, or None for an empty entry).

    Each entry's resource is validated with the R4B model of its ``resourceType``, so an
    unknown type is named rather than failing the whole parse.
    """
    try:
        raw = json.loads(data.decode("utf-8"))
    except UnicodeDecodeError as exc:
        raise BundleRefused([BundleProblem("Bundle", f"not UTF-8 text ({exc.reason})")]) from None
    except json.JSONDecodeError as exc:
        raise BundleRefused([BundleProblem(
            "Bundle", f"not JSON: {exc.msg} at line {exc.lineno} column {exc.colno}")]) from None
    if not isinstance(raw, dict) or raw.get("resourceType") != "Bundle":
        raise BundleRefused([BundleProblem(
            "Bundle", "expected a FHIR R4 Bundle (a JSON object with resourceType Bundle)")])
    entries = raw.get("entry") or []
    if not isinstance(entries, list):
        raise BundleRefused([BundleProblem("Bundle.entry", "must be a list")])
    if len(entries) > MAX_ENTRIES:
        raise BundleRefused([BundleProblem(
            "Bundle.entry", f"{len(entries)} entries; at most {MAX_ENTRIES} in one Bundle")])
    problems: list[BundleProblem] = []
    resources: list[Any] = []
    shell_entries: list[dict[str, Any]] = []
    for i, entry in enumerate(entries):
        if not isinstance(entry, dict):
            problems.append(BundleProblem(f"Bundle.entry[{i}]", "must be an object"))
            resources.append(None)
            shell_entries.append({})
            continue
        resource = entry.get("resource")
        shell_entries.append({k: v for k, v in entry.items() if k != "resource"})
        if resource is None:
            resources.append(None)
            continue
        path = f"Bundle.entry[{i}].resource"
        kind = resource.get("resourceType") if isinstance(resource, dict) else None
        try:
            model = get_fhir_model_class(kind) if isinstance(kind, str) else None
        except (ValueError, KeyError):
            model = None
        if model is None:
            problems.append(BundleProblem(f"{path}.resourceType",
                                          f"{kind!r} is not a FHIR R4 resource type"))
            resources.append(None)
            continue
        try:
            resources.append(model.model_validate(resource))
        except pydantic.ValidationError as exc:
            problems.extend(_validation_problems(exc, ("entry", i, "resource")))
            resources.append(None)
    try:
        bundle = Bundle.model_validate({**raw, "entry": shell_entries or None})
    except pydantic.ValidationError as exc:
        problems[:0] = _validation_problems(exc, ())
        bundle = None
    if problems:
        raise BundleRefused(problems)
    assert bundle is not None
    return bundle, resources


# -- translating -----------------------------------------------------------------------------

def _instant(value: Any, path: str, problems: list[BundleProblem], *,
             required: bool) -> datetime | None:
    """An aware UTC instant from a validated dateTime; a date alone is not precise enough."""
    if value is None:
        if required:
            problems.append(BundleProblem(path, "missing: Morrow needs this time"))
        return None
    if isinstance(value, datetime):
        if value.tzinfo is None or value.utcoffset() is None:
            problems.append(BundleProblem(path, "a time needs its zone offset"))
            return None
        return value.astimezone(UTC)
    problems.append(BundleProblem(
        path, f"{value!s} is a date without a time; Morrow needs the time of day and its zone"))
    return None


def _identifier(identifiers: list[Any] | None) -> tuple[str, str] | None:
    """(value, "") of the first identifier with a value. Its ``system`` (a URI) is left out
    of the keyed hash, so the FHIR visit number and an HL7 PV1-19 sent without an assigning
    authority give the same key: ADT over HL7 and scores over FHIR meet in one stay."""
    for ident in identifiers or []:
        if ident.value:
            return str(ident.value), ""
    return None


def _coding(concept: Any) -> tuple[str, str | None] | None:
    """The first coding's (code, system) of a CodeableConcept (or a Coding)."""
    if concept is None:
        return None
    codings = getattr(concept, "coding", None)
    if codings is None and getattr(concept, "code", None):
        return str(concept.code), getattr(concept, "system", None)
    for coding in codings or []:
        if coding.code:
            return str(coding.code), None if coding.system is None else str(coding.system)
    return None


def _code(concept: Any) -> str | None:
    found = _coding(concept)
    return None if found is None else found[0]


def _age(birth: Any, admitted_at: datetime, tz: ZoneInfo) -> int | None:
    """Whole years at admission (local date); None for a partial date (year or year-month)."""
    if not isinstance(birth, date) or isinstance(birth, datetime):
        return None
    day = admitted_at.astimezone(tz).date()
    years = day.year - birth.year - ((day.month, day.day) < (birth.month, birth.day))
    return years if 0 <= years <= 150 else None


class _Index:
    """The Bundle's resources by the references that may point at them."""

    def __init__(self, bundle: Bundle, resources: list[Any]):
        self.by_ref: dict[str, Any] = {}
        for entry, resource in zip(bundle.entry or [], resources, strict=True):
            if resource is None:
                continue
            kind = resource.get_resource_type()
            if entry.fullUrl:
                self.by_ref[str(entry.fullUrl)] = resource
            if resource.id:
                self.by_ref[f"{kind}/{resource.id}"] = resource

    def get(self, reference: Any, kind: str) -> Any:
        if reference is None or not reference.reference:
            return None
        ref = str(reference.reference)
        found = self.by_ref.get(ref) or self.by_ref.get(ref.rsplit("/_history", 1)[0])
        if found is None and "/" in ref:
            # An absolute URL to a server: match on its last "Type/id".
            found = self.by_ref.get("/".join(ref.rstrip("/").split("/")[-2:]))
        return found if found is not None and found.get_resource_type() == kind else None


def _location_code(index: _Index, reference: Any) -> str | None:
    location = index.get(reference, "Location")
    seen = 0
    while location is not None and seen < 10:
        seen += 1
        physical = _code(location.physicalType)
        if physical in INSIDE_A_WARD and location.partOf is not None:
            parent = index.get(location.partOf, "Location")
            if parent is not None:
                location = parent
                continue
        found = _identifier(location.identifier)
        if found is not None:
            return found[0]
        if location.name:
            return str(location.name)
        return str(location.id) if location.id else None
    if reference is not None:
        found = _identifier([reference.identifier] if reference.identifier else [])
        if found is not None:
            return found[0]
        if reference.reference:
            return str(reference.reference).rstrip("/").rsplit("/", 1)[-1]
    return None


def _known_at(resource: Any, default: datetime | None, path: str,
              problems: list[BundleProblem]) -> datetime | None:
    issued = getattr(resource, "issued", None)
    if issued is not None:
        return _instant(issued, f"{path}.issued", problems, required=False)
    meta = resource.meta
    if meta is not None and meta.lastUpdated is not None:
        return _instant(meta.lastUpdated, f"{path}.meta.lastUpdated", problems, required=False)
    return default


def _encounter_events(encounter: Any, path: str, index: _Index, pseudonymiser: Pseudonymiser,
                      tz: ZoneInfo, problems: list[BundleProblem]) -> tuple[str, list[FeedEvent]]:
    number = _identifier(encounter.identifier)
    if number is None and encounter.id:
        number = (f"Encounter/{encounter.id}", "")
    if number is None:
        problems.append(BundleProblem(f"{path}.identifier",
                                      "missing: the visit number identifies the stay"))
        return "", []
    visit = pseudonymiser.visit(*number)
    status = str(encounter.status or "")
    if status not in ENCOUNTER_STATUSES:
        problems.append(BundleProblem(f"{path}.status", f"{status!r} is not an Encounter "
                                      f"status ({', '.join(ENCOUNTER_STATUSES)})"))
        return visit, []
    if status == "planned":
        return visit, []
    period = encounter.period
    start = _instant(period.start if period else None, f"{path}.period.start", problems,
                     required=status not in ("cancelled", "entered-in-error"))
    end = _instant(period.end if period else None, f"{path}.period.end", problems,
                   required=status == "finished")
    patient, age, sex = None, None, None
    subject = index.get(encounter.subject, "Patient")
    if subject is not None:
        found = _identifier(subject.identifier)
        if found is None and subject.id:
            found = (f"Patient/{subject.id}", "")
        patient = None if found is None else pseudonymiser.patient(*found)
        gender = str(subject.gender) if subject.gender else None
        if gender is not None and gender not in GENDERS:
            problems.append(BundleProblem(
                f"{path}.subject", f"the Patient's gender {gender!r} is not one of "
                f"{', '.join(GENDERS)}"))
        sex = GENDERS.get(gender) if gender else None
        if start is not None:
            age = _age(subject.birthDate, start, tz)
    elif encounter.subject is not None and encounter.subject.identifier is not None:
        found = _identifier([encounter.subject.identifier])
        patient = None if found is None else pseudonymiser.patient(*found)
    hosp = encounter.hospitalization
    common: dict[str, Any] = {
        "visit": visit, "patient": patient, "age": age, "sex": sex,
        "admitted_at": start, "discharged_at": end if status == "finished" else None,
        "admission_class": _code(encounter.priority) or _code(encounter.class_fhir),
        "admit_source": _code(hosp.admitSource) if hosp else None,
        "specialty": _code(encounter.serviceType),
        "disposition": _code(hosp.dischargeDisposition) if hosp else None,
        "booking": (str(hosp.preAdmissionIdentifier.value) if hosp
                    and hosp.preAdmissionIdentifier and hosp.preAdmissionIdentifier.value
                    else None),
    }
    if status in ("cancelled", "entered-in-error"):
        when = start or end
        if when is None:
            problems.append(BundleProblem(f"{path}.period.start",
                                          "missing: the admission being cancelled"))
            return visit, []
        return visit, [StayEvent(action="cancel_admit", at=when, **common)]
    moves: list[tuple[datetime, str, int]] = []
    for j, place in enumerate(encounter.location or []):
        if place.status in ("planned", "reserved"):
            continue
        where = f"{path}.location[{j}]"
        code = _location_code(index, place.location)
        if code is None:
            problems.append(BundleProblem(f"{where}.location", "no Location code: give the "
                                          "Location resource, an identifier or a reference"))
            continue
        given = place.period.start if place.period else None
        if given is None and not moves and start is not None:
            begun: datetime | None = start  # the first place: from the Encounter's start
        else:
            begun = _instant(given, f"{where}.period.start", problems, required=True)
        if begun is None:
            continue
        moves.append((begun, code, j))
    if start is None:
        return visit, []
    if not moves:
        problems.append(BundleProblem(f"{path}.location", "missing: Morrow needs the point of "
                                      "care (a location with its period)"))
        return visit, []
    moves.sort(key=lambda m: (m[0], m[2]))
    # The first place's start is the admission there (the visit's own start stays in
    # ``admitted_at``); each later place is a move.
    # The discharge disposition belongs to the end of the visit, not to its moves.
    disposition = common.pop("disposition")
    events: list[FeedEvent] = [StayEvent(action="admit", at=moves[0][0],
                                         location=moves[0][1], **common)]
    for (_, before, _), (at, code, _) in zip(moves, moves[1:], strict=False):
        if code == before:
            continue
        events.append(StayEvent(action="transfer", at=at, location=code, prior_location=before,
                                **common))
    if status == "finished" and end is not None:
        if end < moves[-1][0]:
            problems.append(BundleProblem(f"{path}.period.end",
                                          "before the start of the last location"))
            return visit, []
        events.append(StayEvent(action="discharge", at=end, location=moves[-1][1],
                                disposition=disposition, **common))
    return visit, events


def _observation_event(observation: Any, path: str, index: _Index, mapping: FeedMapping,
                       pseudonymiser: Pseudonymiser, known_scores: Iterable[str],
                       problems: list[BundleProblem], notes: list[str]) -> ScoreEvent | None:
    status = str(observation.status or "")
    if status not in OBSERVATION_STATUSES:
        problems.append(BundleProblem(f"{path}.status", f"{status!r} is not an Observation "
                                      f"status ({', '.join(OBSERVATION_STATUSES)})"))
        return None
    if status in ("registered", "cancelled"):
        notes.append(f"{path}: status {status}: no value to keep")
        return None
    codings = [(str(c.code), None if c.system is None else str(c.system))
               for c in (observation.code.coding or []) if c.code]
    if not codings:
        problems.append(BundleProblem(f"{path}.code.coding", "missing: a coded observation"))
        return None
    # The first coding the mapping knows, else the first: a score often comes with a LOINC
    # and a local code.
    known = list(known_scores)
    code, system = next((c for c in codings if mapping.score_for(c[0], c[1], known)),
                        codings[0])
    value: float | None
    if observation.valueQuantity is not None and observation.valueQuantity.value is not None:
        value = float(Decimal(observation.valueQuantity.value))
    elif observation.valueInteger is not None:
        value = float(observation.valueInteger)
    elif observation.valueBoolean is not None:
        value = 1.0 if observation.valueBoolean else 0.0
    else:
        value = None
    withdrawn = status == "entered-in-error"
    if value is None and not withdrawn:
        problems.append(BundleProblem(f"{path}.value[x]", "missing: a score needs "
                                      "valueQuantity.value, valueInteger or valueBoolean"))
        return None
    observed = (observation.effectiveDateTime or observation.effectiveInstant
                or (observation.effectivePeriod.start if observation.effectivePeriod else None))
    element = ("effectiveInstant" if observation.effectiveInstant
               else "effectivePeriod.start" if observation.effectivePeriod
               else "effectiveDateTime")
    at = _instant(observed, f"{path}.{element}", problems, required=True)
    # The visit: the referenced Encounter's identifier when it is in the Bundle, else the
    # reference's own identifier (the Encounter came in an earlier Bundle), else its id.
    encounter = index.get(observation.encounter, "Encounter")
    number = _identifier(encounter.identifier) if encounter is not None else None
    if number is None and observation.encounter is not None:
        ident = observation.encounter.identifier
        if ident is not None and ident.value:
            number = (str(ident.value), "")
    if number is None and encounter is not None and encounter.id:
        number = (f"Encounter/{encounter.id}", "")
    if number is None and observation.encounter is not None and observation.encounter.reference:
        ref = str(observation.encounter.reference).rstrip("/").split("/")
        number = ("/".join(ref[-2:]), "")
    if number is None:
        problems.append(BundleProblem(f"{path}.encounter",
                                      "missing: the Encounter (visit) this score belongs to"))
        return None
    if at is None:
        return None
    return ScoreEvent(visit=pseudonymiser.visit(*number), code=code, system=system,
                      value=0.0 if value is None else value, observed_at=at,
                      withdrawn=withdrawn)


def translate_bundle(data: bytes, *, pseudonymiser: Pseudonymiser, mapping: FeedMapping,
                     tz: ZoneInfo, known_scores: Iterable[str] = ()) -> TranslatedBundle:
    """Validate ``data`` (a Bundle as JSON) and translate it; raise ``BundleRefused``."""
    bundle, resources = parse_bundle(data)
    digest = hashlib.sha256(data).hexdigest()
    found = (bundle.identifier.value if bundle.identifier is not None
             and bundle.identifier.value else None)
    key = str(found) if found else (f"Bundle/{bundle.id}" if bundle.id else digest)
    # The Bundle's own identifier is an identifier like any other: kept only as its hash.
    key = hashlib.sha256(key.encode()).hexdigest()[:32]
    problems: list[BundleProblem] = []
    sent = _instant(bundle.timestamp, "Bundle.timestamp", problems, required=False)
    index = _Index(bundle, resources)
    out = TranslatedBundle(key=key, digest=digest, entries=len(resources))
    known = list(known_scores)
    for i, resource in enumerate(resources):
        if resource is None:
            continue
        path = f"Bundle.entry[{i}].resource"
        kind = resource.get_resource_type()
        if kind not in USED_TYPES:
            out.notes.append(f"{path}: {kind} is not read by Morrow; left out")
            continue
        if kind in ("Location", "Patient"):
            continue  # read through the references of Encounters
        events: list[FeedEvent]
        if kind == "Encounter":
            _, events = _encounter_events(resource, path, index, pseudonymiser, tz, problems)
        else:
            score = _observation_event(resource, path, index, mapping, pseudonymiser, known,
                                       problems, out.notes)
            events = [] if score is None else [score]
        if not events:
            continue
        known_at = _known_at(resource, sent, path, problems)
        entry_digest = hashlib.sha256(
            json.dumps(resource.model_dump(mode="json"), sort_keys=True).encode()).hexdigest()
        out.messages.append(EntryMessage(path, FeedMessage(
            kind="fhir", source=SOURCE, control_id=f"{key}/{i}", message_type=kind,
            digest=entry_digest, events=tuple(events), sent_at=known_at)))
    if problems:
        raise BundleRefused(problems)
    return out
