"""HL7 v2 ADT and ORU messages into stays and scores, each acknowledged after its commit.

Messages: tests/feeds/hl7_messages.py (the HL7 v2.5.1 ADT^A01 example and messages derived
from it). Expected values are worked out by hand from the messages beside each check; the
code tables are HL7 v2.5.1's (0007 admission type, 0001 sex, 0008 acknowledgment code,
0357 error code), the as-of rule and stay rules DATA_CONTRACT.md's.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import hl7
import pytest
from sqlalchemy import select

from app.feeds.apply import replay_dead_letters
from app.feeds.mapping import mapping_from_dict
from app.store import db
from app.store.models import (
    AuditEvent,
    FeedDeadLetter,
    FeedMessage,
    FeedStay,
    ImportBatch,
    Observation,
    Stay,
)
from tests.feeds.hl7_messages import A01_EXAMPLE, adt, oru
from tests.feeds.hl7_setup import MAPPING, RECEIVED, add_units, count, send

pytestmark = pytest.mark.both_databases


def _utc(text: str) -> datetime:
    return datetime.fromisoformat(text).replace(tzinfo=UTC)


def _stays(url: str) -> list[Stay]:
    with db.session_scope(url) as session:
        stays = list(session.scalars(select(Stay).order_by(Stay.admitted_at)))
        session.expunge_all()
    return stays


def _msa(ack: str) -> tuple[str, str, str]:
    message = hl7.parse(ack)  # the ACK must itself be a message python-hl7 reads
    msa = message.segment("MSA")
    return str(msa(1)), str(msa(2)), str(msa(3))


def test_the_standards_admit_example_makes_one_stay(db_url: str) -> None:
    add_units(db_url)
    receipt = send(db_url, A01_EXAMPLE)
    assert receipt.status == "applied"
    # HL7 table 0008: AA application accept; MSA-2 echoes MSH-10 of the message.
    assert _msa(receipt.ack)[:2] == ("AA", "MSG00001")
    [stay] = _stays(db_url)
    assert stay.unit == "KV-CRIT"  # PV1-3.1 "2000", mapped
    # EVN-6 is blank and PV1-44 too: EVN-2 200708181123 is the admission time (UTC here).
    assert stay.admitted_at == _utc("2007-08-18T11:23:00")
    assert stay.discharged_at is None
    assert stay.admission_type == "emergency"  # PV1-4 E, table 0007 Emergency
    assert stay.sex == "m"  # PID-8 M, table 0001 Male
    assert stay.age == 46  # PID-7 1961-06-15 to 2007-08-18: 46 years (birthday passed)
    assert stay.specialty == "sur" and stay.source == "adm"  # PV1-10, PV1-14 as sent
    assert stay.patient is not None and len(stay.patient) == 32
    with db.session_scope(db_url) as session:
        audit = session.scalars(select(AuditEvent).where(AuditEvent.entity == "stay")).all()
        assert [a.action for a in audit] == ["insert"]
        batch = session.get(ImportBatch, stay.batch_id)
        assert batch is not None and batch.kind == "hl7v2" and "MSG00001" in batch.filename
        assert audit[0].batch_id == batch.id


def test_a_repeated_control_id_changes_nothing_and_is_acknowledged_again(db_url: str) -> None:
    add_units(db_url)
    first = send(db_url, A01_EXAMPLE)
    audits = count(db_url, AuditEvent)
    again = send(db_url, A01_EXAMPLE)
    assert first.status == "applied" and again.status == "duplicate"
    assert _msa(again.ack)[:2] == ("AA", "MSG00001")
    assert count(db_url, Stay) == 1 and count(db_url, AuditEvent) == audits
    with db.session_scope(db_url) as session:
        row = session.scalar(select(FeedMessage))
        assert row is not None and row.repeats == 1 and row.outcome == "applied"


def test_transfer_into_and_out_of_mapped_units(db_url: str) -> None:
    add_units(db_url)
    # Admitted to a ward Morrow does not serve: acknowledged, nothing kept.
    ward = send(db_url, adt("A01", "M1", location="WARD-4", recorded="202603010900"))
    assert ward.status == "ignored" and _msa(ward.ack)[0] == "AA"
    assert count(db_url, Stay) == 0
    steps = [
        adt("A02", "M2", occurred="202603011000", location="2000^1^1", prior="WARD-4"),
        adt("A02", "M3", occurred="202603031430", location="3000^7^2", prior="2000^1^1"),
        adt("A02", "M4", occurred="202603050800", location="WARD-4", prior="3000^7^2"),
    ]
    for message in steps:
        receipt = send(db_url, message)
        assert receipt.status == "applied", receipt.reason
    crit, surg = _stays(db_url)
    # Into KV-CRIT from the ward at EVN-6; out of it to KV-SURG at the next A02's EVN-6.
    assert (crit.unit, crit.admitted_at, crit.discharged_at) == (
        "KV-CRIT", _utc("2026-03-01T10:00"), _utc("2026-03-03T14:30"))
    assert crit.from_unit is None and crit.to_unit == "KV-SURG" and crit.outcome == "transfer"
    assert (surg.unit, surg.admitted_at, surg.discharged_at) == (
        "KV-SURG", _utc("2026-03-03T14:30"), _utc("2026-03-05T08:00"))
    assert surg.from_unit == "KV-CRIT" and surg.to_unit == "WARD-4"
    # One visit, one patient: the two stays share both keys.
    assert crit.patient == surg.patient
    with db.session_scope(db_url) as session:
        visits = set(session.scalars(select(FeedStay.visit)))
    assert len(visits) == 1


def test_discharge_with_disposition_and_its_cancel(db_url: str) -> None:
    add_units(db_url)
    send(db_url, adt("A01", "M1", occurred="202603010900"))
    done = send(db_url, adt("A03", "M2", occurred="202603041200", disposition="01"))
    assert done.status == "applied"
    [stay] = _stays(db_url)
    assert stay.discharged_at == _utc("2026-03-04T12:00") and stay.outcome == "home"
    assert stay.discharge_source == "stays"  # an exact time, as from stays.csv
    undone = send(db_url, adt("A13", "M3", occurred="202603041230"))
    assert undone.status == "applied"
    [stay] = _stays(db_url)
    assert stay.discharged_at is None and stay.outcome is None
    with db.session_scope(db_url) as session:
        actions = [a.action for a in session.scalars(
            select(AuditEvent).where(AuditEvent.entity == "stay").order_by(AuditEvent.id))]
    assert actions == ["insert", "update", "update"]


def test_update_changes_covariates_with_audit(db_url: str) -> None:
    add_units(db_url)
    send(db_url, adt("A01", "M1", occurred="202603010900", sent="202603010901"))
    changed = send(db_url, adt("A08", "M2", occurred="202603011000", sent="202603011001",
                               service="CAR", sex="F"))
    assert changed.status == "applied"
    [stay] = _stays(db_url)
    assert (stay.specialty, stay.sex) == ("car", "f")
    with db.session_scope(db_url) as session:
        update = session.scalars(select(AuditEvent).where(AuditEvent.action == "update")).one()
    assert update.before == {"specialty": "sur", "sex": "m"}
    assert update.after == {"specialty": "car", "sex": "f"}


def test_an_older_update_arriving_late_changes_nothing(db_url: str) -> None:
    add_units(db_url)
    send(db_url, adt("A01", "M1", occurred="202603010900", sent="202603010901"))
    send(db_url, adt("A08", "M3", occurred="202603011200", sent="202603011201", service="CAR"))
    # Sent at 10:01 (MSH-7), before the 12:01 update already applied: known earlier.
    late = send(db_url, adt("A08", "M2", occurred="202603011000", sent="202603011001",
                            service="NEU"))
    assert late.status == "applied" and _msa(late.ack)[0] == "AA"
    [stay] = _stays(db_url)
    assert stay.specialty == "car"


def test_cancel_admit_removes_the_stay(db_url: str) -> None:
    add_units(db_url)
    send(db_url, adt("A01", "M1", occurred="202603010900"))
    send(db_url, oru("R1", [("news2", "5", "202603011000")], sent="202603011001"))
    assert count(db_url, Observation) == 1
    cancelled = send(db_url, adt("A11", "M2", occurred="202603010900"))
    assert cancelled.status == "applied"
    assert count(db_url, Stay) == 0 and count(db_url, Observation) == 0
    with db.session_scope(db_url) as session:
        deleted = session.scalars(select(AuditEvent).where(AuditEvent.action == "delete")).one()
    assert deleted.before["unit"] == "KV-CRIT" and deleted.before["observations"] == 1


def test_cancel_transfer_reopens_the_stay_left(db_url: str) -> None:
    add_units(db_url)
    send(db_url, adt("A01", "M1", occurred="202603010900"))
    send(db_url, adt("A02", "M2", occurred="202603021000", location="3000", prior="2000"))
    assert count(db_url, Stay) == 2
    # A12: PV1-3 the location the patient stays in, PV1-6 the cancelled transfer's.
    undone = send(db_url, adt("A12", "M3", occurred="202603021000", location="2000",
                              prior="3000"))
    assert undone.status == "applied"
    [stay] = _stays(db_url)
    assert (stay.unit, stay.discharged_at, stay.to_unit, stay.outcome) == (
        "KV-CRIT", None, None, None)


def test_out_of_order_discharge_waits_for_its_admission(db_url: str) -> None:
    add_units(db_url)
    early = send(db_url, adt("A03", "M2", occurred="202603041200", sent="202603041201"))
    assert early.status == "dead_letter"
    assert _msa(early.ack)[0] == "AE"  # not applied (yet): the sender is told
    assert count(db_url, Stay) == 0
    admit = send(db_url, adt("A01", "M1", occurred="202603010900", sent="202603010901"))
    assert admit.status == "applied"
    [stay] = _stays(db_url)  # the waiting discharge was applied with the admission
    assert stay.admitted_at == _utc("2026-03-01T09:00")
    assert stay.discharged_at == _utc("2026-03-04T12:00")
    with db.session_scope(db_url) as session:
        dead = session.scalars(select(FeedDeadLetter)).one()
        assert dead.resolved_at is not None and dead.text is None and dead.events is None
        assert session.scalar(select(FeedMessage.outcome)
                              .where(FeedMessage.control_id == "M2")) == "applied"


def test_unmapped_unit_is_a_dead_letter_until_the_mapping_names_it(db_url: str) -> None:
    add_units(db_url)
    message = adt("A01", "M1", occurred="202603010900", location="ICU-EAST^4^1")
    receipt = send(db_url, message)
    assert receipt.status == "dead_letter" and _msa(receipt.ack)[0] == "AE"
    assert "ICU-EAST" in receipt.reason
    assert count(db_url, Stay) == 0
    with db.session_scope(db_url) as session:
        row = session.scalar(select(FeedMessage))
        assert row is not None and row.unmapped == {"locations": ["ICU-EAST"]}
        # Nothing changes with the same mapping.
        assert replay_dead_letters(session, MAPPING, now=RECEIVED)[0].status == "dead_letter"
    fixed = mapping_from_dict({"units": {"2000": "KV-CRIT", "ICU-EAST": "KV-CRIT"}})
    with db.session_scope(db_url) as session:
        [result] = replay_dead_letters(session, fixed, now=RECEIVED)
    assert result.status == "applied"
    [stay] = _stays(db_url)
    assert stay.unit == "KV-CRIT" and stay.admitted_at == _utc("2026-03-01T09:00")


def test_scores_from_oru(db_url: str) -> None:
    add_units(db_url)
    send(db_url, adt("A01", "M1", occurred="202603010900"))
    scores = oru("R1", [("news2", "5", "202603011000"), ("GLU", "6.1", "202603011000"),
                        ("sofa", "7", "202603011005")], sent="202603011010")
    receipt = send(db_url, scores)
    assert receipt.status == "applied"
    with db.session_scope(db_url) as session:
        rows = session.execute(select(Observation.name, Observation.value,
                                      Observation.observed_at, Observation.recorded_at)
                               .order_by(Observation.name)).all()
        unmapped = session.scalar(select(FeedMessage.unmapped)
                                  .where(FeedMessage.control_id == "R1"))
    # OBX-3.1 equal to a score name is that score; GLU is no score and is reported.
    assert [(r.name, r.value) for r in rows] == [("news2", 5.0), ("sofa", 7.0)]
    assert rows[0].observed_at == _utc("2026-03-01T10:00")  # OBX-14
    assert rows[0].recorded_at == _utc("2026-03-01T10:10")  # MSH-7: known-at
    assert unmapped == {"codes": ["L|GLU"]}  # OBX-3.3 coding system | OBX-3.1 code
    # A corrected value (OBX-11 C) sent later is a new entry, the first one kept.
    send(db_url, oru("R2", [("news2", "6", "202603011000")], sent="202603011100",
                     status="C"))
    assert count(db_url, Observation) == 3


def test_a_score_outside_its_published_range_is_refused(db_url: str) -> None:
    add_units(db_url)
    send(db_url, adt("A01", "M1", occurred="202603010900"))
    # NEWS2 runs 0..20 (Royal College of Physicians 2017).
    receipt = send(db_url, oru("R1", [("news2", "25", "202603011000")]))
    assert receipt.status == "refused" and _msa(receipt.ack)[0] == "AE"
    assert "NEWS2" in receipt.reason
    assert count(db_url, Observation) == 0


BAD = [
    # (what is wrong, message, ACK code, text the reason must hold, ERR-2 location)
    ("EVN-6 not a timestamp", adt("A01", "B1", occurred="2026-03-01 09:00"), "AE", "EVN-6",
     "EVN^1^6"),
    ("month 13", adt("A01", "B2", occurred="202613010900"), "AE", "EVN-6", "EVN^1^6"),
    ("day precision only", adt("A01", "B3", occurred="20260301"), "AE", "EVN-6", "EVN^1^6"),
    ("offset out of range", adt("A01", "B4", occurred="202603010900+2500"), "AE", "EVN-6",
     "EVN^1^6"),
    ("MSH-7 not a timestamp", adt("A01", "B5", sent="yesterday"), "AE", "MSH-7", "MSH^1^7"),
    ("in the future", adt("A01", "B6", occurred="202703010900"), "AE", "admission time", ""),
    ("no PV1 segment", adt("A01", "B7").rsplit("\r", 1)[0], "AE", "PV1", "PV1^1"),
    ("no visit number", adt("A01", "B8", visit=""), "AE", "PV1-19", "PV1^1^19"),
    ("no admission type", adt("A01", "B9", kind=""), "AE", "admission type", ""),
    ("date of birth not a date", adt("A01", "B10", birth="1961-06-15"), "AE", "PID-7",
     "PID^1^7"),
    ("event Morrow does not take", adt("A04", "B11"), "AR", "A04", "MSH^1^9"),
    ("not a message", "PID|1||X\rPV1|1", "AR", "MSH", "MSH^1"),
    ("no control id", adt("A01", ""), "AR", "MSH-10", "MSH^1^10"),
    ("age over 120", adt("A01", "B14", birth="18500101"), "AE", "PID-7", "PID^1^7"),
]


@pytest.mark.parametrize(("what", "message", "code", "reason", "where"), BAD,
                         ids=[b[0] for b in BAD])
def test_bad_messages_are_answered_with_the_reason_and_store_nothing(
        db_url: str, what: str, message: str, code: str, reason: str, where: str) -> None:
    add_units(db_url)
    receipt = send(db_url, message)
    assert receipt.status == "refused", what
    ack = hl7.parse(receipt.ack)
    assert str(ack.segment("MSA")(1)) == code
    assert reason in str(ack.segment("MSA")(3)) and reason in receipt.reason
    err = ack.segment("ERR")
    if where:
        assert str(err(2)) == where
    assert str(err(4)) == "E"  # severity: error
    # Nothing stored: read the database.
    for model in (Stay, AuditEvent, ImportBatch, Observation, FeedStay, FeedDeadLetter):
        assert count(db_url, model) == 0, model.__tablename__


def test_dead_letters_are_deleted_after_their_keeping_time(db_url: str) -> None:
    add_units(db_url)
    keep_two_days = mapping_from_dict({"units": {"2000": "KV-CRIT"},
                                       "dead_letters": {"keep_days": 2}})
    send(db_url, adt("A01", "M1", location="ICU-EAST"), mapping=keep_two_days)
    assert count(db_url, FeedDeadLetter) == 1
    with db.session_scope(db_url) as session:  # a day later: still kept, still unmapped
        assert len(replay_dead_letters(session, keep_two_days,
                                       now=RECEIVED + timedelta(days=1))) == 1
    with db.session_scope(db_url) as session:  # past two days: deleted, not tried
        assert replay_dead_letters(session, keep_two_days,
                                   now=RECEIVED + timedelta(days=2, hours=1)) == []
    assert count(db_url, FeedDeadLetter) == 0
    assert count(db_url, FeedMessage) == 1  # the message's record (no text) stays
