"""A small invented hospital of two units that pass patients on (fictional codes and ids).

``TW-CRIT`` admits emergencies; each stay ends with a step-down to ``TW-WARD`` (the same
patient starts a ward stay at that instant, ``from_unit`` TW-CRIT), a move to a ward Morrow
does not forecast (``TW-MEDW``), home, or death. Older patients step down to the ward more
often, so the routing differs between admission groups. ``TW-WARD`` also admits emergencies
of its own. Both units score SOFA at admission and once a day, so training has every
feature it expects. Site zone UTC.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np

from app.forecast.service import train_model
from app.ingest import import_file
from app.store import db
from tests.conftest import UTC_ZONE
from tests.reliability.small_unit import csv_bytes, stamp

CRIT, WARD, OUTSIDE = "TW-CRIT", "TW-WARD", "TW-MEDW"
NOW = datetime(2026, 11, 2, 8, 0, tzinfo=UTC)  # a Monday morning
WEEKS = 20
STAY_HEADER = ["stay_id", "unit", "admitted_at", "discharged_at", "admission_type", "outcome",
               "age", "sex", "source", "patient", "from_unit", "to_unit"]


def hospital_rows(seed: int = 7, until: datetime = NOW
                  ) -> tuple[list[list[object]], list[list[object]]]:
    """Stay rows of both units and their SOFA rows, as known at ``until``."""
    rng = np.random.default_rng(seed)
    start = until - timedelta(weeks=WEEKS)
    stays: list[list[object]] = []
    scores: list[list[object]] = []

    def add(unit: str, admitted: datetime, hours: float, kind: str, outcome: str, age: int,
            patient: str, source: str, from_unit: str, to_unit: str) -> datetime:
        number = len(stays) + 1
        discharged = admitted + timedelta(hours=hours)
        open_stay = discharged > until
        stays.append([f"TW-S{number:05d}", unit, stamp(admitted),
                      "" if open_stay else stamp(discharged), kind,
                      "" if open_stay else outcome, age, "f" if rng.random() < 0.5 else "m",
                      source, patient, from_unit, "" if open_stay else to_unit])
        sofa = int(rng.integers(0, 12))
        moment = admitted
        while moment < min(discharged, until):
            scores.append([f"TW-S{number:05d}", stamp(moment), "sofa", sofa])
            sofa = int(np.clip(sofa + rng.integers(-2, 2), 0, 24))
            moment += timedelta(days=1)
        return discharged

    for day in range(WEEKS * 7):
        midnight = start + timedelta(days=day)
        for _ in range(int(rng.poisson(1.6))):
            patient = f"P{len(stays) + 1:06d}"
            admitted = midnight + timedelta(minutes=int(rng.integers(0, 24 * 60)))
            if admitted > until:
                continue
            age = int(rng.integers(20, 95))
            p_ward = 0.75 if age >= 60 else 0.35
            where = rng.choice(["ward", "medw", "home", "died"],
                               p=[p_ward, 0.1, 0.85 - p_ward, 0.05])
            outcome, to_unit = {"ward": ("ward", WARD), "medw": ("ward", OUTSIDE),
                                "home": ("home", ""), "died": ("died", "")}[str(where)]
            left = add(CRIT, admitted, float(rng.lognormal(np.log(70), 0.6)), "emergency",
                       outcome, age, patient, "emergency-dept", "", to_unit)
            if to_unit == WARD and left <= until:
                add(WARD, left, float(rng.lognormal(np.log(80), 0.6)), "emergency", "home",
                    age, patient, "critical-care", CRIT, "")
        for _ in range(int(rng.poisson(1.2))):
            admitted = midnight + timedelta(minutes=int(rng.integers(0, 24 * 60)))
            if admitted > until:
                continue
            add(WARD, admitted, float(rng.lognormal(np.log(60), 0.6)), "emergency", "home",
                int(rng.integers(18, 95)), f"P{len(stays) + 1:06d}", "emergency-dept", "", "")
    return stays, scores


def hospital_files(seed: int = 7, until: datetime = NOW) -> dict[str, bytes]:
    stays, scores = hospital_rows(seed, until)
    return {
        "units": csv_bytes(["unit", "beds", "census_time"], [[CRIT, 8, "00:00"],
                                                           [WARD, 16, "00:00"]]),
        "stays": csv_bytes(STAY_HEADER, stays),
        "observations": csv_bytes(["stay_id", "observed_at", "name", "value"], scores),
    }


def load_hospital(url: str, *, train: bool = True, until: datetime = NOW) -> None:
    """Import both units into ``url`` and, with ``train``, fit both models at ``until``."""
    with db.session_scope(url) as session:
        for kind, data in hospital_files().items():
            import_file(session, kind, data, f"{kind}.csv", tz=UTC_ZONE, actor="test-fixture")
    if train:
        for unit in (CRIT, WARD):
            with db.session_scope(url) as session:
                train_model(session, unit, until, UTC_ZONE)
