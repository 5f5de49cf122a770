"""HL7 v2 messages in: split a file or stream into messages, translate one message into
neutral events (app.feeds.events), and answer it with an acknowledgement.

Parsing is python-hl7's (``hl7.parse``); this module only picks the fields Morrow uses and
checks them. Supported: ADT A01 admit, A02 transfer, A03 discharge, A08 update, A11 / A12 /
A13 cancel admit / transfer / discharge, and ORU^R01 observation results (each OBX a score).

Fields used (HL7 v2.5.1 chapters 2, 3 and 7):
  MSH-3/4 sending application/facility (the feed's name), MSH-7 time sent (known-at),
  MSH-9 type, MSH-10 control id; EVN-6 event occurred (clinical time), EVN-2 recorded (its
  fallback); PID-3 identifier (keyed hash), PID-7 date of birth (only the age at the event
  is kept), PID-8 sex; PV1-3.1 point of care, PV1-4 admission type, PV1-6.1 prior point of
  care, PV1-10 hospital service, PV1-14 admit source, PV1-19 visit number (keyed hash),
  PV1-36 discharge disposition, PV1-44 / PV1-45 admit / discharge time; OBX-3 observation
  identifier (.1 code, .3 coding system), OBX-5 value, OBX-11 result status, OBX-14
  observation time (else OBR-7).

Timestamps are HL7 DTM (YYYYMMDDHHMM[SS[.S...]][+/-ZZZZ]); clinical times need at least
minutes; one without an offset is wall-clock time in ``MORROW_TIMEZONE`` as in the CSV
files. A message that cannot be read, or whose type Morrow does not take, is rejected (AR);
one whose content is wrong (a bad timestamp, a required field missing) is an error (AE).
The reason, in MSA-3 and ERR, never quotes a value from PID (no identifier leaves Morrow).
"""

from __future__ import annotations

import hashlib
import re
from dataclasses import dataclass
from datetime import UTC, date, datetime
from zoneinfo import ZoneInfo

import hl7

from app.feeds.events import FeedMessage, ScoreEvent, StayAction, StayEvent
from app.feeds.mapping import sex_of
from app.feeds.pseudonym import Pseudonymiser
from app.timeutil import localize

ADT_EVENTS: dict[str, StayAction] = {
    "A01": "admit", "A02": "transfer", "A03": "discharge", "A08": "update",
    "A11": "cancel_admit", "A12": "cancel_transfer", "A13": "cancel_discharge",
}
# HL7 table 0357 (message error condition codes), v2.5.1, from memory: 100 segment sequence
# error, 101 required field missing, 102 data type error, 103 table value not found,
# 200 unsupported message type, 201 unsupported event code, 207 application internal error.
ERR_SEGMENT, ERR_REQUIRED, ERR_DATA_TYPE, ERR_TABLE_VALUE = "100", "101", "102", "103"
ERR_MESSAGE_TYPE, ERR_EVENT, ERR_INTERNAL = "200", "201", "207"
_ERR_TEXT = {"100": "Segment sequence error", "101": "Required field missing",
             "102": "Data type error", "103": "Table value not found",
             "200": "Unsupported message type", "201": "Unsupported event code",
             "207": "Application internal error"}

# MLLP framing (HL7 v2.5.1 appendix C): <VT> message <FS><CR>.
MLLP_START, MLLP_END = "\x0b", "\x1c"
_DTM = re.compile(r"(\d{4})(\d{2})?(\d{2})?(\d{2})?(\d{2})?(\d{2}(?:\.\d{1,4})?)?([+-]\d{4})?")
_NUMBER = re.compile(r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)")
# Segments kept (reduced) in a dead letter's text; every other segment (NK1, GT1, IN1, DG1,
# AL1, ...) may name people or conditions and is dropped.
_KEPT_FIELDS = {
    "MSH": None,  # all of it: no patient data
    "EVN": {1, 2, 6},
    "PID": {1, 3, 8},
    "PV1": {1, 2, 3, 4, 6, 10, 14, 19, 36, 44, 45},
    "OBR": {1, 7},
    "OBX": {1, 2, 3, 5, 11, 14},
}


class Hl7Problem(ValueError):
    """A message Morrow cannot take: the ACK code (AR/AE), a reason, where, an HL7 error code."""

    def __init__(self, ack_code: str, reason: str, where: str = "", code: str = ERR_DATA_TYPE):
        super().__init__(reason)
        self.ack_code, self.reason, self.where, self.code = ack_code, reason, where, code


# -- splitting a file or a stream into messages -------------------------------------------------

def split_messages(text: str) -> list[str]:
    """The messages of a file: one after another, each starting with MSH.

    Segments may end with CR (the standard), LF or CR LF; messages may be separated by line
    ends, wrapped in MLLP framing (VT ... FS CR), or enclosed in an FHS/BHS batch envelope
    (whose header and trailer segments are dropped). Each message is returned with its
    segments joined by CR.
    """
    cleaned = text.replace(MLLP_START, "\n").replace(MLLP_END, "\n").lstrip("\ufeff")
    messages: list[list[str]] = []
    for line in re.split(r"\r\n|\r|\n", cleaned):
        segment = line.strip("\x00")
        if not segment.strip():
            continue
        tag = segment[:3]
        if tag in ("FHS", "BHS", "BTS", "FTS"):
            continue
        if tag == "MSH":
            messages.append([segment])
        elif messages:
            messages[-1].append(segment)
        else:
            messages.append([segment])  # text before any MSH: refused as a message of its own
    return ["\r".join(segments) for segments in messages]


# -- reading fields ------------------------------------------------------------------------------

def _field(segment: hl7.Segment | None, number: int, component: int = 1,
           repetition: int = 1) -> str:
    if segment is None:
        return ""
    try:
        value = segment.extract_field(1, number, repetition, component, 1)
    except (IndexError, KeyError, TypeError):
        return ""
    return str(value).strip()


def _segment(message: hl7.Message, name: str) -> hl7.Segment | None:
    try:
        return message.segment(name)
    except KeyError:
        return None


def _segments(message: hl7.Message, name: str) -> list[hl7.Segment]:
    try:
        return list(message.segments(name))
    except KeyError:
        return []


def parse_dtm(value: str, tz: ZoneInfo, where: str, *, minutes: bool = True) -> datetime | None:
    """An HL7 DTM as an aware UTC datetime; None if blank; ``Hl7Problem`` (AE) if malformed."""
    if not value:
        return None
    match = _DTM.fullmatch(value)
    digits = len(re.sub(r"[+-]\d{4}$", "", value).split(".")[0])
    if match is None or (minutes and digits < 12):
        need = "YYYYMMDDHHMM[SS][+/-ZZZZ]" if minutes else "YYYYMMDD[HHMM[SS]][+/-ZZZZ]"
        raise Hl7Problem("AE", f"{where} is not a timestamp {need}", where, ERR_DATA_TYPE)
    try:
        moment = hl7.parse_datetime(value)  # python-hl7's DTM reader
        offset = match.group(7)
        if offset:  # sign taken from the text (python-hl7 loses it for -00MM offsets)
            minutes_east = int(offset[1:3]) * 60 + int(offset[3:5])
            if offset[0] == "-":
                minutes_east = -minutes_east
            if abs(minutes_east) > 14 * 60 or int(offset[3:5]) > 59:
                raise ValueError("offset out of range")
            from datetime import timedelta, timezone
            return moment.replace(tzinfo=timezone(timedelta(minutes=minutes_east))) \
                .astimezone(UTC)
        return localize(moment, tz).astimezone(UTC)
    except (ValueError, OverflowError):
        raise Hl7Problem("AE", f"{where} is not a valid date and time", where,
                         ERR_DATA_TYPE) from None


def _age(birth: date, at: datetime, tz: ZoneInfo) -> int:
    day = at.astimezone(tz).date()
    return day.year - birth.year - ((day.month, day.day) < (birth.month, birth.day))


# -- the header ----------------------------------------------------------------------------------

@dataclass(frozen=True)
class Header:
    """What an ACK needs from the message it answers (MSH only: never patient data)."""

    sending_application: str = ""
    sending_facility: str = ""
    receiving_application: str = ""
    receiving_facility: str = ""
    control_id: str = ""
    trigger: str = ""
    processing_id: str = "P"
    version: str = "2.5.1"

    @property
    def source(self) -> str:
        app = self.sending_application or "unknown"
        return f"{app}@{self.sending_facility}" if self.sending_facility else app


# Segments Morrow reads; the others (NK1, GT1, IN1, DG1, ...) are dropped before parsing.
READ_SEGMENTS = ("MSH", "EVN", "PID", "PV1", "OBR", "OBX")


def read_header(text: str) -> tuple[hl7.Message | None, Header]:
    """The parsed message (None if python-hl7 cannot read it) and its MSH header.

    Only the segments Morrow reads are given to python-hl7: the others are never parsed,
    kept or logged (and parsing is the slowest step of taking a message)."""
    if not text.startswith("MSH") or len(text) < 8:
        return None, Header()
    kept = "\r".join(s for s in text.split("\r") if s[:3] in READ_SEGMENTS)
    try:
        message = hl7.parse(kept)
        msh = message.segment("MSH")
    except Exception:  # python-hl7 raises several kinds on garbage
        return None, Header()
    return message, Header(
        sending_application=_field(msh, 3), sending_facility=_field(msh, 4),
        receiving_application=_field(msh, 5), receiving_facility=_field(msh, 6),
        control_id=_field(msh, 10), trigger=_field(msh, 9, 2),
        processing_id=_field(msh, 11) or "P", version=_field(msh, 12) or "2.5.1")


# -- translation ---------------------------------------------------------------------------------

def translate(text: str, *, pseudonymiser: Pseudonymiser, tz: ZoneInfo,
              received_at: datetime,
              parsed: tuple[hl7.Message | None, Header] | None = None) -> FeedMessage:
    """One message as a ``FeedMessage``; ``Hl7Problem`` if it cannot be taken.

    ``parsed`` is ``read_header(text)`` when the caller has it already."""
    message, header = parsed if parsed is not None else read_header(text)
    if message is None:
        raise Hl7Problem("AR", "not an HL7 v2 message (it must begin with an MSH segment "
                         "python-hl7 can read)", "MSH", ERR_SEGMENT)
    msh = message.segment("MSH")
    if not header.control_id:
        raise Hl7Problem("AR", "MSH-10 (message control id) is missing", "MSH-10", ERR_REQUIRED)
    if len(header.control_id) > 200:
        raise Hl7Problem("AR", "MSH-10 (message control id) is longer than 200 characters",
                         "MSH-10", ERR_DATA_TYPE)
    kind, trigger = _field(msh, 9, 1), _field(msh, 9, 2)
    sent_at = parse_dtm(_field(msh, 7), tz, "MSH-7")
    digest = hashlib.sha256(text.encode("utf-8")).hexdigest()
    evn = _segment(message, "EVN")
    if kind == "ADT":
        if not trigger and evn is not None:
            trigger = _field(evn, 1)
        action = ADT_EVENTS.get(trigger)
        if action is None:
            raise Hl7Problem("AR", f"ADT event {trigger or '(none)'} is not one Morrow takes "
                             f"(it takes {', '.join(ADT_EVENTS)})", "MSH-9", ERR_EVENT)
        events: tuple[StayEvent | ScoreEvent, ...] = (
            _stay_event(message, action, trigger, pseudonymiser, tz, sent_at or received_at),)
    elif kind == "ORU" and trigger in ("R01", ""):
        events = _score_events(message, pseudonymiser, tz)
    else:
        raise Hl7Problem("AR", f"message type {kind or '(none)'}^{trigger} is not one Morrow "
                         "takes (ADT A01 A02 A03 A08 A11 A12 A13, ORU^R01)", "MSH-9",
                         ERR_MESSAGE_TYPE)
    return FeedMessage(kind="hl7v2", source=header.source, control_id=header.control_id,
                       message_type=f"{kind}^{trigger}", digest=digest, events=events,
                       sent_at=sent_at,
                       make_text=lambda: pseudonymised_text(message, pseudonymiser))


def _visit(message: hl7.Message, pseudonymiser: Pseudonymiser) -> tuple[str, str | None]:
    pv1 = _segment(message, "PV1")
    if pv1 is None:
        raise Hl7Problem("AE", "the PV1 segment is missing", "PV1", ERR_SEGMENT)
    number = _field(pv1, 19)
    if not number:
        raise Hl7Problem("AE", "PV1-19 (visit number) is missing", "PV1-19", ERR_REQUIRED)
    visit = pseudonymiser.visit(number, _field(pv1, 19, 4))
    pid = _segment(message, "PID")
    identifier = _field(pid, 3)
    patient = pseudonymiser.patient(identifier, _field(pid, 3, 4)) if identifier else None
    return visit, patient


def _stay_event(message: hl7.Message, action: StayAction, trigger: str,
                pseudonymiser: Pseudonymiser, tz: ZoneInfo, fallback: datetime) -> StayEvent:
    evn, pid, pv1 = (_segment(message, name) for name in ("EVN", "PID", "PV1"))
    if pid is None:
        raise Hl7Problem("AE", "the PID segment is missing", "PID", ERR_SEGMENT)
    visit, patient = _visit(message, pseudonymiser)
    occurred = parse_dtm(_field(evn, 6), tz, "EVN-6")
    recorded = parse_dtm(_field(evn, 2), tz, "EVN-2")
    admitted = parse_dtm(_field(pv1, 44), tz, "PV1-44")
    discharged = parse_dtm(_field(pv1, 45), tz, "PV1-45")
    if action == "admit":
        at, where = occurred or admitted or recorded, "EVN-6 or PV1-44"
    elif action == "discharge":
        at, where = occurred or discharged or recorded, "EVN-6 or PV1-45"
    elif action == "transfer":
        at, where = occurred or recorded, "EVN-6"
    else:
        at, where = occurred or recorded or fallback, "EVN-6"
    if at is None:
        raise Hl7Problem("AE", f"no event time ({where})", where.split()[0], ERR_REQUIRED)
    age = None
    birth_text = _field(pid, 7)
    if birth_text:
        # The value is never quoted: a date of birth is personal data.
        if not re.fullmatch(r"\d{8}(\d{2,6}(\.\d{1,4})?)?([+-]\d{4})?", birth_text):
            raise Hl7Problem("AE", "PID-7 (date of birth) is not a date YYYYMMDD", "PID-7",
                             ERR_DATA_TYPE)
        try:
            birth = date(int(birth_text[:4]), int(birth_text[4:6]), int(birth_text[6:8]))
        except ValueError:
            raise Hl7Problem("AE", "PID-7 (date of birth) is not a valid date", "PID-7",
                             ERR_DATA_TYPE) from None
        age = _age(birth, admitted or at, tz)
        if not 0 <= age <= 120:
            raise Hl7Problem("AE", "PID-7 (date of birth) gives an age outside 0 to 120",
                             "PID-7", ERR_DATA_TYPE)
    sex_code = _field(pid, 8)
    if sex_code and sex_code.upper() not in ("F", "M", "O", "U", "A", "N"):
        raise Hl7Problem("AE", f"PID-8 (sex) {sex_code[:10]!r} is not in HL7 table 0001",
                         "PID-8", ERR_TABLE_VALUE)
    return StayEvent(
        action=action, visit=visit, at=at, patient=patient,
        location=_field(pv1, 3) or None, prior_location=_field(pv1, 6) or None,
        admitted_at=admitted, discharged_at=discharged,
        admission_class=_field(pv1, 4) or None, admit_source=_field(pv1, 14) or None,
        specialty=_field(pv1, 10) or None, disposition=_field(pv1, 36) or None,
        age=age, sex=sex_of(sex_code), booking=_field(pv1, 5) or None)


def _score_events(message: hl7.Message, pseudonymiser: Pseudonymiser,
                  tz: ZoneInfo) -> tuple[ScoreEvent, ...]:
    visit, patient = _visit(message, pseudonymiser)
    location = _field(_segment(message, "PV1"), 3) or None
    obr = _segment(message, "OBR")
    requested = parse_dtm(_field(obr, 7), tz, "OBR-7")
    events = []
    observations = _segments(message, "OBX")
    if not observations:
        raise Hl7Problem("AE", "the message has no OBX segment", "OBX", ERR_SEGMENT)
    for number, obx in enumerate(observations, start=1):
        where = f"OBX[{number}]"
        code = _field(obx, 3)
        if not code:
            raise Hl7Problem("AE", f"{where}-3 (observation identifier) is missing",
                             f"{where}-3", ERR_REQUIRED)
        status = _field(obx, 11).upper()
        raw = _field(obx, 5)
        if not _NUMBER.fullmatch(raw):
            if status in ("D", "W") and not raw:
                raw = "0"
            else:
                raise Hl7Problem("AE", f"{where}-5 (value) of {code[:20]!r} is not a number "
                                 "written with digits", f"{where}-5", ERR_DATA_TYPE)
        observed = parse_dtm(_field(obx, 14), tz, f"{where}-14") or requested
        if observed is None:
            raise Hl7Problem("AE", f"{where}-14 (observation time) is missing and OBR-7 too",
                             f"{where}-14", ERR_REQUIRED)
        events.append(ScoreEvent(visit=visit, code=code[:64], value=float(raw),
                                 observed_at=observed, system=_field(obx, 3, 3) or None,
                                 location=location, patient=patient,
                                 withdrawn=status in ("D", "W")))
    return tuple(events)


def pseudonymised_text(message: hl7.Message, pseudonymiser: Pseudonymiser) -> str:
    """The message as kept in a dead letter: only the segments and fields Morrow reads, with
    PID-3 and PV1-19 replaced by their keyed hash; names, addresses, dates of birth gone."""
    lines = []
    for segment in message:
        name = str(segment[0])
        kept = _KEPT_FIELDS.get(name, set())
        if name not in _KEPT_FIELDS:
            continue
        if kept is None:
            lines.append(str(segment))
            continue
        fields = [name]
        for number in range(1, len(segment)):
            if number not in kept:
                fields.append("")
            elif name == "PID" and number == 3:
                identifier = _field(segment, 3)
                fields.append(pseudonymiser.patient(identifier, _field(segment, 3, 4))
                              if identifier else "")
            elif name == "PV1" and number == 19:
                visit = _field(segment, 19)
                fields.append(pseudonymiser.visit(visit, _field(segment, 19, 4))
                              if visit else "")
            else:
                fields.append(str(segment(number)))
        lines.append("|".join(fields).rstrip("|"))
    return "\r".join(lines)


# -- acknowledgements ----------------------------------------------------------------------------

def _escape(text: str) -> str:
    """Text safe inside an HL7 field (HL7 v2.5.1 2.7 escape sequences)."""
    text = text.replace("\\", "\\E\\")
    for char, code in (("|", "\\F\\"), ("^", "\\S\\"), ("~", "\\R\\"), ("&", "\\T\\")):
        text = text.replace(char, code)
    return re.sub(r"[\r\n\x00-\x1f]", " ", text)


def build_ack(header: Header, ack_code: str, *, text: str = "", where: str = "",
              error_code: str = "", now: datetime | None = None) -> str:
    """An original-mode ACK (HL7 v2.5.1 2.9.2): MSH, MSA (code, control id, text), and ERR
    (location, HL7 table 0357 code, severity E, the reason) when the code is not AA."""
    moment = (now or datetime.now(UTC)).astimezone(UTC)
    control = hashlib.sha256(f"{header.control_id}|{moment.isoformat()}|{ack_code}".encode()
                             ).hexdigest()[:20]
    msh = "|".join([
        "MSH", "^~\\&", "MORROW", _escape(header.receiving_facility),
        _escape(header.sending_application), _escape(header.sending_facility),
        moment.strftime("%Y%m%d%H%M%S") + "+0000", "",
        f"ACK^{_escape(header.trigger)}^ACK", control, _escape(header.processing_id) or "P",
        _escape(header.version) or "2.5.1"])
    msa = "|".join(["MSA", ack_code, _escape(header.control_id), _escape(text[:80])])
    segments = [msh, msa]
    if ack_code != "AA":
        location = ""
        found = re.fullmatch(r"([A-Z0-9]{3})(?:\[(\d+)\])?(?:-(\d+))?", where or "")
        if found:
            location = "^".join([found.group(1), found.group(2) or "1", found.group(3) or ""])
        code = error_code or ERR_INTERNAL
        segments.append("|".join(["ERR", "", location.rstrip("^"),
                                  f"{code}^{_ERR_TEXT.get(code, '')}^HL70357", "E", "", "",
                                  "", _escape(text[:250])]))
    return "\r".join(segments) + "\r"
