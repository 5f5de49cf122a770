"""FHIR R4 resources for the Bundle tests, built from the standard's own examples.

Where each comes from (hl7.org/fhir/R4 example resources; their elements as checked by the
R4B test suite of the fhir.resources package, ``fhir/resources/R4B/tests/test_encounter.py``,
unless marked "from memory"):

- ENCOUNTER: ``encounter-example-f002-lung.json`` (identifier ``v3251`` of the BMC
  encounters system, priority SNOMED 103391001 "Urgent", admitSource SNOMED 305997006,
  dischargeDisposition SNOMED 306689006 "Discharge to home", preAdmissionIdentifier
  ``98682``, status finished, subject Patient/f001) with the period and the location
  history of ``encounter-example-home.json`` (2015-01-17T16:00:00+10:00 to 16:30:00+10:00,
  location status ``completed``). Its location points at LOCATION instead of the example's
  contained ``#home``.
- PATIENT: ``patient-example-f001-pieter.json`` (identifier system
  urn:oid:2.16.840.1.113883.2.4.6.3 value 738472983, name Pieter van de Heuvel, gender male,
  birthDate 1944-11-17): from memory.
- OBSERVATION: ``observation-example-glasgow.json`` (LOINC 9269-2 "Glasgow coma score
  total", value 13 ``{score}``, status final); its effective time (2014-12-11T04:44:16Z in
  the example) is moved inside the encounter and the encounter reference added, so the
  score belongs to the visit.
- LOCATION, BED: invented (Kestrel Vale's intensive care, point of care ``ICU-B``, and a
  bed in it), using the R4 location-physical-type codes ``wa`` (ward) and ``bd`` (bed).
"""

from __future__ import annotations

import copy
import json
from typing import Any

LOCATION: dict[str, Any] = {
    "resourceType": "Location", "id": "icu-b", "identifier": [{"value": "ICU-B"}],
    "name": "Intensive care B", "status": "active",
    "physicalType": {"coding": [{
        "system": "http://terminology.hl7.org/CodeSystem/location-physical-type",
        "code": "wa"}]},
}
BED: dict[str, Any] = {
    "resourceType": "Location", "id": "icu-b-bed-3", "name": "Bed 3", "status": "active",
    "physicalType": {"coding": [{
        "system": "http://terminology.hl7.org/CodeSystem/location-physical-type",
        "code": "bd"}]},
    "partOf": {"reference": "Location/icu-b"},
}
PATIENT: dict[str, Any] = {
    "resourceType": "Patient", "id": "f001",
    "identifier": [{"use": "usual", "system": "urn:oid:2.16.840.1.113883.2.4.6.3",
                    "value": "738472983"}],
    "name": [{"use": "usual", "family": "van de Heuvel", "given": ["Pieter"]}],
    "gender": "male", "birthDate": "1944-11-17",
}
ENCOUNTER: dict[str, Any] = {
    "resourceType": "Encounter", "id": "f002",
    "identifier": [{"use": "official",
                    "system": "http://www.bmc.nl/zorgportal/identifiers/encounters",
                    "value": "v3251"}],
    "status": "finished",
    "class": {"system": "http://terminology.hl7.org/CodeSystem/v3-ActCode", "code": "AMB",
              "display": "ambulatory"},
    "priority": {"coding": [{"system": "http://snomed.info/sct", "code": "103391001",
                             "display": "Urgent"}]},
    "subject": {"reference": "Patient/f001", "display": "P. van de Heuvel"},
    "period": {"start": "2015-01-17T16:00:00+10:00", "end": "2015-01-17T16:30:00+10:00"},
    "location": [{"location": {"reference": "Location/icu-b"}, "status": "completed",
                  "period": {"start": "2015-01-17T16:00:00+10:00",
                             "end": "2015-01-17T16:30:00+10:00"}}],
    "hospitalization": {
        "preAdmissionIdentifier": {
            "use": "official",
            "system": "http://www.bmc.nl/zorgportal/identifiers/pre-admissions",
            "value": "98682"},
        "admitSource": {"coding": [{"system": "http://snomed.info/sct", "code": "305997006",
                                    "display": "Referral by radiologist"}]},
        "dischargeDisposition": {"coding": [{"system": "http://snomed.info/sct",
                                             "code": "306689006",
                                             "display": "Discharge to home"}]},
    },
}
OBSERVATION: dict[str, Any] = {
    "resourceType": "Observation", "id": "glasgow", "status": "final",
    "code": {"coding": [{"system": "http://loinc.org", "code": "9269-2",
                         "display": "Glasgow coma score total"}],
             "text": "Glasgow Coma Scale , (GCS)"},
    "subject": {"reference": "Patient/f001"},
    "encounter": {"reference": "Encounter/f002"},
    "effectiveDateTime": "2015-01-17T16:10:00+10:00",
    "valueQuantity": {"value": 13, "system": "http://unitsofmeasure.org", "code": "{score}"},
}
# What the examples' codes mean at Kestrel Vale (the mapping file's tables).
MAPPING = {
    "units": {"ICU-B": "KV-CRIT"},
    "admission_types": {"103391001": "emergency"},
    "outcomes": {"306689006": "home"},
    "scores": {"http://loinc.org|9269-2": "gcs"},
}
# Words that must never reach the database: the example's name, identifiers, birth date.
IDENTIFYING = ("Pieter", "Heuvel", "738472983", "v3251", "1944-11-17", "19441117")


def bundle(*resources: dict[str, Any], timestamp: str = "2015-01-17T16:40:00+10:00",
           identifier: str | None = None) -> dict[str, Any]:
    out: dict[str, Any] = {"resourceType": "Bundle", "type": "collection",
                           "timestamp": timestamp,
                           "entry": [{"resource": copy.deepcopy(r)} for r in resources]}
    if identifier:
        out["identifier"] = {"system": "urn:kestrel-vale:bundles", "value": identifier}
    return out


def as_bytes(value: dict[str, Any]) -> bytes:
    return json.dumps(value).encode("utf-8")


def standard_bundle() -> dict[str, Any]:
    """Location, Patient, Encounter, Observation: entries 0 to 3."""
    return bundle(LOCATION, PATIENT, ENCOUNTER, OBSERVATION)
