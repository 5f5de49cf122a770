"""Replay a database's stays and scores as a feed: HL7 v2 ADT/ORU messages or FHIR R4 Bundles.

What it is for: loading a hospital's history through the feeds instead of CSV files, and
checking that both ways give the same stays, census snapshots, scores and forecasts (the
demo hospital, ``tests/feeds/test_same_answers.py``). Units, bed plans and bookings are not
part of an ADT or ORU stream: load them from their CSV files either way.

The stream is in the order things became known: an admission at its ``admitted_at``, a
score at its ``recorded_at``, a discharge at its ``discharged_at`` (at one instant:
admissions, then scores, then discharges and transfers). A stay is one visit, or one part
of a visit: a stay entered from another unit (``from_unit``; the stay of the same
``patient`` there ends at this admission with ``to_unit`` this unit) continues its
predecessor's visit, and the move is a transfer (HL7 ADT^A02, PV1-6 the unit left, PV1-36
the outcome of the stay left; FHIR a new ``Encounter.location``). A stay ending with a
``to_unit`` whose stay is not exported (a place outside the hospital, such as a ward
Morrow does not forecast) is a transfer there too, and the mapping written beside the
export ignores that point of care. The visit number (HL7 PV1-19, FHIR
``Encounter.identifier``), which the feed replaces by a keyed hash, is the ``stay_id`` of
the visit's first stay (``visit_numbers``), and the stay's ``patient`` (or, where none is
stored, ``P`` and the stay id) the person identifier (PID-3, ``Patient.identifier``).
The age becomes a date of birth one day before the birthday reached on the admission day,
so the age at admission read back is the stored age; no real date of birth exists anywhere
in it.

HL7 v2.5.1 fields written (``app.feeds.hl7_v2`` reads the same ones):
MSH-7 the known-at time; EVN-2 and EVN-6 the event's clinical time; PID-3 person, PID-7
date of birth, PID-8 sex (F, M, O); PV1-3 ``unit^^bed`` (point of care = unit code, bed from
the latest census row), PV1-4 admission type (E emergency, C elective: HL7 table 0007),
PV1-5 the booking (preadmit number), PV1-10 specialty, PV1-14 source, PV1-19 visit number,
PV1-36 outcome (Morrow's words; ``feeds.toml`` maps them), PV1-44 / PV1-45 admission and
discharge times; OBX-3 the score name, OBX-5 its value, OBX-11 F (D for a withdrawn value),
OBX-14 the observation time. Times carry their offset in the site's zone.

FHIR: one Bundle (type ``collection``) per local day of known-at times: an Encounter entry
when a stay begins (``in-progress``) and another when it ends (``finished``, with
``period.end``), each with ``meta.lastUpdated`` at its event; an Observation per score with
``effectiveDateTime`` and ``issued`` (its recorded time); the Location of the unit (its
identifier is the unit code) and the Patient (identifier, gender, birthDate) they refer to.
An Encounter lists every unit of its visit so far. FHIR R4 gives an Encounter one priority,
admit source and service type and no disposition per move, so a visit's stays all carry
its first stay's (the importer gives a stay left by a move the outcome ``transfer``).
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from datetime import date, datetime, timedelta
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

from sqlalchemy import select
from sqlalchemy.orm import Session

from app.store import repo
from app.store.models import Observation, Stay
from app.timeutil import as_utc

SENDING_APP = "MORROW-REPLAY"
FACILITY = "REPLAY"
ADMISSION_TYPE_CODES = {"emergency": "E", "elective": "C"}
FHIR_PRIORITY = {"emergency": "EM", "elective": "EL"}  # v3 ActPriority
SEX_CODES = {"f": "F", "m": "M", "x": "O"}
GENDERS = {"f": "female", "m": "male", "x": "other"}
# What the replayed codes mean, for the mapping file written beside the export.
MAPPING_TOML = """\
# Written by `morrow feeds export-hl7` / `export-fhir`: the codes the replay sends.
# Points of care and score names are Morrow's own, so the defaults map them.

[outcomes]             # PV1-36 / Encounter.hospitalization.dischargeDisposition
"home" = "home"
"ward" = "ward"
"transfer" = "transfer"
"died" = "died"

[admission_types]      # FHIR Encounter.priority (v3 ActPriority); HL7 E and C are defaults
"EM" = "emergency"
"EL" = "elective"
"""

_RANK = {"admit": 0, "score": 1, "discharge": 2, "transfer": 2}


@dataclass(frozen=True)
class ReplayItem:
    """One thing that became known: a stay beginning or ending, or a score."""

    known_at: datetime
    kind: str  # "admit", "score", "discharge" or "transfer" (``stay`` is the stay left)
    stay: Stay
    observation: Observation | None = None
    bed: str | None = None
    visit: str = ""  # the visit number; "" for the stay's own id
    entering: Stay | None = None  # for a transfer: the stay entered, if exported
    chain: tuple[Stay, ...] = ()  # the visit's stays up to ``stay`` (FHIR locations)

    @property
    def visit_number(self) -> str:
        return self.visit or self.stay.stay_id

    def order(self) -> tuple[datetime, int, str, datetime, int]:
        obs = self.observation
        return (self.known_at, _RANK[self.kind], self.stay.stay_id,
                obs.observed_at if obs else self.known_at, obs.revision if obs else 0)


def predecessors(stays: Iterable[Stay]) -> dict[str, Stay]:
    """For each stay entered from another unit, the stay it continues: the same patient's
    stay in ``from_unit`` ending at this admission with ``to_unit`` this unit."""
    ends = {(s.patient, s.unit, s.to_unit, s.discharged_at): s for s in stays
            if s.patient and s.to_unit and s.discharged_at is not None}
    found = {}
    for s in stays:
        if s.patient and s.from_unit:
            before = ends.get((s.patient, s.from_unit, s.unit, s.admitted_at))
            if before is not None:
                found[s.stay_id] = before
    return found


def visit_numbers(stays: Iterable[Stay]) -> dict[str, str]:
    """The visit number of each stay: the ``stay_id`` of the first stay of its visit."""
    stays = list(stays)
    before = predecessors(stays)
    out: dict[str, str] = {}
    for s in stays:
        first = s
        while first.stay_id in before:
            first = before[first.stay_id]
        out[s.stay_id] = first.stay_id
    return out


def history(session: Session, *, units: list[str] | None = None,
            since: datetime | None = None, until: datetime | None = None) -> list[ReplayItem]:
    """Everything stored about ``units`` (default all) known from ``since`` to ``until``,
    in the order it became known. ``since`` selects stays admitted from then on."""
    query = select(Stay)
    if units:
        query = query.where(Stay.unit.in_(units))
    if since is not None:
        query = query.where(Stay.admitted_at >= since)
    if until is not None:
        query = query.where(Stay.admitted_at <= until)
    stays = {s.stay_id: s for s in session.scalars(query)}
    beds: dict[str, str] = {}
    for unit in sorted({s.unit for s in stays.values()}):
        beds.update(repo.latest_beds(session, unit, sorted(
            sid for sid, s in stays.items() if s.unit == unit)))
    before = predecessors(stays.values())
    after = {prev.stay_id: stays[sid] for sid, prev in before.items()}
    visit = visit_numbers(stays.values())

    def chain(stay: Stay) -> tuple[Stay, ...]:
        out = [stay]
        while out[0].stay_id in before:
            out.insert(0, before[out[0].stay_id])
        return tuple(out)

    items: list[ReplayItem] = []
    for stay in stays.values():
        sid = stay.stay_id
        if sid not in before:
            items.append(ReplayItem(as_utc(stay.admitted_at), "admit", stay,
                                    bed=beds.get(sid), visit=visit[sid], chain=(stay,)))
        if stay.discharged_at is None or (until is not None and stay.discharged_at > until):
            continue
        entering = after.get(sid)
        if entering is not None or stay.to_unit:
            items.append(ReplayItem(
                as_utc(stay.discharged_at), "transfer", stay, visit=visit[sid],
                bed=beds.get(entering.stay_id) if entering is not None else None,
                entering=entering, chain=chain(stay)))
        else:
            items.append(ReplayItem(as_utc(stay.discharged_at), "discharge", stay,
                                    bed=beds.get(sid), visit=visit[sid], chain=chain(stay)))
    for part in repo.chunked(sorted(stays), 500):
        for obs in session.scalars(select(Observation).where(Observation.stay_id.in_(part))):
            if until is not None and obs.recorded_at > until:
                continue
            items.append(ReplayItem(as_utc(obs.recorded_at), "score", stays[obs.stay_id], obs,
                                    bed=beds.get(obs.stay_id), visit=visit[obs.stay_id],
                                    chain=chain(stays[obs.stay_id])))
    items.sort(key=ReplayItem.order)
    return items


def birth_date(age: int, admitted_at: datetime, tz: ZoneInfo) -> date:
    """A date of birth giving ``age`` whole years on the admission day (birthday the day
    before), so a reader computing the age in UTC or in the site's zone gets the same."""
    day = admitted_at.astimezone(tz).date()
    try:
        anniversary = day.replace(year=day.year - age)
    except ValueError:  # 29 February in a year that has none
        anniversary = day.replace(year=day.year - age, day=28)
    return anniversary - timedelta(days=1)


def _ts(moment: datetime, tz: ZoneInfo) -> str:
    """HL7 v2 DTM with seconds and offset, e.g. 20261130080000+0000."""
    return moment.astimezone(tz).strftime("%Y%m%d%H%M%S%z")


def _number(value: float) -> str:
    return str(int(value)) if float(value).is_integer() else repr(float(value))


def _escape(text: str | None) -> str:
    """HL7 escape sequences for the delimiters (v2.5.1 section 2.7.4)."""
    if not text:
        return ""
    out = text.replace("\\", "\\E\\").replace("|", "\\F\\").replace("^", "\\S\\")
    return out.replace("&", "\\T\\").replace("~", "\\R\\")


def _person(stay: Stay) -> str:
    return stay.patient or f"P{stay.stay_id}"


# -- HL7 v2 ----------------------------------------------------------------------------------

def _pid(stay: Stay, tz: ZoneInfo) -> str:
    born = ("" if stay.age is None
            else birth_date(stay.age, as_utc(stay.admitted_at), tz).strftime("%Y%m%d"))
    sex = SEX_CODES.get(stay.sex or "", "")
    return f"PID|1||{_escape(_person(stay))}^^^{FACILITY}^MR||||{born}|{sex}"


def _pv1(stay: Stay, tz: ZoneInfo, bed: str | None, *, discharged: bool,
         visit: str = "") -> str:
    fields = [""] * 46
    fields[1] = "1"
    fields[2] = "I"
    fields[3] = f"{_escape(stay.unit)}^^{_escape(bed)}" if bed else _escape(stay.unit)
    fields[4] = ADMISSION_TYPE_CODES.get(stay.admission_type, "")
    fields[5] = _escape(stay.booking_id)
    fields[10] = _escape(stay.specialty)
    fields[14] = _escape(stay.source)
    fields[19] = _escape(visit or stay.stay_id)
    fields[44] = _ts(as_utc(stay.admitted_at), tz)
    if discharged and stay.discharged_at is not None:
        fields[36] = _escape(stay.outcome)
        fields[45] = _ts(as_utc(stay.discharged_at), tz)
    return "PV1|" + "|".join(fields[1:]).rstrip("|")


def _pv1_transfer(item: ReplayItem, tz: ZoneInfo) -> str:
    """PV1 of an A02: the unit entered (PV1-3) and its stay's covariates and admission
    time (PV1-44), the unit left (PV1-6) and that stay's outcome (PV1-36)."""
    left, entering = item.stay, item.entering
    fields = [""] * 46
    fields[1] = "1"
    fields[2] = "I"
    if entering is not None:
        bed = item.bed
        fields[3] = (f"{_escape(entering.unit)}^^{_escape(bed)}" if bed
                     else _escape(entering.unit))
    else:
        fields[3] = _escape(left.to_unit)
    now = entering if entering is not None else left
    fields[4] = ADMISSION_TYPE_CODES.get(now.admission_type, "")
    fields[6] = _escape(left.unit)
    fields[10] = _escape(now.specialty)
    fields[14] = _escape(now.source)
    fields[19] = _escape(item.visit_number)
    fields[36] = _escape(left.outcome)
    fields[44] = _ts(as_utc(now.admitted_at), tz)
    return "PV1|" + "|".join(fields[1:]).rstrip("|")


def _control_id(body: str) -> str:
    return hashlib.sha256(body.encode()).hexdigest()[:20]


def _msh(sent: datetime, kind: str, structure: str, body: str, tz: ZoneInfo) -> str:
    return (f"MSH|^~\\&|{SENDING_APP}|{FACILITY}|MORROW|{FACILITY}|{_ts(sent, tz)}||{kind}^"
            f"{structure}|{_control_id(kind + body)}|P|2.5.1")


def hl7_message(item: ReplayItem, tz: ZoneInfo) -> str:
    """One ADT^A01, A02, A03 or ORU^R01 message, segments ended by carriage returns."""
    stay = item.stay
    if item.kind == "transfer":
        person = item.entering if item.entering is not None else stay
        segments = [f"EVN|A02|{_ts(item.known_at, tz)}||||{_ts(item.known_at, tz)}",
                    _pid(person, tz), _pv1_transfer(item, tz)]
        body = "\r".join(segments)
        head = _msh(item.known_at, "ADT^A02", "ADT_A02", body, tz)
    elif item.kind in ("admit", "discharge"):
        event = "A01" if item.kind == "admit" else "A03"
        segments = [f"EVN|{event}|{_ts(item.known_at, tz)}||||{_ts(item.known_at, tz)}",
                    _pid(stay, tz), _pv1(stay, tz, item.bed, discharged=item.kind == "discharge",
                                         visit=item.visit_number)]
        body = "\r".join(segments)
        head = _msh(item.known_at, f"ADT^{event}", "ADT_A01" if event == "A01" else "ADT_A03",
                    body, tz)
    else:
        obs = item.observation
        assert obs is not None
        status = "D" if obs.withdrawn else "F"
        observed = _ts(as_utc(obs.observed_at), tz)
        segments = [_pid(stay, tz), _pv1(stay, tz, item.bed, discharged=False,
                                         visit=item.visit_number),
                    f"OBR|1|||SCORES^Scores|||{observed}",
                    f"OBX|1|NM|{_escape(obs.name)}^{_escape(obs.name)}||{_number(obs.value)}"
                    f"||||||{status}|||{observed}"]
        body = "\r".join(segments)
        head = _msh(item.known_at, "ORU^R01", "ORU_R01", body, tz)
    return head + "\r" + body + "\r"


def write_hl7(items: list[ReplayItem], out: Path, tz: ZoneInfo) -> int:
    """Write the messages to ``out``, one after another separated by line ends."""
    count = 0
    out.parent.mkdir(parents=True, exist_ok=True)
    with out.open("w", encoding="utf-8", newline="") as handle:
        for item in items:
            handle.write(hl7_message(item, tz) + "\n")
            count += 1
    (out.parent / "feeds.toml").write_text(mapping_toml(items), encoding="utf-8")
    return count


def mapping_toml(items: list[ReplayItem]) -> str:
    """The mapping for the export: its codes, and the points of care of transfers out of the
    exported stays that no exported stay enters (ignored: Morrow keeps only the move)."""
    entered = {i.entering.unit for i in items if i.kind == "transfer" and i.entering}
    elsewhere = sorted({i.stay.to_unit for i in items if i.kind == "transfer"
                        and i.entering is None and i.stay.to_unit} - entered)
    if not elsewhere:
        return MAPPING_TOML
    listed = ", ".join(json.dumps(code) for code in elsewhere)
    return (MAPPING_TOML + "\n[locations]            # transfers to places not exported\n"
            f"ignore = [{listed}]\n")


# -- FHIR R4 ---------------------------------------------------------------------------------

def _rid(prefix: str, key: str) -> str:
    return prefix + hashlib.sha256(key.encode()).hexdigest()[:20]


def _iso(moment: datetime, tz: ZoneInfo) -> str:
    return moment.astimezone(tz).isoformat(timespec="seconds")


def _location(unit: str) -> dict[str, Any]:
    return {"resourceType": "Location", "id": _rid("l", unit),
            "identifier": [{"value": unit}], "name": unit, "status": "active",
            "physicalType": {"coding": [{
                "system": "http://terminology.hl7.org/CodeSystem/location-physical-type",
                "code": "wa"}]}}


def _patient(stay: Stay, tz: ZoneInfo) -> dict[str, Any]:
    resource: dict[str, Any] = {"resourceType": "Patient", "id": _rid("p", _person(stay)),
                                "identifier": [{"system": "urn:morrow:replay:person",
                                                "value": _person(stay)}]}
    if stay.sex in GENDERS:
        resource["gender"] = GENDERS[stay.sex]
    if stay.age is not None:
        resource["birthDate"] = birth_date(stay.age, as_utc(stay.admitted_at), tz).isoformat()
    return resource


def _places(item: ReplayItem, tz: ZoneInfo) -> list[dict[str, Any]]:
    """Encounter.location: every unit of the visit so far, each with its period."""
    chain = item.chain or (item.stay,)
    places: list[dict[str, Any]] = []
    for i, part in enumerate(chain):
        period = {"start": _iso(as_utc(part.admitted_at), tz)}
        done = i < len(chain) - 1 or item.kind in ("discharge", "transfer")
        if done and part.discharged_at is not None:
            period["end"] = _iso(as_utc(part.discharged_at), tz)
        places.append({"location": {"reference": f"Location/{_rid('l', part.unit)}"},
                       "status": "completed" if done else "active", "period": period})
    if item.kind == "transfer":
        code = item.entering.unit if item.entering is not None else item.stay.to_unit or ""
        places.append({"location": {"reference": f"Location/{_rid('l', code)}"},
                       "status": "active", "period": {"start": _iso(item.known_at, tz)}})
    return places


def _units_of(item: ReplayItem) -> list[str]:
    units = [part.unit for part in item.chain or (item.stay,)]
    if item.kind == "transfer":
        units.append(item.entering.unit if item.entering is not None
                     else item.stay.to_unit or "")
    return units


def _encounter(item: ReplayItem, tz: ZoneInfo) -> dict[str, Any]:
    # One priority, admit source and service type per Encounter: the visit's first stay's.
    stay = (item.chain or (item.stay,))[0]
    finished = item.kind == "discharge"
    period: dict[str, str] = {"start": _iso(as_utc(stay.admitted_at), tz)}
    if finished and item.stay.discharged_at is not None:
        period["end"] = _iso(as_utc(item.stay.discharged_at), tz)
    visit = item.visit_number
    resource: dict[str, Any] = {
        "resourceType": "Encounter", "id": _rid("e", visit),
        "meta": {"lastUpdated": _iso(item.known_at, tz)},
        "identifier": [{"system": "urn:morrow:replay:visit", "value": visit}],
        "status": "finished" if finished else "in-progress",
        "class": {"system": "http://terminology.hl7.org/CodeSystem/v3-ActCode", "code": "IMP"},
        "priority": {"coding": [{
            "system": "http://terminology.hl7.org/CodeSystem/v3-ActPriority",
            "code": FHIR_PRIORITY[stay.admission_type]}]},
        "subject": {"reference": f"Patient/{_rid('p', _person(stay))}"},
        "period": period,
        "location": _places(item, tz),
    }
    if stay.specialty:
        resource["serviceType"] = {"coding": [{"code": stay.specialty}]}
    hospitalization: dict[str, Any] = {}
    if stay.booking_id:
        hospitalization["preAdmissionIdentifier"] = {"value": stay.booking_id}
    if stay.source:
        hospitalization["admitSource"] = {"coding": [{"code": stay.source}]}
    if finished and item.stay.outcome:
        hospitalization["dischargeDisposition"] = {"coding": [{"code": item.stay.outcome}]}
    if hospitalization:
        resource["hospitalization"] = hospitalization
    return resource


def _observation(item: ReplayItem, tz: ZoneInfo) -> dict[str, Any]:
    obs = item.observation
    assert obs is not None
    key = f"{obs.stay_id}|{obs.name}|{obs.observed_at}|{obs.recorded_at}|{obs.revision}"
    value = int(obs.value) if float(obs.value).is_integer() else float(obs.value)
    return {"resourceType": "Observation", "id": _rid("o", key),
            "status": "entered-in-error" if obs.withdrawn else "final",
            "code": {"coding": [{"code": obs.name}], "text": obs.name},
            "subject": {"reference": f"Patient/{_rid('p', _person(item.stay))}"},
            # The visit number too: the Encounter may be in an earlier day's Bundle.
            "encounter": {"reference": f"Encounter/{_rid('e', item.visit_number)}",
                          "identifier": {"system": "urn:morrow:replay:visit",
                                         "value": item.visit_number}},
            "effectiveDateTime": _iso(as_utc(obs.observed_at), tz),
            "issued": _iso(item.known_at, tz),
            "valueQuantity": {"value": value, "unit": "score",
                              "system": "http://unitsofmeasure.org", "code": "{score}"}}


def fhir_bundles(items: list[ReplayItem], tz: ZoneInfo) -> Iterator[tuple[date, dict[str, Any]]]:
    """One Bundle per local day of known-at times, in order."""
    day: date | None = None
    entries: list[dict[str, Any]] = []
    placed: set[str] = set()
    last: datetime | None = None

    def bundle() -> dict[str, Any]:
        assert day is not None and last is not None
        return {"resourceType": "Bundle", "id": f"replay-{day.isoformat()}",
                "identifier": {"system": "urn:morrow:replay", "value": day.isoformat()},
                "type": "collection", "timestamp": _iso(last, tz), "entry": entries}

    for item in items:
        local = item.known_at.astimezone(tz).date()
        if day is not None and local != day:
            yield day, bundle()
            entries, placed = [], set()
        day, last = local, item.known_at
        # One birth date per visit (its first stay's), whichever of its stays comes first.
        person = (item.chain or (item.stay,))[0]
        resources = [_location(code) for code in _units_of(item)]
        for resource in (*resources, _patient(person, tz)):
            ref = f"{resource['resourceType']}/{resource['id']}"
            if ref not in placed:
                placed.add(ref)
                entries.append({"resource": resource})
        maker = _observation if item.kind == "score" else _encounter
        entries.append({"resource": maker(item, tz)})
    if day is not None and entries:
        yield day, bundle()


def write_fhir(items: list[ReplayItem], out: Path, tz: ZoneInfo) -> int:
    """Write one ``YYYY-MM-DD.json`` Bundle per day into the directory ``out``."""
    out.mkdir(parents=True, exist_ok=True)
    count = 0
    for day, bundle in fhir_bundles(items, tz):
        (out / f"{day.isoformat()}.json").write_text(json.dumps(bundle), encoding="utf-8")
        count += 1
    (out / "feeds.toml").write_text(mapping_toml(items), encoding="utf-8")
    return count
