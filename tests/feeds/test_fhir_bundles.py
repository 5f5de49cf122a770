"""FHIR R4 Bundles in: built from the standard's example resources (tests/feeds/fhir_examples.py
says where each comes from). A valid Bundle imports; a Bundle with one bad entry stores
nothing and names the entry and element; Locations map to units; an unmapped code waits."""

from __future__ import annotations

import copy
import json
import os
from datetime import UTC, datetime
from pathlib import Path

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import select

from app.config import get_settings
from app.feeds.apply import replay_dead_letters
from app.feeds.fhir import BundleRefused
from app.feeds.fhir_import import import_bundle_once
from app.feeds.mapping import FeedMapping, mapping_from_dict
from app.store import db
from app.store.models import FeedDeadLetter, FeedMessage, FeedStay, Observation, Stay
from tests.conftest import UTC_ZONE
from tests.feeds import fhir_examples as ex
from tests.feeds.hl7_setup import PSEUDONYMISER, add_units, count, dump_database

RECEIVED = datetime(2026, 3, 10, 8, 0, tzinfo=UTC)
MAPPING = mapping_from_dict(ex.MAPPING)


def send(url: str, bundle: dict, mapping: FeedMapping = MAPPING):  # type: ignore[no-untyped-def]
    return import_bundle_once(url, ex.as_bytes(bundle), "bundle.json", mapping=mapping,
                              pseudonymiser=PSEUDONYMISER, tz=UTC_ZONE, received_at=RECEIVED)


def stays(url: str) -> list[Stay]:
    with db.session_scope(url) as session:
        found = list(session.scalars(select(Stay)))
        session.expunge_all()
    return found


def test_a_valid_bundle_imports_its_stay_and_score(db_url: str) -> None:
    add_units(db_url)
    result = send(db_url, ex.standard_bundle())
    assert (result.entries, result.messages, result.applied) == (4, 2, 2)
    [stay] = stays(db_url)
    # encounter-example-home: 16:00 to 16:30 at +10:00 is 06:00 to 06:30 UTC.
    assert stay.unit == "KV-CRIT"  # Location ICU-B, mapped
    assert stay.admitted_at == datetime(2015, 1, 17, 6, 0, tzinfo=UTC)
    assert stay.discharged_at == datetime(2015, 1, 17, 6, 30, tzinfo=UTC)
    assert stay.admission_type == "emergency"  # priority 103391001 "Urgent", mapped
    assert stay.outcome == "home"  # dischargeDisposition 306689006, mapped
    assert stay.booking_id == "98682"  # hospitalization.preAdmissionIdentifier
    assert stay.source == "305997006"  # an admit source is kept as sent (no [sources] entry)
    assert (stay.age, stay.sex) == (70, "m")  # born 1944-11-17, admitted 2015-01-17; male
    assert stay.patient is not None and stay.patient != "738472983"
    with db.session_scope(db_url) as session:
        [score] = session.scalars(select(Observation)).all()
        assert (score.stay_id, score.name, score.value) == (stay.stay_id, "gcs", 13.0)
        assert score.observed_at == datetime(2015, 1, 17, 6, 10, tzinfo=UTC)
        # No Observation.issued or meta.lastUpdated: known from Bundle.timestamp.
        assert score.recorded_at == datetime(2015, 1, 17, 6, 40, tzinfo=UTC)
    text = dump_database(db_url)
    for word in ex.IDENTIFYING:
        assert word not in text, word


def test_sending_a_bundle_again_changes_nothing(db_url: str) -> None:
    add_units(db_url)
    send(db_url, ex.standard_bundle())
    again = send(db_url, ex.standard_bundle())
    assert (again.applied, again.duplicates) == (0, 2)
    assert count(db_url, Stay) == 1 and count(db_url, Observation) == 1


def test_a_bundle_with_one_invalid_entry_stores_nothing(db_url: str) -> None:
    add_units(db_url)
    bad = ex.standard_bundle()
    bad["entry"][2]["resource"]["period"]["start"] = "2015-01-17T25:00:00+10:00"  # no hour 25
    with pytest.raises(BundleRefused) as refused:
        send(db_url, bad)
    paths = [p.path for p in refused.value.problems]
    assert paths == ["Bundle.entry[2].resource.period.start"]
    assert count(db_url, Stay) == count(db_url, Observation) == count(db_url, FeedStay) == 0
    with db.session_scope(db_url) as session:  # only the refusal itself is noted
        rows = session.scalars(select(FeedMessage)).all()
        assert [(r.outcome, r.message_type) for r in rows] == [("refused", "Bundle")]
        assert "Bundle.entry[2].resource.period.start" in (rows[0].reason or "")


def test_one_entry_refused_when_applied_rolls_back_the_whole_bundle(db_url: str) -> None:
    add_units(db_url)
    news2 = copy.deepcopy(ex.OBSERVATION)
    news2["id"] = "news2-high"
    news2["code"] = {"coding": [{"code": "news2"}]}
    news2["valueQuantity"] = {"value": 25}  # NEWS2 ranges 0 to 20 (RCP 2017)
    bundle = ex.bundle(ex.LOCATION, ex.PATIENT, ex.ENCOUNTER, ex.OBSERVATION, news2)
    with pytest.raises(BundleRefused) as refused:
        send(db_url, bundle)
    [problem] = refused.value.problems
    assert problem.path == "Bundle.entry[4].resource" and "news2" in problem.why.lower()
    # The valid Encounter and Glasgow score of the same Bundle were not kept either.
    assert count(db_url, Stay) == count(db_url, Observation) == count(db_url, FeedStay) == 0


def test_malformed_json_and_unknown_resource_types_are_named(db_url: str) -> None:
    with pytest.raises(BundleRefused, match="not JSON"):
        import_bundle_once(db_url, b'{"resourceType": "Bundle",', "x.json", mapping=MAPPING,
                           pseudonymiser=PSEUDONYMISER, tz=UTC_ZONE, received_at=RECEIVED)
    with pytest.raises(BundleRefused) as refused:
        send(db_url, ex.bundle({"resourceType": "Encounterr", "status": "finished"}))
    assert [p.path for p in refused.value.problems] == ["Bundle.entry[0].resource.resourceType"]
    # R4 Encounter.class is one Coding, not a list (the element name loses fhir.resources'
    # "class_fhir" spelling).
    wrong = copy.deepcopy(ex.ENCOUNTER)
    wrong["class"] = [wrong["class"]]
    with pytest.raises(BundleRefused) as refused:
        send(db_url, ex.bundle(ex.LOCATION, wrong))
    assert [p.path for p in refused.value.problems] == ["Bundle.entry[1].resource.class"]


def test_a_bed_location_counts_as_its_ward_and_an_unmapped_ward_waits(db_url: str) -> None:
    add_units(db_url)
    in_bed = copy.deepcopy(ex.ENCOUNTER)
    in_bed["location"][0]["location"] = {"reference": "Location/icu-b-bed-3"}
    bundle = ex.bundle(ex.LOCATION, ex.BED, ex.PATIENT, in_bed, ex.OBSERVATION)
    without_units = mapping_from_dict({k: v for k, v in ex.MAPPING.items() if k != "units"})
    result = send(db_url, bundle, mapping=without_units)
    # ICU-B is no unit code and not mapped: the Encounter, and the score of its visit, wait.
    assert len(result.dead_letters) == 2 and result.applied == 0
    assert "ICU-B" in result.dead_letters[0]
    assert count(db_url, Stay) == 0 and count(db_url, FeedDeadLetter) == 2
    with db.session_scope(db_url) as session:
        replayed = replay_dead_letters(session, MAPPING, now=RECEIVED)
    assert sorted(r.status for r in replayed) == ["applied", "applied"]
    [stay] = stays(db_url)
    assert stay.unit == "KV-CRIT"  # bed 3 is partOf ICU-B, which the mapping names
    assert count(db_url, Observation) == 1


def test_an_observation_with_an_unmapped_code_is_kept_aside(db_url: str) -> None:
    add_units(db_url)
    no_scores = mapping_from_dict({k: v for k, v in ex.MAPPING.items() if k != "scores"})
    result = send(db_url, ex.standard_bundle(), mapping=no_scores)
    assert result.applied == 1  # the Encounter
    [dead] = result.dead_letters
    assert dead.startswith("Bundle.entry[3].resource: ") and "9269-2" in dead
    assert count(db_url, Stay) == 1 and count(db_url, Observation) == 0
    with db.session_scope(db_url) as session:
        unmapped = [r.unmapped for r in session.scalars(select(FeedMessage))
                    if r.outcome == "dead_letter"]
    assert unmapped == [{"codes": ["http://loinc.org|9269-2"]}]


@pytest.fixture
def feed_site(tmp_path: Path, monkeypatch: pytest.MonkeyPatch, db_url: str) -> str:
    secret = tmp_path / "feed_secret"
    secret.write_text("f" * 64 + "\n")
    os.chmod(secret, 0o600)
    mapping = tmp_path / "feeds.toml"
    mapping.write_text(
        '[units]\n"ICU-B" = "KV-CRIT"\n[admission_types]\n"103391001" = "emergency"\n'
        '[outcomes]\n"306689006" = "home"\n[scores]\n"http://loinc.org|9269-2" = "gcs"\n')
    monkeypatch.setenv("MORROW_FEED_SECRET_FILE", str(secret))
    monkeypatch.setenv("MORROW_FEED_MAPPING", str(mapping))
    monkeypatch.setenv("MORROW_TIMEZONE", "UTC")
    get_settings.cache_clear()
    add_units(db_url)
    yield db_url
    get_settings.cache_clear()


def test_the_post_endpoint_takes_a_bundle_from_a_data_role(feed_site: str) -> None:
    from app.web.app import create_app
    from tests.security.fixtures import issue_token, make_user

    make_user(feed_site, "bm.test", "bed_manager", "a long test password")
    make_user(feed_site, "view.test", "viewer", "a long test password")
    client = TestClient(create_app(feed_site))
    headers = {"content-type": "application/fhir+json"}
    body = ex.as_bytes(ex.standard_bundle())
    assert client.post("/api/feeds/fhir", content=body, headers=headers).status_code == 401
    viewer = {**headers, "authorization": f"Bearer {issue_token(feed_site, 'view.test')}"}
    assert client.post("/api/feeds/fhir", content=body, headers=viewer).status_code == 403
    manager = {**headers, "authorization": f"Bearer {issue_token(feed_site, 'bm.test')}"}
    bad = ex.standard_bundle()
    bad["entry"][3]["resource"]["effectiveDateTime"] = "2015-01-17"  # a date, no time
    answer = client.post("/api/feeds/fhir", content=ex.as_bytes(bad), headers=manager)
    assert answer.status_code == 422
    outcome = answer.json()
    assert outcome["resourceType"] == "OperationOutcome"
    assert outcome["issue"][0]["expression"] == ["Bundle.entry[3].resource.effectiveDateTime"]
    assert count(feed_site, Stay) == 0
    answer = client.post("/api/feeds/fhir", content=body, headers=manager)
    assert answer.status_code == 200, answer.text
    assert answer.json()["applied"] == 2
    assert count(feed_site, Stay) == 1  # committed before the answer
    page = client.get("/data", headers={"authorization": manager["authorization"]})
    assert page.status_code == 200 and "Live feeds" in page.text
    assert json.dumps(outcome).count("Pieter") == 0


def test_a_location_history_becomes_one_stay_per_unit(db_url: str) -> None:
    add_units(db_url)
    ward = {**copy.deepcopy(ex.LOCATION), "id": "surg", "identifier": [{"value": "KV-SURG"}],
            "name": "Surgical ward"}
    moved = copy.deepcopy(ex.ENCOUNTER)
    moved["location"] = [
        {"location": {"reference": "Location/icu-b"}, "status": "completed",
         "period": {"start": "2015-01-17T16:00:00+10:00", "end": "2015-01-17T16:15:00+10:00"}},
        {"location": {"reference": "Location/surg"}, "status": "completed",
         "period": {"start": "2015-01-17T16:15:00+10:00", "end": "2015-01-17T16:30:00+10:00"}}]
    send(db_url, ex.bundle(ex.LOCATION, ward, ex.PATIENT, moved))
    crit, surg = sorted(stays(db_url), key=lambda s: s.admitted_at)
    move = datetime(2015, 1, 17, 6, 15, tzinfo=UTC)
    # ICU-B is mapped to KV-CRIT; KV-SURG is a unit code, so it is that unit by default.
    assert (crit.unit, crit.discharged_at, crit.outcome, crit.to_unit) == (
        "KV-CRIT", move, "transfer", "KV-SURG")
    assert (surg.unit, surg.admitted_at, surg.from_unit) == ("KV-SURG", move, "KV-CRIT")
    assert (surg.discharged_at, surg.outcome) == (datetime(2015, 1, 17, 6, 30, tzinfo=UTC),
                                                  "home")
    assert crit.booking_id == "98682" and surg.booking_id is None  # the admission's booking
    assert crit.patient == surg.patient
