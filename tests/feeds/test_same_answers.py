"""Same answers either way: a slice of the demo hospital loaded from its CSV files, and the
same slice replayed as HL7 v2 messages (``morrow import hl7``) and as FHIR R4 Bundles
(``morrow import fhir``), give the same stays, census snapshots, scores and forecasts.

The reference is the CSV import of the data contract (DATA_CONTRACT.md), the path every
other test of the importer checks. The slice is one unit, KV-CRIT, stays admitted in the
three and a half weeks before the demo's anchor (2026-11-30 08:00), so it runs in seconds;
units and bookings come from their CSV files in every database (an ADT or ORU stream
carries neither).
"""

from __future__ import annotations

import csv
import io
import os
import shutil
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from sqlalchemy import func, select

from app.cli.main import main
from app.config import get_settings
from app.feeds.events import stay_id_for
from app.feeds.pseudonym import Pseudonymiser, load_secret
from app.forecast.service import forecast, train_model
from app.ingest import import_file
from app.store import db
from app.store.models import CensusRow, CensusSnapshot, Observation, Stay, TrainedModel
from tests.conftest import DEMO_DIR, UTC_ZONE

UNIT = "KV-CRIT"
FROM, ANCHOR = "2026-11-06T00:00", "2026-11-30T08:00"
STAY_FIELDS = ("unit", "admitted_at", "discharged_at", "discharge_source", "admission_type",
               "outcome", "age", "sex", "specialty", "source", "booking_id", "from_unit",
               "to_unit")
ROW_FIELDS = ("stay_id", "admitted_at", "admission_type", "age", "sex", "specialty", "source",
              "booking_id")


def _rows(name: str) -> list[dict[str, str]]:
    return list(csv.DictReader(io.StringIO((DEMO_DIR / name).read_text("utf-8"))))


def _csv(rows: list[dict[str, str]]) -> bytes:
    out = io.StringIO()
    writer = csv.DictWriter(out, fieldnames=list(rows[0]), lineterminator="\n")
    writer.writeheader()
    writer.writerows(rows)
    return out.getvalue().encode("utf-8")


def slice_files() -> dict[str, bytes]:
    stays = [r for r in _rows("stays.csv") if r["unit"] == UNIT and r["admitted_at"] >= FROM]
    ids = {r["stay_id"] for r in stays}
    return {
        "units": _csv([r for r in _rows("units.csv") if r["unit"] == UNIT]),
        "stays": _csv(stays),
        # Census rows of the slice's stays only: the others are not in the slice.
        "census": _csv([r for r in _rows("census.csv") if r["stay_id"] in ids]),
        "observations": _csv([r for r in _rows("observations.csv") if r["stay_id"] in ids]),
        "bookings": _csv([r for r in _rows("bookings.csv") if r["unit"] == UNIT]),
    }


def load_csv(url: str, files: dict[str, bytes], kinds: tuple[str, ...]) -> None:
    with db.session_scope(url) as session:
        for kind in kinds:
            import_file(session, kind, files[kind], f"{kind}.csv", tz=UTC_ZONE, actor="test")


def stays_of(url: str, rename: dict[str, str]) -> dict[str, tuple[Any, ...]]:
    with db.session_scope(url) as session:
        return {rename.get(s.stay_id, s.stay_id): tuple(getattr(s, f) for f in STAY_FIELDS)
                for s in session.scalars(select(Stay))}


def observations_of(url: str, rename: dict[str, str]) -> list[tuple[Any, ...]]:
    with db.session_scope(url) as session:
        return sorted((rename.get(o.stay_id, o.stay_id), o.observed_at, o.name, o.value,
                       o.recorded_at, o.revision, o.withdrawn)
                      for o in session.scalars(select(Observation)))


def snapshots_of(url: str, rename: dict[str, str]) -> dict[datetime, list[tuple[Any, ...]]]:
    out: dict[datetime, list[tuple[Any, ...]]] = {}
    with db.session_scope(url) as session:
        for snap in session.scalars(select(CensusSnapshot).where(CensusSnapshot.unit == UNIT)):
            rows = session.scalars(select(CensusRow).where(CensusRow.snapshot_id == snap.id))
            out[snap.taken_at] = sorted(
                (rename.get(r.stay_id, r.stay_id), *(getattr(r, f) for f in ROW_FIELDS[1:]))
                for r in rows)
    return out


def three_databases(tmp_path: Path, template: Path, monkeypatch: pytest.MonkeyPatch,
                    digit: str) -> dict[str, str]:
    """A fixed feed secret (``digit`` x 64), the site on UTC, and three migrated SQLite
    databases, one for each way in (csv, hl7, fhir)."""
    secret = tmp_path / "feed_secret"
    secret.write_text(digit * 64 + "\n")
    os.chmod(secret, 0o600)
    monkeypatch.setenv("MORROW_FEED_SECRET_FILE", str(secret))
    monkeypatch.setenv("MORROW_TIMEZONE", "UTC")
    monkeypatch.delenv("MORROW_FEED_MAPPING", raising=False)
    get_settings.cache_clear()
    urls = {}
    for way in ("csv", "hl7", "fhir"):
        shutil.copy(template, tmp_path / f"{way}.db")
        urls[way] = f"sqlite:///{tmp_path / way}.db"
    return urls


def export_replays(urls: dict[str, str], files: dict[str, bytes], tmp_path: Path) -> None:
    """The CSV database exported as an HL7 stream (``replay/``) and FHIR Bundles
    (``bundles/``), each with its mapping; the units and bookings (which feeds do not carry)
    loaded into the HL7 and FHIR databases from the CSV files."""
    assert main(["--db", urls["csv"], "feeds", "export-hl7",
                 "--out", str(tmp_path / "replay" / "stream.hl7")]) == 0
    assert main(["--db", urls["csv"], "feeds", "export-fhir",
                 "--out", str(tmp_path / "bundles")]) == 0
    for way in ("hl7", "fhir"):
        load_csv(urls[way], files, ("units", "bookings"))


@pytest.fixture
def three_ways(tmp_path: Path, migrated_template: Path, monkeypatch: pytest.MonkeyPatch
               ) -> dict[str, Any]:
    urls = three_databases(tmp_path, migrated_template, monkeypatch, "5")
    files = slice_files()
    load_csv(urls["csv"], files, ("units", "stays", "census", "observations", "bookings"))
    with db.session_scope(urls["csv"]) as session:
        stay_ids = {s.stay_id: s.admitted_at for s in session.scalars(select(Stay))}
    export_replays(urls, files, tmp_path)
    assert main(["--db", urls["hl7"], "import", "hl7", str(tmp_path / "replay" / "stream.hl7"),
                 "--mapping", str(tmp_path / "replay" / "feeds.toml")]) == 0
    # The HL7 import takes each census as its messages pass the instant; only the instants
    # after the last message (a quiet unit) are left to the cron command.
    with db.session_scope(urls["hl7"]) as session:
        taken_by_import = session.scalar(select(func.count()).select_from(CensusSnapshot))
    assert main(["--db", urls["hl7"], "feeds", "census", "--until", ANCHOR]) == 0
    with db.session_scope(urls["hl7"]) as session:
        taken_in_all = session.scalar(select(func.count()).select_from(CensusSnapshot))
    assert taken_in_all - taken_by_import <= 2 < taken_by_import
    assert main(["--db", urls["fhir"], "import", "fhir", str(tmp_path / "bundles"),
                 "--mapping", str(tmp_path / "bundles" / "feeds.toml")]) == 0
    keys = Pseudonymiser(load_secret(tmp_path / "feed_secret"))
    rename = {stay_id_for(keys.visit(sid), at): sid for sid, at in stay_ids.items()}
    yield {"urls": urls, "rename": rename}
    get_settings.cache_clear()
    for url in urls.values():
        db.release_engine(url)


def test_csv_hl7_and_fhir_give_the_same_stays_census_scores_and_forecasts(
        three_ways: dict[str, Any]) -> None:
    urls, rename = three_ways["urls"], three_ways["rename"]
    csv_stays = stays_of(urls["csv"], {})
    csv_scores = observations_of(urls["csv"], {})
    csv_census = snapshots_of(urls["csv"], {})
    anchor = datetime.fromisoformat(ANCHOR).replace(tzinfo=UTC)
    # census.csv also holds a snapshot at the anchor itself (08:00, not KV-CRIT's census time
    # 00:00): an export's extra, which a feed's census at census times does not make.
    census_times = {t: rows for t, rows in csv_census.items() if t != anchor}
    assert len(csv_stays) > 30 and len(csv_scores) > 100 and len(census_times) >= 13
    # Step-downs leave KV-CRIT by transfer (to_unit set). HL7 ADT^A02 carries the stay's
    # outcome in PV1-36; a FHIR R4 Encounter.location has no disposition per move, so the
    # FHIR path gives such a stay the feeds' outcome for a move, ``transfer``
    # (app/feeds/events.py; the R4 Encounter element list, from memory).
    outcome = STAY_FIELDS.index("outcome")
    moved = {sid: (*row[:outcome], "transfer", *row[outcome + 1:])
             for sid, row in csv_stays.items() if row[STAY_FIELDS.index("to_unit")]}
    assert len(moved) >= 10
    expected = {"hl7": csv_stays, "fhir": {**csv_stays, **moved}}
    for way in ("hl7", "fhir"):
        assert stays_of(urls[way], rename) == expected[way], way
        assert observations_of(urls[way], rename) == csv_scores, way
        feed_census = snapshots_of(urls[way], rename)
        for taken_at, rows in census_times.items():
            assert feed_census.get(taken_at) == rows, (way, taken_at)
        with db.session_scope(urls[way]) as session:  # a feed gives no bed label
            assert session.scalar(select(CensusRow.bed).where(CensusRow.bed.is_not(None))
                                  .limit(1)) is None
    # One model, trained from the CSV database, forecasts from each database's state.
    with db.session_scope(urls["csv"]) as session:
        model_id, _ = train_model(session, UNIT, anchor - timedelta(days=2), UTC_ZONE)
        row = session.get(TrainedModel, model_id)
        assert row is not None
        stored = {c.name: getattr(row, c.name) for c in TrainedModel.__table__.columns}
    for way in ("hl7", "fhir"):
        with db.session_scope(urls[way]) as session:
            session.add(TrainedModel(**stored))
    for days_back in (2, 1, 0):
        as_of = anchor - timedelta(days=days_back)
        answers = {}
        for way, url in urls.items():
            with db.session_scope(url) as session:
                answers[way] = forecast(session, UNIT, as_of, UTC_ZONE, days=7)
        for way in ("hl7", "fhir"):
            assert len(answers[way]["stays"]) == len(answers["csv"]["stays"]) > 0
            for ours, theirs in zip(answers["csv"]["days"], answers[way]["days"], strict=True):
                assert ours["census_at"] == theirs["census_at"]
                np.testing.assert_allclose(theirs["pmf"], ours["pmf"], rtol=0, atol=1e-12)
