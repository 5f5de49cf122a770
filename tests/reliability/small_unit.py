"""A small invented unit (fictional code and ids, seeded) with a trained model, built in seconds.

Stays arrive over 20 weeks ending at ``NOW`` (emergency and booked elective admissions), each
with a SOFA score at admission and one a day, so that training has every feature it expects.
"""

from __future__ import annotations

import csv
import io
from datetime import UTC, datetime, timedelta

import numpy as np

from app.forecast.service import train_model
from app.ingest import import_file
from app.store import db
from tests.conftest import UTC_ZONE

UNIT = "TB-NORTH"
BEDS = 8
NOW = datetime(2026, 11, 2, 8, 0, tzinfo=UTC)  # a Monday morning
WEEKS = 20


def csv_bytes(header: list[str], rows: list[list[object]]) -> bytes:
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(header)
    writer.writerows(rows)
    return out.getvalue().encode("utf-8")


def stamp(moment: datetime) -> str:
    return moment.replace(tzinfo=None).isoformat(timespec="minutes")


def unit_with_patients(url: str, unit: str, beds: int, stay_ids: list[str],
                       admitted: datetime) -> None:
    """``unit`` with ``beds`` staffed beds and the given emergency stays, all admitted at
    ``admitted`` and still in (the writers and readers of the reliability tests need no more)."""
    stays = "".join(f"{sid},{unit},{admitted.isoformat()},emergency\n" for sid in stay_ids)
    with db.session_scope(url) as session:
        import_file(session, "units", f"unit,beds\n{unit},{beds}\n".encode(), "units.csv",
                    tz=UTC_ZONE)
        import_file(session, "stays", f"stay_id,unit,admitted_at,admission_type\n{stays}"
                    .encode(), "stays.csv", tz=UTC_ZONE)


def unit_files(seed: int = 13) -> dict[str, bytes]:
    """The unit's five CSV files (site zone UTC)."""
    rng = np.random.default_rng(seed)
    start = NOW - timedelta(weeks=WEEKS)
    stays: list[list[object]] = []
    scores: list[list[object]] = []
    bookings: list[list[object]] = []
    day = 0
    while start + timedelta(days=day) < NOW:
        midnight = start + timedelta(days=day)
        emergencies = int(rng.poisson(1.1))
        electives = int(rng.poisson(0.6)) if midnight.weekday() < 5 else 0
        for kind, count in (("emergency", emergencies), ("elective", electives)):
            for _ in range(count):
                number = len(stays) + 1
                admitted = midnight + timedelta(minutes=int(rng.integers(0, 24 * 60)))
                stay_hours = float(rng.lognormal(np.log(60 if kind == "emergency" else 40), 0.7))
                discharged = admitted + timedelta(hours=stay_hours)
                booking = ""
                if kind == "elective":
                    booking = f"TB-B{number:04d}"
                    booked = admitted - timedelta(days=int(rng.integers(3, 30)))
                    bookings.append([booking, UNIT, stamp(booked), admitted.date().isoformat(),
                                     int(rng.integers(30, 85)), "general-surgery", ""])
                open_stay = discharged > NOW
                stays.append([f"TB-S{number:04d}", UNIT, stamp(admitted),
                              "" if open_stay else stamp(discharged), kind,
                              "" if open_stay else "home", int(rng.integers(18, 95)),
                              "f" if rng.random() < 0.5 else "m", booking])
                sofa = int(rng.integers(0, 12))
                moment = admitted
                while moment < min(discharged, NOW):
                    scores.append([f"TB-S{number:04d}", stamp(moment), "sofa", sofa])
                    sofa = int(np.clip(sofa + rng.integers(-2, 2), 0, 24))
                    moment += timedelta(days=1)
        day += 1
    return {
        "units": csv_bytes(["unit", "beds", "census_time"], [[UNIT, BEDS, "08:00"]]),
        "stays": csv_bytes(["stay_id", "unit", "admitted_at", "discharged_at", "admission_type",
                       "outcome", "age", "sex", "booking_id"], stays),
        "observations": csv_bytes(["stay_id", "observed_at", "name", "value"], scores),
        "bookings": csv_bytes(["booking_id", "unit", "booked_at", "planned_date", "age",
                          "specialty", "procedure"], bookings),
    }


def load_unit(url: str, *, train: bool = True) -> None:
    """Import the unit into ``url`` and, with ``train``, fit its model at ``NOW``."""
    with db.session_scope(url) as session:
        for kind, data in unit_files().items():
            import_file(session, kind, data, f"{kind}.csv", tz=UTC_ZONE, actor="test-fixture")
    if train:
        with db.session_scope(url) as session:
            train_model(session, UNIT, NOW, UTC_ZONE)
