"""Generate the demo hospital's CSVs (an invented scenario, no real patient data).

Kestrel Vale General Hospital is fictional. It has two units:

``KV-CRIT``, a critical care unit
    14 staffed beds until 2025-05-11, 16 from 2025-05-12 (two rows in
    ``units.csv`` with ``valid_from``); daily census at ``00:00``; daily severity
    score ``sofa`` (0..24) and a ``fit_for_discharge`` flag. Mostly emergency
    admissions (about 2.35 a day before capping) plus booked post-operative
    admissions after afternoon theatre (cardiac surgery, vascular, major general
    surgery, neurosurgery).
``KV-SURG``, a surgical ward
    28 staffed beds (one row, no ``valid_from``); daily census at ``23:00`` so the
    census is not at midnight; daily score ``news2`` (0..20) and a
    ``fit_for_discharge`` flag. Mostly booked elective admissions in the morning
    (orthopaedics, general surgery, vascular), step-downs from ``KV-CRIT`` and a
    few direct surgical emergencies (about 0.55 a day before capping; 2.4 before the
    step-downs came in, lowered so the ward's load stayed about the same).

The history runs from ``START`` (2024-10-01) to the anchor instant ``END``
(2026-11-30 08:00, a Monday morning). Stays still in a unit at ``END`` have a blank
``discharged_at`` and ``outcome``; that is the current census. The simulation
starts ``WARM_UP`` days before ``START`` so the units are not empty on the first
day; stays discharged before ``START`` are left out (a left-truncated extract,
as a real one would be), except the critical-care stay a kept ward stay continues.

Both units are simulated together in one event loop (``app.demo.hospital``): the
step-downs tie them.

Mechanisms
----------
Emergency arrivals
    Per unit and day, a Poisson count whose rate is the unit's base rate times a
    weekday factor (highest on Monday and Tuesday, lowest at weekends), times a
    winter factor (up to +15 % in late January, none in late July), times a gamma
    variable with mean 1 (shape 12), so daily counts are mildly overdispersed.
    Arrival clock times follow an hourly profile with most arrivals in the
    afternoon and evening.
Bed pressure
    A unit admits while it holds fewer than staffed beds + 1 patients (one
    escalation bed, labelled ``CX1`` / ``WX1``). An emergency arriving to a full
    unit is placed elsewhere and leaves no trace in the files. For a booked
    patient arriving to a full unit, the patient due to leave soonest that day
    is moved out early (5-45 minutes before the arrival); when nobody is due to
    leave that day the booking is cancelled that morning. Capping flattens the
    admitted counts: the weekday and winter patterns of arrivals show less in
    admissions than in the arrival rates.
Bookings
    Operating lists run Monday to Friday, closed 24 December to 1 January. Each
    booking is made 1 to 28 days ahead during office hours, with a specialty,
    procedure, age, sex and source. About 10 % are cancelled at random, a third
    of those on the planned day itself; bed-pressure cancellations come on top.
    A booking that goes ahead becomes an elective stay with its ``booking_id``,
    admitted on the planned date (critical care 13:00-18:00 after theatre, the
    ward 07:00-10:30 before theatre). Bookings for the ``BOOKING_HORIZON_DAYS``
    after ``END`` are included when already made by ``END``, and cancellations
    already known by ``END`` are shown.
Length of stay
    Each stay is simulated hour by hour from admission with two competing
    hazards. The discharge hazard is a unit baseline times the case-mix factor of
    the specialty (and procedure), a lower factor for emergencies, a factor
    falling with age, ``exp(-b * score)`` for the current severity score, a
    clock-time profile (discharges mostly 10:00-19:00), one half at weekends, and
    a ramp over the first hours after admission. A small share of patients has
    a much lower discharge hazard, which gives a long right tail. The death
    hazard rises steeply with the score and age and does not depend on the clock.
Severity scores
    One score at admission (30-120 minutes after arrival) and one every morning
    between 06:00 and 08:00. Between mornings the score is a rounded random walk
    pulled towards recovery at a patient-specific rate (a few patients drift
    upwards instead). The hazards use the true score. About 1.5 % of score rows
    were first entered wrongly and are corrected later by a second row with the
    same ``stay_id``, ``observed_at`` and ``name``, a later ``recorded_at`` and the
    true value (the contract's append-only correction). Entry usually follows the
    observation within 40 minutes, sometimes hours later.
Step-down and exit block
    A critical-care patient who survives is clinically ready to leave at the end
    of the clinical course (the hazards below). The patient then steps down to
    ``KV-SURG`` with a chance by specialty (surgical ones mostly, medicine a
    quarter; about 56 % of live discharges in all), else leaves by the unit's
    other outcomes: ``ward`` meaning ``KV-MEDW`` (a medical ward Morrow does not
    forecast), another hospital, or home, after a fixed invented delay (0.5-6 hours,
    a fifth 12-30 hours; moved into 08:00-22:00). A step-down is handed over 15-60
    minutes after readiness and moves at once if the ward has a free staffed bed,
    otherwise it keeps its critical-care bed (so critical care turns more
    emergencies away) until a ward bed frees; transfers happen only between 08:00
    and 22:00 (ward policy), the longest-waiting first, and never into the ward's
    escalation bed. The ward stay starts at the transfer instant: same ``patient``,
    age and sex, ``from_unit`` ``KV-CRIT``, ``admission_type`` ``emergency``,
    ``source`` ``critical-care``, and a length of stay of its own (the ward's
    emergency hazard for the specialty, trauma counted as orthopaedics, times 0.85:
    a little longer). The critical-care stay ends then, outcome ``ward``,
    ``to_unit`` ``KV-SURG``. While waiting the patient's morning score stays near
    its last value.
Patients
    Every stay has a fictional ``patient`` id ``P`` and six digits, numbered as
    people first arrive; the two stays of a step-down share it, a readmission
    gets a new one.
Fit for discharge (critical care)
    A ``1`` at the instant the patient is clinically ready (every live discharge),
    and on some earlier mornings a ``0``.
Fit for discharge (ward)
    Most ward patients who go home are flagged ``fit_for_discharge = 1`` during a
    daytime round shortly (hours to a day) before leaving, some several days
    before (delayed discharges); on some earlier mornings a ``0`` is recorded.
Census snapshots
    One row per occupied bed at each of the last ``CENSUS_DAYS`` census instants
    before ``END`` and at ``END`` itself. A stay keeps its bed. Snapshot rows carry
    exactly the stay's ``admitted_at`` and covariates from ``stays.csv``.
Outcomes and covariates
    Critical care discharges go mostly to a ward, some patients die; the ward
    sends most patients home. Sex ``f``/``m`` with a rare ``x``; age 18-95.

Time
----
All timestamps are naive local wall-clock times written as
``YYYY-MM-DDTHH:MM:SS`` in whole minutes; the contract reads them in
``MORROW_TIMEZONE``. No timestamp falls in 01:00-03:00 on a day when clocks spring
forward under the European, North American, Australian (NSW) or New Zealand rules,
so the files hold no non-existent local time in those zones.

Determinism
-----------
Everything is drawn from one ``numpy.random.default_rng(seed)`` in a fixed order,
so the same seed, ``start`` and ``end`` give byte-identical files. Regenerate the
committed files with ``make demo-data``, i.e.
``python -m app.demo.generate --out demo_data``.
"""

from __future__ import annotations

import argparse
import csv
import time as clock
from datetime import datetime, time, timedelta
from pathlib import Path

import numpy as np

from app.demo.hospital import simulate_hospital
from app.demo.scenario import UNITS, Booking, Stay, UnitSpec
from app.demo.simulate import _Clock, _Ids, _minutes

SEED = 20261130
START = datetime(2024, 10, 1)
END = datetime(2026, 11, 30, 8, 0)
HOSPITAL = "Kestrel Vale General Hospital"
WARM_UP = timedelta(days=90)
CENSUS_DAYS = 56
STAY_COLUMNS = [
    "stay_id", "unit", "admitted_at", "discharged_at", "admission_type", "outcome",
    "age", "sex", "specialty", "source", "booking_id", "patient", "from_unit", "to_unit",
]
CENSUS_COLUMNS = [
    "taken_at", "unit", "bed", "stay_id", "admitted_at", "admission_type",
    "age", "sex", "specialty", "source", "booking_id",
]
OBSERVATION_COLUMNS = ["stay_id", "observed_at", "name", "value", "recorded_at"]
BOOKING_COLUMNS = [
    "booking_id", "unit", "booked_at", "planned_date", "age", "sex", "specialty",
    "source", "procedure", "cancelled_at",
]
UNIT_COLUMNS = ["unit", "beds", "valid_from", "census_time"]
_CORRECTION_SHARE = 0.015


def _ts(t: datetime | None) -> str:
    return "" if t is None else t.strftime("%Y-%m-%dT%H:%M:%S")


def _write(path: Path, columns: list[str], rows: list[dict[str, object]]) -> int:
    with path.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.DictWriter(handle, fieldnames=columns, lineterminator="\n")
        writer.writeheader()
        writer.writerows(rows)
    return len(rows)


def _census_instants(unit: UnitSpec, start: datetime, end: datetime) -> list[datetime]:
    instants: list[datetime] = []
    day = end.date()
    while len(instants) < CENSUS_DAYS:
        t = datetime.combine(day, unit.census_time)
        if t < start:
            break
        if t < end:
            instants.append(t)
        day -= timedelta(days=1)
    return sorted(instants) + [end]


def generate(
    out_dir: Path, seed: int = SEED, end: datetime = END, start: datetime = START
) -> dict[str, int]:
    """Write the demo CSVs into ``out_dir`` and return the row count of each file.

    Parameters
    ----------
    out_dir
        Directory to write ``units.csv``, ``stays.csv``, ``census.csv``,
        ``observations.csv`` and ``bookings.csv`` into (created if missing).
    seed
        Seed of the single ``numpy.random.default_rng`` every draw comes from.
    end
        Anchor instant (naive local wall-clock time): nothing after it is known.
    start
        First day of the history; a shorter history makes a quick test run.
    """
    if end.tzinfo is not None or start.tzinfo is not None:
        raise ValueError("start and end must be naive local wall-clock times")
    if start >= end:
        raise ValueError("start must be before end")
    end = end.replace(second=0, microsecond=0)
    out_dir.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    ids = _Ids(rng)
    sim_start = datetime.combine((start - WARM_UP).date(), time(0, 0))
    wall = _Clock(sim_start.year - 1, end.year + 1)

    every_stay, every_booking = simulate_hospital(rng, sim_start, end, ids, wall)
    # Left truncation: stays over before ``start`` are left out, except the earlier stays
    # of a patient's spell that reaches into the history (a step-down's critical care).
    kept_ids = {s.stay_id for s in every_stay if s.discharged_at > start}
    for s in every_stay:
        if s.stay_id in kept_ids:
            previous = s.previous
            while previous is not None:
                kept_ids.add(previous.stay_id)
                previous = previous.previous
    stays: list[Stay] = [s for s in every_stay if s.stay_id in kept_ids]
    kept = {s.booking_id for s in stays if s.booking_id}
    bookings: list[Booking] = [
        b for b in every_booking if b.planned_date >= start.date() or b.booking_id in kept
    ]

    def known(t: datetime) -> datetime | None:
        return t if t <= end else None

    stays.sort(key=lambda s: (s.admitted_at, s.unit, s.stay_id))
    stay_rows: list[dict[str, object]] = []
    observation_rows: list[dict[str, object]] = []
    for s in stays:
        gone = s.discharged_at <= end
        stay_rows.append({
            "stay_id": s.stay_id, "unit": s.unit, "admitted_at": _ts(s.admitted_at),
            "discharged_at": _ts(s.discharged_at) if gone else "",
            "admission_type": s.admission_type, "outcome": s.outcome if gone else "",
            "age": s.age, "sex": s.sex, "specialty": s.specialty, "source": s.source,
            "booking_id": s.booking_id, "patient": s.patient, "from_unit": s.from_unit,
            "to_unit": s.to_unit if gone else "",
        })
        unit = next(u for u in UNITS if u.code == s.unit)
        entries = [(t, unit.score, v, True) for t, v in s.scores]
        entries += [(t, "fit_for_discharge", v, False) for t, v in s.fit_flags]
        for observed_at, name, value, correctable in entries:
            late = rng.random() < 0.04
            delay = rng.integers(60, 481) if late else rng.integers(0, 41)
            recorded_at = wall.wall(observed_at + _minutes(delay))
            if observed_at > end or recorded_at > end:
                continue
            if correctable and rng.random() < _CORRECTION_SHARE:
                wrong = value + (-3, -2, -1, 1, 2, 3)[int(rng.integers(0, 6))]
                if wrong < 0 or wrong > unit.score_max:
                    wrong = value - int(np.sign(wrong - value))
                    wrong = int(np.clip(wrong, 0, unit.score_max))
                corrected_at = wall.wall(recorded_at + _minutes(rng.integers(30, 24 * 60)))
                observation_rows.append({
                    "stay_id": s.stay_id, "observed_at": _ts(observed_at), "name": name,
                    "value": wrong, "recorded_at": _ts(recorded_at),
                })
                if wrong != value and corrected_at <= end:
                    observation_rows.append({
                        "stay_id": s.stay_id, "observed_at": _ts(observed_at), "name": name,
                        "value": value, "recorded_at": _ts(corrected_at),
                    })
                continue
            observation_rows.append({
                "stay_id": s.stay_id, "observed_at": _ts(observed_at), "name": name,
                "value": value, "recorded_at": _ts(recorded_at),
            })
    observation_rows.sort(
        key=lambda r: (r["observed_at"], r["stay_id"], r["name"], r["recorded_at"])
    )

    census_rows: list[dict[str, object]] = []
    for unit in UNITS:
        unit_stays = [s for s in stays if s.unit == unit.code]
        for taken_at in _census_instants(unit, start, end):
            present = [s for s in unit_stays if s.admitted_at <= taken_at < s.discharged_at]
            for s in sorted(present, key=lambda s: s.bed):
                census_rows.append({
                    "taken_at": _ts(taken_at), "unit": unit.code, "bed": s.bed,
                    "stay_id": s.stay_id, "admitted_at": _ts(s.admitted_at),
                    "admission_type": s.admission_type, "age": s.age, "sex": s.sex,
                    "specialty": s.specialty, "source": s.source, "booking_id": s.booking_id,
                })

    bookings.sort(key=lambda b: (b.booked_at, b.booking_id))
    booking_rows: list[dict[str, object]] = [
        {
            "booking_id": b.booking_id, "unit": b.unit, "booked_at": _ts(b.booked_at),
            "planned_date": b.planned_date.isoformat(), "age": b.age, "sex": b.sex,
            "specialty": b.specialty, "source": b.source, "procedure": b.procedure,
            "cancelled_at": _ts(known(b.cancelled_at)) if b.cancelled_at else "",
        }
        for b in bookings
    ]

    unit_rows: list[dict[str, object]] = [
        {
            "unit": u.code, "beds": beds,
            "valid_from": valid_from.isoformat() if valid_from else "",
            "census_time": u.census_time.strftime("%H:%M"),
        }
        for u in UNITS
        for valid_from, beds in u.beds
    ]

    return {
        "units.csv": _write(out_dir / "units.csv", UNIT_COLUMNS, unit_rows),
        "stays.csv": _write(out_dir / "stays.csv", STAY_COLUMNS, stay_rows),
        "census.csv": _write(out_dir / "census.csv", CENSUS_COLUMNS, census_rows),
        "observations.csv": _write(
            out_dir / "observations.csv", OBSERVATION_COLUMNS, observation_rows
        ),
        "bookings.csv": _write(out_dir / "bookings.csv", BOOKING_COLUMNS, booking_rows),
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        prog="python -m app.demo.generate",
        description=f"Write the invented demo hospital's CSVs ({HOSPITAL}).",
    )
    parser.add_argument("--out", type=Path, required=True, help="output directory")
    parser.add_argument("--seed", type=int, default=SEED, help=f"random seed (default {SEED})")
    parser.add_argument(
        "--end", type=datetime.fromisoformat, default=END,
        help=f"anchor instant, naive local time (default {END.isoformat()})",
    )
    args = parser.parse_args(argv)
    if args.end.tzinfo is not None:
        parser.error("--end must be a local time without offset")
    began = clock.perf_counter()
    counts = generate(args.out, seed=args.seed, end=args.end)
    for name, rows in counts.items():
        print(f"{args.out / name}: {rows} rows")
    print(f"generated in {clock.perf_counter() - began:.1f} s")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
