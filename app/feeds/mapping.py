"""The feed mapping: which code a feed sends means which Morrow unit, score or category.

One TOML file (read with ``tomllib``), its path from ``--mapping`` or the setting
``MORROW_FEED_MAPPING``; ``demo_data/feeds.example.toml`` documents every table. With no
file, or for a code the file does not name, the defaults apply:

- a point of care (HL7 PV1-3.1, FHIR Location code) equal to a Morrow unit code is that unit;
- an observation code (OBX-3.1, Observation.code) equal to a score name Morrow knows
  (sofa, news2, apache_ii, fit_for_discharge, or any name already stored) is that score;
- an admission type (PV1-4, Encounter.class) ``E`` or ``U`` is emergency, ``C`` or ``R``
  elective (HL7 table 0007: Emergency, Urgent, Elective, Routine);
- the visit number (PV1-19) identifies the stay; PID-8 gives the sex (HL7 table 0001:
  F -> f, M -> m, O / A / N -> x, U or blank -> unknown); PID-7, the date of birth, gives
  the age at admission and is then dropped;
- an admit source (PV1-14) and hospital service (PV1-10) are kept as sent, lower case, as
  the stay's ``source`` and ``specialty``; a discharge disposition (PV1-36) is not mapped
  (the stay's outcome stays blank) unless the file maps it.

Tables of the file (all optional)::

    [units]              # point of care -> Morrow unit code
    "ICU-B" = "KV-CRIT"

    [locations]
    ignore = ["WARD-4"]  # points of care Morrow does not serve: acknowledged, not kept

    [scores]             # observation code, or "system|code", -> score name
    "KVSOFA" = "sofa"

    [admission_types]    # PV1-4 / Encounter.class code -> emergency | elective
    "A" = "emergency"

    [sources]            # PV1-14 admit source code -> stay source
    "7" = "emergency-dept"

    [specialties]        # PV1-10 hospital service code -> stay specialty
    "CAR" = "cardiac-surgery"

    [outcomes]           # PV1-36 discharge disposition -> home | ward | transfer | died
    "01" = "home"

    [dead_letters]
    keep_days = 30       # unmapped messages kept this long for replay, then deleted

    [listen]
    host = "127.0.0.1"
    port = 2575

A point of care neither mapped, equal to a unit code, nor ignored makes its message a
dead letter (kept, pseudonymised, for ``morrow feeds replay`` once the file names it).
"""

from __future__ import annotations

import os
import tomllib
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from app.ingest.importer import ADMISSION_TYPES, FLAG_NAMES, OUTCOMES, SCORE_RANGES
from app.ingest.parse import unit_code

MAPPING_ENV = "MORROW_FEED_MAPPING"

# HL7 v2.5.1 table 0007 (admission type): E emergency, U urgent, C elective, R routine.
DEFAULT_ADMISSION_TYPES = {"E": "emergency", "U": "emergency", "C": "elective", "R": "elective"}
# HL7 v2.5.1 table 0001 (administrative sex): F female, M male, O other, U unknown,
# A ambiguous, N not applicable.
SEX_CODES = {"F": "f", "M": "m", "O": "x", "A": "x", "N": "x", "U": None}
DEFAULT_KEEP_DAYS = 30
DEFAULT_PORT = 2575  # the port IANA registers for HL7 over MLLP (from memory)
KNOWN_SCORES = frozenset(SCORE_RANGES) | frozenset(FLAG_NAMES)


class MappingError(ValueError):
    """The mapping file cannot be used; the message names the file, table and key."""


@dataclass(frozen=True)
class FeedMapping:
    units: Mapping[str, str] = field(default_factory=dict)
    ignored_locations: frozenset[str] = frozenset()
    scores: Mapping[str, str] = field(default_factory=dict)
    admission_types: Mapping[str, str] = field(
        default_factory=lambda: dict(DEFAULT_ADMISSION_TYPES))
    sources: Mapping[str, str] = field(default_factory=dict)
    specialties: Mapping[str, str] = field(default_factory=dict)
    outcomes: Mapping[str, str] = field(default_factory=dict)
    keep_days: int = DEFAULT_KEEP_DAYS
    host: str = "127.0.0.1"
    port: int = DEFAULT_PORT
    path: str | None = None

    # -- lookups ---------------------------------------------------------------------------

    def unit_for(self, location: str | None, known_units: Iterable[str]) -> str | None:
        """The Morrow unit of a point of care, or None (unmapped, or no location given)."""
        if not location:
            return None
        mapped = self.units.get(location)
        if mapped is not None:
            return mapped
        return location if location in set(known_units) else None

    def is_ignored(self, location: str | None) -> bool:
        return bool(location) and location in self.ignored_locations

    def score_for(self, code: str, system: str | None, known_names: Iterable[str] = ()
                  ) -> str | None:
        """The score an observation code stands for, or None when it is not mapped."""
        if system and f"{system}|{code}" in self.scores:
            return self.scores[f"{system}|{code}"]
        if code in self.scores:
            return self.scores[code]
        name = code.strip().lower()
        return name if name in KNOWN_SCORES or name in set(known_names) else None

    def admission_type_for(self, code: str | None) -> str | None:
        if not code:
            return None
        return self.admission_types.get(code.strip()) or self.admission_types.get(
            code.strip().upper())

    def source_for(self, code: str | None) -> str | None:
        return _category(self.sources, code)

    def specialty_for(self, code: str | None) -> str | None:
        return _category(self.specialties, code)

    def outcome_for(self, code: str | None) -> str | None:
        return self.outcomes.get(code.strip()) if code else None


def _category(table: Mapping[str, str], code: str | None) -> str | None:
    if not code or not code.strip():
        return None
    return table.get(code.strip(), code.strip().lower())[:100]


def sex_of(code: str | None) -> str | None:
    """Morrow's sex (f, m, x) of an HL7 table 0001 code; None when unknown or not given."""
    return SEX_CODES.get(code.strip().upper()) if code and code.strip() else None


# -- reading the file ------------------------------------------------------------------------

def load_mapping(path: str | os.PathLike[str] | None = None) -> FeedMapping:
    """The mapping in ``path`` (else ``$MORROW_FEED_MAPPING``; else the defaults alone)."""
    chosen = path if path is not None else os.environ.get(MAPPING_ENV) or None
    if chosen is None:
        return FeedMapping()
    file = Path(chosen)
    try:
        data = tomllib.loads(file.read_text(encoding="utf-8"))
    except OSError as exc:
        raise MappingError(f"{file}: cannot be read ({exc.strerror})") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise MappingError(f"{file}: not a TOML file ({exc})") from None
    return mapping_from_dict(data, str(file))


def mapping_from_dict(data: Mapping[str, Any], where: str = "mapping") -> FeedMapping:
    known = {"units", "locations", "scores", "admission_types", "sources", "specialties",
             "outcomes", "dead_letters", "listen"}
    unknown = sorted(set(data) - known)
    if unknown:
        raise MappingError(f"{where}: unknown table(s) {', '.join(unknown)}; "
                           f"expected {', '.join(sorted(known))}")
    units = _strings(data, "units", where)
    for point, unit in units.items():
        try:
            unit_code(unit)
        except ValueError as exc:
            raise MappingError(f"{where}: [units] {point!r} = {unit!r}: {exc}") from None
    scores = _strings(data, "scores", where)
    for code, name in scores.items():
        if not name or name != name.lower() or not all(c.isalnum() or c == "_" for c in name):
            raise MappingError(f"{where}: [scores] {code!r} = {name!r}: a score name is lower "
                               "case letters, digits and _")
    admission = dict(DEFAULT_ADMISSION_TYPES)
    admission.update(_strings(data, "admission_types", where))
    _only(admission, ADMISSION_TYPES, "admission_types", where)
    outcomes = _strings(data, "outcomes", where)
    _only(outcomes, OUTCOMES, "outcomes", where)
    locations = _table(data, "locations", where)
    ignore = locations.get("ignore", [])
    if not isinstance(ignore, list) or not all(isinstance(x, str) for x in ignore):
        raise MappingError(f"{where}: [locations] ignore must be a list of strings")
    dead = _table(data, "dead_letters", where)
    keep_days = dead.get("keep_days", DEFAULT_KEEP_DAYS)
    if not isinstance(keep_days, int) or not 1 <= keep_days <= 3660:
        raise MappingError(f"{where}: [dead_letters] keep_days must be a whole number of days "
                           "from 1 to 3660")
    listen = _table(data, "listen", where)
    host = listen.get("host", "127.0.0.1")
    port = listen.get("port", DEFAULT_PORT)
    if not isinstance(host, str) or not isinstance(port, int) or not 1 <= port <= 65535:
        raise MappingError(f"{where}: [listen] host must be text and port 1 to 65535")
    return FeedMapping(
        units=units, ignored_locations=frozenset(ignore), scores=scores,
        admission_types=admission, sources=_strings(data, "sources", where),
        specialties=_strings(data, "specialties", where), outcomes=outcomes,
        keep_days=keep_days, host=host, port=port, path=where)


def _table(data: Mapping[str, Any], name: str, where: str) -> dict[str, Any]:
    table = data.get(name, {})
    if not isinstance(table, dict):
        raise MappingError(f"{where}: [{name}] must be a table")
    return table


def _strings(data: Mapping[str, Any], name: str, where: str) -> dict[str, str]:
    table = _table(data, name, where)
    for key, value in table.items():
        if not isinstance(value, str):
            raise MappingError(f"{where}: [{name}] {key!r} must map to a string")
    return dict(table)


def _only(table: Mapping[str, str], allowed: tuple[str, ...], name: str, where: str) -> None:
    for key, value in table.items():
        if value not in allowed:
            raise MappingError(f"{where}: [{name}] {key!r} = {value!r}: expected one of "
                               f"{', '.join(allowed)}")
