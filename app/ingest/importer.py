"""The one import function the command line and the web layer share.

A file is all-or-nothing: every row is parsed and checked (against the file itself and
against what is stored) before anything is written; any problem refuses the whole file.
Importing the same file again changes nothing. Every inserted or updated unit, stay and
booking has an audit event (values before and after) naming its import batch; census rows
and observations, which are append-only, carry their batch id.
"""

from __future__ import annotations

import hashlib
from collections import defaultdict
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import date, datetime
from typing import Any
from zoneinfo import ZoneInfo

from sqlalchemy import insert, select, update
from sqlalchemy.orm import Session

from app import score_names
from app.ingest import parse as p
from app.ingest.parse import Column, ImportRefused, Sheet
from app.store.models import (
    AuditEvent,
    Booking,
    CensusRow,
    CensusSnapshot,
    ImportBatch,
    Observation,
    Stay,
    Unit,
    UnitBeds,
)
from app.store.repo import chunked, infer_census_discharges

KINDS = ("units", "stays", "census", "observations", "bookings")

# Published ranges of known scores (DATA_CONTRACT.md): SOFA, Vincent et al. 1996; NEWS2,
# Royal College of Physicians 2017; APACHE II, Knaus et al. 1985.
SCORE_RANGES: dict[str, tuple[int, int]] = score_names.RANGES
FLAG_NAMES = score_names.FLAGS

ADMISSION_TYPES = ("emergency", "elective")
OUTCOMES = ("home", "ward", "transfer", "died")
SEXES = ("f", "m", "x")


@dataclass
class ImportResult:
    kind: str
    filename: str
    batch_id: int
    rows: int
    inserted: int = 0
    updated: int = 0
    unchanged: int = 0
    warnings: list[str] = field(default_factory=list)

    def summary(self) -> str:
        return (f"{self.filename}: {self.rows} rows; {self.inserted} new, {self.updated} updated, "
                f"{self.unchanged} unchanged (import batch {self.batch_id})")


def _columns(kind: str, tz: ZoneInfo) -> list[Column]:
    ts = p.timestamp(tz)
    covariates = [
        Column("age", False, p.integer(0, 120)),
        Column("sex", False, p.one_of(*SEXES)),
        Column("specialty", False, p.category),
        Column("source", False, p.category),
    ]
    if kind == "units":
        return [
            Column("unit", True, p.unit_code),
            Column("beds", True, p.integer(0, 10_000)),
            Column("valid_from", False, p.day),
            Column("census_time", False, p.clock),
        ]
    if kind == "stays":
        return [
            Column("stay_id", True, p.identifier),
            Column("unit", True, p.unit_code),
            Column("admitted_at", True, ts),
            Column("discharged_at", False, ts),
            Column("admission_type", True, p.one_of(*ADMISSION_TYPES)),
            Column("outcome", False, p.one_of(*OUTCOMES)),
            *covariates,
            Column("booking_id", False, p.identifier),
            *_transfer_columns(),
        ]
    if kind == "census":
        return [
            Column("taken_at", True, ts),
            Column("unit", True, p.unit_code),
            Column("bed", False, p.identifier),
            Column("stay_id", True, p.identifier),
            Column("admitted_at", True, ts),
            Column("admission_type", True, p.one_of(*ADMISSION_TYPES)),
            *covariates,
            Column("booking_id", False, p.identifier),
        ]
    if kind == "observations":
        return [
            Column("stay_id", True, p.identifier),
            Column("observed_at", True, ts),
            Column("name", True, _score_name),
            Column("value", True, p.number),
            Column("recorded_at", False, ts),
        ]
    if kind == "bookings":
        return [
            Column("booking_id", True, p.identifier),
            Column("unit", True, p.unit_code),
            Column("booked_at", True, ts),
            Column("planned_date", True, p.day),
            *covariates,
            Column("procedure", False, p.category),
            Column("cancelled_at", False, ts),
        ]
    raise ValueError(f"kind must be one of {', '.join(KINDS)}; got {kind!r}")


def _transfer_columns() -> list[Column]:
    # A to_unit may name a destination outside the hospital's units, so neither it nor
    # from_unit has to be a unit of units.csv; both follow the unit code syntax.
    return [Column("patient", False, p.identifier), Column("from_unit", False, p.unit_code),
            Column("to_unit", False, p.unit_code)]


def _score_name(value: str) -> str:
    name = value.strip()
    if not name or name != name.lower() or not all(ch.isalnum() or ch == "_" for ch in name):
        raise ValueError("a score or flag name is lower case letters, digits and _")
    if len(name) > 64:
        raise ValueError("name longer than 64 characters")
    return name


def import_file(
    session: Session,
    kind: str,
    data: bytes,
    filename: str,
    *,
    tz: ZoneInfo,
    actor: str = "import",
) -> ImportResult:
    """Validate and import one CSV file of ``kind``; raise ``ImportRefused`` with every problem.

    The caller owns the transaction: on ``ImportRefused`` (or any error) it must roll back.
    Nothing is flushed before all checks have passed, so a refused file leaves no trace.
    """
    sheet = p.read_sheet(data, filename, _columns(kind, tz))
    # Rows that parsed are checked further even when others did not, so one pass lists
    # every problem of the file.
    _check_rows(kind, sheet)
    handler = _HANDLERS[kind]
    plan = handler.check(session, sheet)
    if sheet.problems:
        sheet.problems.sort(key=lambda prob: (prob.line or 0))
        raise ImportRefused(sheet.problems)
    batch = ImportBatch(
        kind=kind,
        filename=filename[:255],
        sha256=hashlib.sha256(data).hexdigest(),
        rows=len(sheet.rows),
        actor=actor,
    )
    session.add(batch)
    session.flush()
    result = ImportResult(kind, filename, batch.id, len(sheet.rows), warnings=sheet.warnings)
    handler.apply(session, plan, batch.id, actor, result)
    batch.inserted, batch.updated, batch.unchanged = (
        result.inserted, result.updated, result.unchanged)
    session.add(AuditEvent(actor=actor, action="import", entity=kind, entity_id=filename[:200],
                           before=None, after={"rows": result.rows, "inserted": result.inserted,
                                               "updated": result.updated,
                                               "unchanged": result.unchanged},
                           batch_id=batch.id))
    session.flush()
    return result


# -- checks inside one file --------------------------------------------------------------------

def _check_rows(kind: str, sheet: Sheet) -> None:
    first_line: dict[Any, int] = {}

    def once(key: Any, line: int, column: str, value: Any, what: str) -> None:
        if key in first_line:
            sheet.problem(line, column, value, f"{what} (first at line {first_line[key]})")
        else:
            first_line[key] = line

    for line, row in sheet.rows:
        if kind == "units":
            once((row["unit"], row["valid_from"]), line, "valid_from", row["valid_from"],
                 "this unit already has a row with the same valid_from in this file")
        elif kind == "stays":
            once(row["stay_id"], line, "stay_id", row["stay_id"],
                 "stay_id appears twice in this file")
            if row["discharged_at"] is not None and row["discharged_at"] < row["admitted_at"]:
                sheet.problem(line, "discharged_at", row["discharged_at"].isoformat(),
                              "discharged_at is before admitted_at")
            if row["outcome"] is not None and row["discharged_at"] is None:
                sheet.problem(line, "outcome", row["outcome"],
                              "an outcome is given but discharged_at is blank")
        elif kind == "census":
            once((row["unit"], row["taken_at"], row["stay_id"]), line, "stay_id", row["stay_id"],
                 "this stay is in two beds (or listed twice) in one snapshot")
            if row["bed"] is not None:
                once(("bed", row["unit"], row["taken_at"], row["bed"]), line, "bed", row["bed"],
                     "this bed holds two stays in one snapshot")
            if row["admitted_at"] > row["taken_at"]:
                sheet.problem(line, "admitted_at", row["admitted_at"].isoformat(),
                              "admitted_at is after the snapshot's taken_at")
            key = ("admitted", row["stay_id"])
            if key in first_line:
                if first_line[key] != row["admitted_at"]:
                    sheet.problem(line, "admitted_at", row["admitted_at"].isoformat(),
                                  "this stay has a different admitted_at in another snapshot")
            else:
                first_line[key] = row["admitted_at"]
        elif kind == "observations":
            if row["recorded_at"] is None:
                row["recorded_at"] = row["observed_at"]
            if row["recorded_at"] < row["observed_at"]:
                sheet.problem(line, "recorded_at", row["recorded_at"].isoformat(),
                              "recorded_at is before observed_at")
            name, value = row["name"], row["value"]
            if name in SCORE_RANGES or name in FLAG_NAMES:
                why = score_names.problem(name, value)  # published ranges, whole numbers
                if why is not None:
                    sheet.problem(line, "value", value, why)
        elif kind == "bookings":
            once(row["booking_id"], line, "booking_id", row["booking_id"],
                 "booking_id appears twice in this file")
            if row["cancelled_at"] is not None and row["cancelled_at"] < row["booked_at"]:
                sheet.problem(line, "cancelled_at", row["cancelled_at"].isoformat(),
                              "the booking is cancelled before it was booked")


# -- checks against the database, then writes ---------------------------------------------------

@dataclass
class _Handler:
    check: Callable[[Session, Sheet], Any]
    apply: Callable[[Session, Any, int, str, ImportResult], None]


def _known_units(session: Session, sheet: Sheet) -> set[str]:
    known = set(session.scalars(select(Unit.code)))
    for line, row in sheet.rows:
        if row["unit"] not in known:
            sheet.problem(line, "unit", row["unit"],
                          "unit is not known: import units.csv with this unit first")
    return known


def _audit(actor: str, batch_id: int, action: str, entity: str, entity_id: str,
           before: dict[str, Any] | None, after: dict[str, Any] | None) -> dict[str, Any]:
    return {"actor": actor, "batch_id": batch_id, "action": action, "entity": entity,
            "entity_id": entity_id, "before": before, "after": after}


def _jsonable(values: dict[str, Any]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for k, v in values.items():
        out[k] = v.isoformat() if isinstance(v, datetime | date) else v
    return out


def _changes(stored: dict[str, Any], incoming: dict[str, Any]) -> dict[str, Any]:
    return {k: v for k, v in incoming.items() if stored.get(k) != v}


Rows = list[tuple[int, dict[str, Any]]]


# units ----------------------------------------------------------------------------------------

def _units_check(session: Session, sheet: Sheet) -> tuple[Rows, dict[str, str]]:
    census_times: dict[str, tuple[str, int]] = {}
    for line, row in sheet.rows:
        if row["census_time"] is None:
            continue
        previous = census_times.setdefault(row["unit"], (row["census_time"], line))
        if previous[0] != row["census_time"]:
            sheet.problem(line, "census_time", row["census_time"],
                          f"this unit has census_time {previous[0]} at line {previous[1]}")
    return sheet.rows, {code: t for code, (t, _) in census_times.items()}


def _units_apply(session: Session, plan: tuple[Rows, dict[str, str]], batch_id: int, actor: str,
                 result: ImportResult) -> None:
    rows, census_times = plan
    units = {u.code: u for u in session.scalars(select(Unit))}
    beds = {(b.unit, b.valid_from): b for b in session.scalars(select(UnitBeds))}
    audits = []
    for _, row in rows:
        code = row["unit"]
        unit = units.get(code)
        wanted_time = census_times.get(code)
        if unit is None:
            unit = Unit(code=code, census_time=wanted_time or "00:00")
            session.add(unit)
            units[code] = unit
            audits.append(_audit(actor, batch_id, "insert", "unit", code, None,
                                 {"census_time": unit.census_time}))
        elif wanted_time is not None and unit.census_time != wanted_time:
            audits.append(_audit(actor, batch_id, "update", "unit", code,
                                 {"census_time": unit.census_time}, {"census_time": wanted_time}))
            unit.census_time = wanted_time
        session.flush()
        key = (code, row["valid_from"])
        stored = beds.get(key)
        entity_id = f"{code}@{row['valid_from'] or 'always'}"
        if stored is None:
            session.add(UnitBeds(unit=code, valid_from=row["valid_from"], beds=row["beds"],
                                 batch_id=batch_id))
            audits.append(_audit(actor, batch_id, "insert", "unit_beds", entity_id, None,
                                 {"beds": row["beds"]}))
            result.inserted += 1
        elif stored.beds != row["beds"]:
            audits.append(_audit(actor, batch_id, "update", "unit_beds", entity_id,
                                 {"beds": stored.beds}, {"beds": row["beds"]}))
            stored.beds = row["beds"]
            result.updated += 1
        else:
            result.unchanged += 1
    session.flush()
    if audits:
        session.execute(insert(AuditEvent), audits)


# stays ----------------------------------------------------------------------------------------

STAY_FIELDS = ("unit", "admitted_at", "discharged_at", "admission_type", "outcome", "age", "sex",
               "specialty", "source", "booking_id", "patient", "from_unit", "to_unit")
# Optional columns added after the first files were written: a file without the column says
# nothing about them, so a stored value stays (a blank cell in a file that has it clears it).
LATER_STAY_FIELDS = ("patient", "from_unit", "to_unit")


def _stored_by_key(session: Session, column: Any, keys: list[str]) -> dict[str, Any]:
    """Stored rows whose ``column`` is in ``keys``, fetched in chunks (parameter limits)."""
    found: dict[str, Any] = {}
    entity = column.class_
    for part in chunked(keys, 500):
        for obj in session.scalars(select(entity).where(column.in_(part))):
            found[getattr(obj, column.key)] = obj
    return found


StaysPlan = tuple[Rows, dict[str, Stay], tuple[str, ...]]


def _stays_check(session: Session, sheet: Sheet) -> StaysPlan:
    _known_units(session, sheet)
    stored = _stored_by_key(session, Stay.stay_id, [r["stay_id"] for _, r in sheet.rows])
    for line, row in sheet.rows:
        old = stored.get(row["stay_id"])
        if old is not None and old.unit != row["unit"]:
            sheet.problem(line, "unit", row["unit"],
                          f"this stay_id is stored for unit {old.unit}: a stay is in one unit")
    absent = tuple(f for f in LATER_STAY_FIELDS if f not in sheet.present)
    return sheet.rows, stored, absent


def _stays_apply(session: Session, plan: StaysPlan, batch_id: int, actor: str,
                 result: ImportResult) -> None:
    rows, stored, absent = plan
    new_rows, audits = [], []
    for _, row in rows:
        incoming = {f: row[f] for f in STAY_FIELDS}
        old = stored.get(row["stay_id"])
        if old is not None:
            incoming.update({f: getattr(old, f) for f in absent})
        if old is None:
            source = "stays" if incoming["discharged_at"] is not None else None
            new_rows.append({"stay_id": row["stay_id"], **incoming, "discharge_source": source,
                             "batch_id": batch_id})
            audits.append(_audit(actor, batch_id, "insert", "stay", row["stay_id"], None,
                                 _jsonable(incoming)))
            result.inserted += 1
            continue
        if incoming["discharged_at"] is None and old.discharge_source == "census":
            # A blank is not an exact time: keep the discharge the census snapshots showed.
            incoming["discharged_at"] = old.discharged_at
        current = {f: getattr(old, f) for f in STAY_FIELDS}
        changed = _changes(current, incoming)
        wants_source = ("stays" if row["discharged_at"] is not None
                        else old.discharge_source if old.discharge_source == "census" else None)
        if not changed and old.discharge_source == wants_source:
            result.unchanged += 1
            continue
        audits.append(_audit(actor, batch_id, "update", "stay", old.stay_id,
                             _jsonable({k: current[k] for k in changed}), _jsonable(changed)))
        for k, v in changed.items():
            setattr(old, k, v)
        old.discharge_source = wants_source
        result.updated += 1
    for part in chunked(new_rows, 2000):
        session.execute(insert(Stay), part)
    session.flush()
    if audits:
        session.execute(insert(AuditEvent), audits)


# census ---------------------------------------------------------------------------------------

CENSUS_FIELDS = ("bed", "admitted_at", "admission_type", "age", "sex", "specialty", "source",
                 "booking_id")


@dataclass
class _CensusPlan:
    snapshots: dict[tuple[str, datetime], Rows]
    new_stays: dict[str, dict[str, Any]]


def _census_check(session: Session, sheet: Sheet) -> _CensusPlan:
    _known_units(session, sheet)
    snapshots: dict[tuple[str, datetime], Rows] = defaultdict(list)
    for line, row in sheet.rows:
        snapshots[(row["unit"], row["taken_at"])].append((line, row))
    stored_stays = _stored_by_key(session, Stay.stay_id,
                                  sorted({r["stay_id"] for _, r in sheet.rows}))
    new_stays: dict[str, dict[str, Any]] = {}
    for line, row in sheet.rows:
        old = stored_stays.get(row["stay_id"])
        if old is None:
            if row["stay_id"] not in new_stays:
                new_stays[row["stay_id"]] = {
                    "stay_id": row["stay_id"], "unit": row["unit"],
                    "admitted_at": row["admitted_at"], "discharged_at": None,
                    "discharge_source": None, "admission_type": row["admission_type"],
                    "outcome": None, **{f: row[f] for f in ("age", "sex", "specialty", "source",
                                                             "booking_id")}}
            elif new_stays[row["stay_id"]]["unit"] != row["unit"]:
                sheet.problem(line, "unit", row["unit"], "this stay appears in two units")
            continue
        if old.unit != row["unit"]:
            sheet.problem(line, "unit", row["unit"],
                          f"this stay_id is stored for unit {old.unit}: a stay is in one unit")
        if old.admitted_at != row["admitted_at"]:
            sheet.problem(line, "admitted_at", row["admitted_at"].isoformat(),
                          f"this stay is stored with admitted_at {old.admitted_at.isoformat()}")
    # A snapshot already stored must be identical: snapshots are kept as received.
    for (unit, taken_at), rows in snapshots.items():
        snap = session.scalar(select(CensusSnapshot).where(
            CensusSnapshot.unit == unit, CensusSnapshot.taken_at == taken_at))
        if snap is None:
            continue
        stored_rows = {r.stay_id: r for r in session.scalars(
            select(CensusRow).where(CensusRow.snapshot_id == snap.id))}
        incoming = {r["stay_id"]: r for _, r in rows}
        same = stored_rows.keys() == incoming.keys() and all(
            {f: getattr(stored_rows[s], f) for f in CENSUS_FIELDS}
            == {f: incoming[s][f] for f in CENSUS_FIELDS} for s in incoming)
        if not same:
            sheet.problem(rows[0][0], "taken_at", taken_at.isoformat(),
                          f"a different snapshot of {unit} at this instant is already stored "
                          "(snapshots are kept as received)")
        else:
            snapshots[(unit, taken_at)] = []  # already stored: nothing to write
    return _CensusPlan(dict(snapshots), new_stays)


def _census_apply(session: Session, plan: _CensusPlan, batch_id: int, actor: str,
                  result: ImportResult) -> None:
    if plan.new_stays:
        stays = [{**stay, "batch_id": batch_id} for stay in plan.new_stays.values()]
        for part in chunked(stays, 2000):
            session.execute(insert(Stay), part)
        session.execute(insert(AuditEvent), [
            _audit(actor, batch_id, "insert", "stay", stay["stay_id"], None,
                   _jsonable({k: v for k, v in stay.items() if k not in ("stay_id", "batch_id")}))
            for stay in stays])
    units: set[str] = set()
    for (unit, taken_at), rows in plan.snapshots.items():
        if not rows:
            continue
        units.add(unit)
        snap = CensusSnapshot(unit=unit, taken_at=taken_at, batch_id=batch_id)
        session.add(snap)
        session.flush()
        session.execute(insert(CensusRow), [
            {"snapshot_id": snap.id, "stay_id": r["stay_id"], **{f: r[f] for f in CENSUS_FIELDS}}
            for _, r in rows])
        result.inserted += len(rows)
    result.unchanged = result.rows - result.inserted
    for unit in sorted(units):
        infer_census_discharges(session, unit, actor=actor, batch_id=batch_id)


# observations ---------------------------------------------------------------------------------

def _observations_check(session: Session, sheet: Sheet) -> Rows:
    stays = _stored_by_key(session, Stay.stay_id, sorted({r["stay_id"] for _, r in sheet.rows}))
    seen: dict[tuple[Any, ...], tuple[int, float]] = {}
    fresh: Rows = []
    keys_by_stay: dict[str, list[tuple[int, dict[str, Any]]]] = defaultdict(list)
    for line, row in sheet.rows:
        stay = stays.get(row["stay_id"])
        if stay is None:
            sheet.problem(line, "stay_id", row["stay_id"],
                          "stay is not known: import its stay or census rows first")
            continue
        if row["observed_at"] < stay.admitted_at:
            sheet.problem(line, "observed_at", row["observed_at"].isoformat(),
                          "observed before the stay's admission")
        key = (row["stay_id"], row["observed_at"], row["name"], row["recorded_at"])
        if key in seen:
            first, value = seen[key]
            if value != row["value"]:
                # Lines of one file carry no order of entry: which value is meant is unknown.
                sheet.problem(line, "value", row["value"],
                              f"line {first} gives another value for this stay, name, observed_at "
                              "and recorded_at; keep one of the two lines")
            continue
        seen[key] = (line, row["value"])
        keys_by_stay[row["stay_id"]].append((line, row))
    for part in chunked(sorted(keys_by_stay), 500):
        # The latest revision of each key: a value equal to it is already stored; any other
        # value is a correction entered now, so it takes the next revision (a clock read to
        # the second, or a fixed replay clock, gives a correction the same recorded_at).
        # A withdrawal (withdrawn=True) holds the value it withdrew: after it, that value
        # is a new entry too.
        stored: dict[tuple[Any, ...], tuple[int, float | None]] = {}
        for o in session.execute(select(
                Observation.stay_id, Observation.observed_at, Observation.name,
                Observation.recorded_at, Observation.revision, Observation.value,
                Observation.withdrawn)
                .where(Observation.stay_id.in_(part))
                .order_by(Observation.revision)):
            stored[(o.stay_id, o.observed_at, o.name, o.recorded_at)] = (
                o.revision, None if o.withdrawn else o.value)
        for stay_id in part:
            for line, row in keys_by_stay[stay_id]:
                key = (stay_id, row["observed_at"], row["name"], row["recorded_at"])
                if key not in stored:
                    fresh.append((line, {**row, "revision": 0}))
                elif stored[key][1] != row["value"]:
                    fresh.append((line, {**row, "revision": stored[key][0] + 1}))
    return fresh


def _observations_apply(session: Session, fresh: Rows, batch_id: int, actor: str,
                        result: ImportResult) -> None:
    rows = [{"stay_id": r["stay_id"], "observed_at": r["observed_at"], "name": r["name"],
             "value": r["value"], "recorded_at": r["recorded_at"], "revision": r["revision"],
             "batch_id": batch_id}
            for _, r in fresh]
    for part in chunked(rows, 5000):
        session.execute(insert(Observation), part)
    result.inserted = len(rows)
    result.unchanged = result.rows - len(rows)


# bookings -------------------------------------------------------------------------------------

BOOKING_FIELDS = ("unit", "booked_at", "planned_date", "age", "sex", "specialty", "source",
                  "procedure", "cancelled_at")


def _bookings_check(session: Session, sheet: Sheet) -> tuple[Rows, dict[str, Booking]]:
    _known_units(session, sheet)
    stored = _stored_by_key(session, Booking.booking_id, [r["booking_id"] for _, r in sheet.rows])
    for line, row in sheet.rows:
        old = stored.get(row["booking_id"])
        if old is not None and old.unit != row["unit"]:
            sheet.problem(line, "unit", row["unit"], f"this booking is stored for unit {old.unit}")
    return sheet.rows, stored


def _bookings_apply(session: Session, plan: tuple[Rows, dict[str, Booking]], batch_id: int,
                    actor: str, result: ImportResult) -> None:
    rows, stored = plan
    new_rows, audits = [], []
    for _, row in rows:
        incoming = {f: row[f] for f in BOOKING_FIELDS}
        old = stored.get(row["booking_id"])
        if old is None:
            new_rows.append({"booking_id": row["booking_id"], **incoming, "batch_id": batch_id})
            audits.append(_audit(actor, batch_id, "insert", "booking", row["booking_id"], None,
                                 _jsonable(incoming)))
            result.inserted += 1
            continue
        current = {f: getattr(old, f) for f in BOOKING_FIELDS}
        changed = _changes(current, incoming)
        if not changed:
            result.unchanged += 1
            continue
        audits.append(_audit(actor, batch_id, "update", "booking", old.booking_id,
                             _jsonable({k: current[k] for k in changed}), _jsonable(changed)))
        session.execute(update(Booking).where(Booking.booking_id == old.booking_id)
                        .values(**changed))
        result.updated += 1
    for part in chunked(new_rows, 2000):
        session.execute(insert(Booking), part)
    if audits:
        session.execute(insert(AuditEvent), audits)


_HANDLERS: dict[str, _Handler] = {
    "units": _Handler(_units_check, _units_apply),
    "stays": _Handler(_stays_check, _stays_apply),
    "census": _Handler(_census_check, _census_apply),
    "observations": _Handler(_observations_check, _observations_apply),
    "bookings": _Handler(_bookings_check, _bookings_apply),
}
