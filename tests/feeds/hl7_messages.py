"""HL7 v2 test messages, built from the standard's own ADT example.

``A01_EXAMPLE`` is the ADT^A01 example message of HL7 v2.5.1 (the "EVERYMAN^ADAM" admission
of the Good Health Hospital, as printed in the standard's chapter 2/3 example transactions;
reproduced from memory). Two changes are marked below: PV1-4 admission type ``E`` and PV1-19
visit number ``V0001``, which the example leaves blank and Morrow requires. Every other
message here is derived from it by ``adt()``: same MSH, PID (name, address, identifiers,
date of birth: the values the no-identifier tests look for) and PV1, with the trigger event,
EVN times and points of care of the chapter 3 trigger event definitions (A02 transfer:
PV1-3 new location, PV1-6 prior location; A03 discharge: PV1-45; A11/A12/A13 cancels;
from memory, not copied from the standard).
"""

from __future__ import annotations

MSH = ("MSH|^~\\&|ADT1|GOOD HEALTH HOSPITAL|GHH LAB, INC.|GOOD HEALTH HOSPITAL|198808181126|"
       "SECURITY|ADT^A01^ADT_A01|MSG00001|P|2.5.1|")
PID = ("PID|1||PATID1234^^^GOOD HEALTH HOSPITAL^MR^GOOD HEALTH HOSPITAL~123456789^^^USSSA^SS||"
       "EVERYMAN^ADAM^A^III||19610615|M||C|2222 HOME STREET^^GREENSBORO^NC^27401-1020|GL|"
       "(555) 555-2004|(555)555-2004||S||PATID12345001^2^M10^ADT1^AN^A|444333333|987654^NC|")
NK1 = "NK1|1|NUCLEAR^NELDA^W|SPO^SPOUSE||||NK^NEXT OF KIN"
# PV1-4 "E" and PV1-19 "V0001" added (blank in the example).
PV1 = "PV1|1|I|2000^2012^01|E|||004777^ATTEND^AARON^A|||SUR||||ADM|A0||||V0001|"
A01_EXAMPLE = "\r".join([MSH, "EVN|A01|200708181123||", PID, NK1, PV1])

# Everything identifying in the example: none of it may reach the database or the logs.
IDENTIFYING = ("PATID1234", "123456789", "EVERYMAN", "ADAM", "2222 HOME STREET",
               "GREENSBORO", "27401-1020", "19610615", "1961-06-15", "555-2004",
               "NUCLEAR", "NELDA", "PATID12345001", "444333333", "987654", "V0001",
               "ATTEND", "AARON")


def _fields(segment: str) -> list[str]:
    return segment.split("|")


def _set(segment: str, number: int, value: str) -> str:
    """``segment`` with field ``number`` set (MSH counts its field separator as MSH-1)."""
    fields = _fields(segment)
    if segment.startswith("MSH"):
        number -= 1
    while len(fields) <= number:
        fields.append("")
    fields[number] = value
    return "|".join(fields)


def adt(trigger: str, control_id: str, *, sent: str = "200708181126", occurred: str = "",
        recorded: str = "200708181123", location: str = "2000^2012^01", prior: str = "",
        visit: str = "V0001", admitted: str = "", discharged: str = "", kind: str = "E",
        service: str = "SUR", disposition: str = "", sex: str = "M",
        birth: str = "19610615") -> str:
    """The example message as event ``trigger`` (A01 ... A13), with the given fields."""
    msh = _set(_set(_set(MSH, 9, f"ADT^{trigger}^ADT_{trigger}"), 10, control_id), 7, sent)
    evn = f"EVN|{trigger}|{recorded}||||{occurred}"
    pid = _set(_set(PID, 7, birth), 8, sex)
    pv1 = PV1
    for number, value in ((3, location), (4, kind), (6, prior), (10, service), (19, visit),
                          (36, disposition), (44, admitted), (45, discharged)):
        pv1 = _set(pv1, number, value)
    return "\r".join([msh, evn, pid, NK1, pv1])


def oru(control_id: str, observations: list[tuple[str, str, str]], *,
        sent: str = "200708190800", visit: str = "V0001", status: str = "F",
        requested: str = "") -> str:
    """An ORU^R01 of the example patient: OBX per (code, value, observed time)."""
    msh = _set(_set(_set(MSH, 9, "ORU^R01^ORU_R01"), 10, control_id), 7, sent)
    pv1 = _set(PV1, 19, visit)
    obr = f"OBR|1|||SCORES^Scores^L|||{requested}"
    obx = [f"OBX|{n}|NM|{code}^{code}^L||{value}||||||{status}|||{time}"
           for n, (code, value, time) in enumerate(observations, start=1)]
    return "\r".join([msh, PID, pv1, obr, *obx])
