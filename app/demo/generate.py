"""Generate the demo hospital's CSVs (an invented scenario, no real patient data).

Kestrel Vale General Hospital is fictional. It has two units:

``KV-CRIT``, a critical care unit
    14 staffed beds until 2025-05-11, 16 from 2025-05-12 (two rows in
    ``units.csv`` with ``valid_from``); daily census at ``00:00``; daily severity
    score ``sofa`` (0..24). Mostly emergency admissions (about 2.35 a day before
    capping) plus booked post-operative admissions after afternoon theatre
    (cardiac surgery, vascular, major general surgery, neurosurgery).
``KV-SURG``, a surgical ward
    28 staffed beds (one row, no ``valid_from``); daily census at ``23:00`` so the
    census is not at midnight; daily score ``news2`` (0..20) and a
    ``fit_for_discharge`` flag. Mostly booked elective admissions in the morning
    (orthopaedics, general surgery, vascular) plus surgical emergencies.

The history runs from ``START`` (2024-10-01) to the anchor instant ``END``
(2026-11-30 08:00, a Monday morning). Stays still in a unit at ``END`` have a blank
``discharged_at`` and ``outcome``; that is the current census. The simulation
starts ``WARM_UP`` days before ``START`` so the units are not empty on the first
day; stays discharged before ``START`` are left out (a left-truncated extract,
as a real one would be).

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
import heapq
import math
import time as clock
from dataclasses import dataclass, field
from datetime import date, datetime, time, timedelta
from pathlib import Path

import numpy as np

SEED = 20261130
START = datetime(2024, 10, 1)
END = datetime(2026, 11, 30, 8, 0)
HOSPITAL = "Kestrel Vale General Hospital"
WARM_UP = timedelta(days=90)
CENSUS_DAYS = 56
BOOKING_HORIZON_DAYS = 21
MAX_LEAD_DAYS = 28

STAY_COLUMNS = [
    "stay_id", "unit", "admitted_at", "discharged_at", "admission_type", "outcome",
    "age", "sex", "specialty", "source", "booking_id",
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

# Mon..Sun. Emergency admissions peak early in the week and dip at weekends.
_WEEKDAY_FACTOR = np.array([1.22, 1.12, 1.04, 1.02, 1.00, 0.82, 0.78])
_WEEKDAY_FACTOR = _WEEKDAY_FACTOR / _WEEKDAY_FACTOR.mean()
# Hour of day 0..23: emergencies arrive mostly in the afternoon and evening.
_ARRIVAL_CLOCK = np.array([
    0.60, 0.50, 0.45, 0.40, 0.35, 0.35, 0.40, 0.50, 0.70, 0.90, 1.00, 1.10,
    1.20, 1.30, 1.40, 1.50, 1.50, 1.50, 1.45, 1.40, 1.30, 1.10, 0.90, 0.75,
])
_ARRIVAL_CLOCK = _ARRIVAL_CLOCK / _ARRIVAL_CLOCK.sum()
# Hour of day 0..23: relative discharge hazard; discharges happen mostly 10:00-19:00.
_DISCHARGE_CLOCK = np.array([
    0.03, 0.03, 0.03, 0.03, 0.03, 0.03, 0.04, 0.08, 0.20, 0.45, 1.00, 1.10,
    1.15, 1.15, 1.15, 1.10, 1.05, 1.00, 0.90, 0.45, 0.20, 0.10, 0.05, 0.03,
])
_WEEKEND_DISCHARGE = 0.5
_ARRIVAL_GAMMA_SHAPE = 12.0
_WINTER_RISE = 0.15
_RANDOM_CANCEL = 0.10
_CORRECTION_SHARE = 0.015
_MAX_STAY_HOURS = 24 * 365
_CHUNK_DAYS = 7
_CHUNK_HOURS = 24 * _CHUNK_DAYS


@dataclass(frozen=True)
class Specialty:
    """One case-mix group of a unit's emergency or elective admissions."""

    name: str
    share: float
    sources: tuple[tuple[str, float], ...]
    age_mean: float
    age_sd: float
    score_mean: float
    hazard: float
    procedures: tuple[tuple[str, float, float], ...] = ()  # (procedure, share, hazard factor)


@dataclass(frozen=True)
class UnitSpec:
    """Everything that makes one invented unit behave the way it does."""

    code: str
    bed_prefix: str
    beds: tuple[tuple[date | None, int], ...]
    census_time: time
    score: str
    score_max: int
    emergency_per_day: float
    emergency_mix: tuple[Specialty, ...]
    bookings_per_list_day: float
    elective_mix: tuple[Specialty, ...]
    elective_window: tuple[time, time]
    female_share: float
    discharge_rate: float  # per hour, before all factors
    emergency_factor: float
    score_effect: float
    score_ref: float
    death_rate: float  # per hour at the reference score and age 60
    death_effect: float
    death_ref: float
    ramp_hours: float
    score_noise: float
    long_stay_share: float
    long_stay_factor: float
    alive_outcomes: tuple[tuple[str, float], ...]
    fit_flag: bool

    def beds_at(self, t: datetime) -> int:
        """Staffed beds at ``t``: a count applies from its day's census instant on."""
        count = self.beds[0][1]
        for valid_from, beds in self.beds:
            if valid_from is None or datetime.combine(valid_from, self.census_time) <= t:
                count = beds
        return count


CRITICAL_CARE = UnitSpec(
    code="KV-CRIT",
    bed_prefix="C",
    beds=((date(2024, 1, 1), 14), (date(2025, 5, 12), 16)),
    census_time=time(0, 0),
    score="sofa",
    score_max=24,
    emergency_per_day=2.35,
    emergency_mix=(
        Specialty("medicine", 0.42,
                  (("emergency-dept", 0.55), ("ward", 0.35), ("other-hospital", 0.10)),
                  63, 16, 7.0, 1.0),
        Specialty("general-surgery", 0.24,
                  (("theatre", 0.60), ("emergency-dept", 0.20), ("ward", 0.20)),
                  66, 14, 6.0, 1.0),
        Specialty("trauma", 0.12, (("emergency-dept", 0.80), ("other-hospital", 0.20)),
                  46, 20, 6.0, 0.9),
        Specialty("neurosurgery", 0.12,
                  (("theatre", 0.50), ("emergency-dept", 0.30), ("other-hospital", 0.20)),
                  55, 17, 7.0, 0.6),
        Specialty("cardiac-surgery", 0.10, (("ward", 0.60), ("theatre", 0.40)),
                  68, 11, 6.0, 1.0),
    ),
    bookings_per_list_day=1.75,
    elective_mix=(
        Specialty("cardiac-surgery", 0.55, (("theatre", 1.0),), 67, 10, 4.0, 2.6,
                  (("cabg", 0.50, 1.0), ("valve-replacement", 0.35, 0.9),
                   ("cabg-and-valve", 0.15, 0.7))),
        Specialty("vascular", 0.15, (("theatre", 1.0),), 72, 8, 4.0, 1.3,
                  (("aaa-repair", 0.75, 1.0), ("aorto-bifemoral-bypass", 0.25, 0.8))),
        Specialty("general-surgery", 0.18, (("theatre", 1.0),), 64, 11, 4.0, 1.0,
                  (("oesophagectomy", 0.40, 0.7), ("pancreatoduodenectomy", 0.35, 0.8),
                   ("colectomy", 0.25, 1.2))),
        Specialty("neurosurgery", 0.12, (("theatre", 1.0),), 54, 14, 3.0, 1.4,
                  (("craniotomy", 0.70, 1.0), ("spinal-fusion", 0.30, 1.3))),
    ),
    elective_window=(time(13, 0), time(18, 0)),
    female_share=0.40,
    discharge_rate=0.032,
    emergency_factor=0.75,
    score_effect=0.22,
    score_ref=4.0,
    death_rate=0.0014,
    death_effect=0.30,
    death_ref=8.0,
    ramp_hours=18.0,
    score_noise=1.1,
    long_stay_share=0.08,
    long_stay_factor=0.22,
    alive_outcomes=(("ward", 0.88), ("transfer", 0.07), ("home", 0.05)),
    fit_flag=False,
)

SURGICAL_WARD = UnitSpec(
    code="KV-SURG",
    bed_prefix="W",
    beds=((None, 28),),
    census_time=time(23, 0),
    score="news2",
    score_max=20,
    emergency_per_day=2.4,
    emergency_mix=(
        Specialty("general-surgery", 0.55,
                  (("emergency-dept", 0.80), ("ward", 0.15), ("other-hospital", 0.05)),
                  58, 19, 3.0, 1.0),
        Specialty("orthopaedics", 0.30, (("emergency-dept", 0.90), ("other-hospital", 0.10)),
                  76, 13, 2.0, 0.6),
        Specialty("vascular", 0.15, (("emergency-dept", 0.70), ("other-hospital", 0.30)),
                  70, 11, 3.0, 0.7),
    ),
    bookings_per_list_day=4.8,
    elective_mix=(
        Specialty("orthopaedics", 0.40, (("home", 1.0),), 69, 10, 1.0, 1.0,
                  (("hip-replacement", 0.50, 1.0), ("knee-replacement", 0.50, 1.0))),
        Specialty("general-surgery", 0.45, (("home", 1.0),), 57, 15, 1.0, 1.0,
                  (("hernia-repair", 0.30, 3.0), ("cholecystectomy", 0.35, 2.2),
                   ("colectomy", 0.35, 0.55))),
        Specialty("vascular", 0.15, (("home", 1.0),), 70, 9, 2.0, 0.7,
                  (("femoral-bypass", 0.60, 1.0), ("varicose-vein-surgery", 0.40, 2.5))),
    ),
    elective_window=(time(7, 0), time(10, 30)),
    female_share=0.50,
    discharge_rate=0.046,
    emergency_factor=0.75,
    score_effect=0.35,
    score_ref=1.0,
    death_rate=0.00008,
    death_effect=0.45,
    death_ref=3.0,
    ramp_hours=16.0,
    score_noise=0.8,
    long_stay_share=0.06,
    long_stay_factor=0.25,
    alive_outcomes=(("home", 0.93), ("transfer", 0.04), ("ward", 0.03)),
    fit_flag=True,
)

UNITS: tuple[UnitSpec, ...] = (CRITICAL_CARE, SURGICAL_WARD)


@dataclass
class Booking:
    booking_id: str
    unit: str
    booked_at: datetime
    planned_date: date
    admit_at: datetime  # planned admission instant on the planned date
    age: int
    sex: str
    specialty: str
    source: str
    procedure: str
    hazard: float  # case-mix factor of specialty and procedure
    score_mean: float
    cancelled_at: datetime | None = None


@dataclass
class Stay:
    stay_id: str
    unit: str
    bed: str
    admitted_at: datetime
    discharged_at: datetime  # may lie after END: still in the unit then
    admission_type: str
    outcome: str
    age: int
    sex: str
    specialty: str
    source: str
    booking_id: str
    scores: list[tuple[datetime, int]] = field(default_factory=list)
    fit_flags: list[tuple[datetime, int]] = field(default_factory=list)


def _spring_forward_days(first_year: int, last_year: int) -> set[date]:
    """Days on which clocks jump forward under common rules (gap within 01:00-03:00)."""

    def nth_sunday(year: int, month: int, n: int) -> date:
        d = date(year, month, 1)
        d += timedelta(days=(6 - d.weekday()) % 7)
        return d + timedelta(weeks=n - 1)

    def last_sunday(year: int, month: int) -> date:
        d = date(year + (month == 12), month % 12 + 1, 1) - timedelta(days=1)
        return d - timedelta(days=(d.weekday() - 6) % 7)

    days: set[date] = set()
    for year in range(first_year, last_year + 1):
        days.add(last_sunday(year, 3))  # European Union, United Kingdom
        days.add(nth_sunday(year, 3, 2))  # United States, Canada
        days.add(nth_sunday(year, 10, 1))  # Australia (NSW, Victoria)
        days.add(last_sunday(year, 9))  # New Zealand
    return days


class _Clock:
    """Keeps generated wall-clock times out of spring-forward gaps and whole-minute."""

    def __init__(self, first_year: int, last_year: int):
        self.gap_days = _spring_forward_days(first_year, last_year)

    def wall(self, t: datetime) -> datetime:
        t = t.replace(second=0, microsecond=0)
        if 1 <= t.hour < 3 and t.date() in self.gap_days:
            # Later, not earlier, so every "not before" ordering still holds.
            return t + timedelta(hours=2)
        return t


class _Ids:
    """Pseudonymous ids: a prefix and 7 hex digits from the seeded generator."""

    def __init__(self, rng: np.random.Generator):
        self.rng = rng
        self.used: set[str] = set()

    def new(self, prefix: str) -> str:
        while True:
            candidate = f"{prefix}-{int(self.rng.integers(0, 16**7)):07x}"
            if candidate not in self.used:
                self.used.add(candidate)
                return candidate


def _index(rng: np.random.Generator, weights: list[float]) -> int:
    """Index drawn with probability proportional to ``weights`` (one uniform draw)."""
    u = rng.random() * sum(weights)
    for i, w in enumerate(weights):
        u -= w
        if u < 0:
            return i
    return len(weights) - 1


def _choice(rng: np.random.Generator, options: tuple[tuple[str, float], ...]) -> str:
    return options[_index(rng, [w for _, w in options])][0]


def _pick_specialty(rng: np.random.Generator, mix: tuple[Specialty, ...]) -> Specialty:
    return mix[_index(rng, [s.share for s in mix])]


def _age(rng: np.random.Generator, spec: Specialty) -> int:
    return int(np.clip(round(rng.normal(spec.age_mean, spec.age_sd)), 18, 95))


def _sex(rng: np.random.Generator, unit: UnitSpec) -> str:
    u = rng.random()
    if u < 0.005:
        return "x"
    return "f" if u < 0.005 + unit.female_share * 0.995 else "m"


def _minutes(n: int | np.integer) -> timedelta:
    return timedelta(minutes=int(n))


def _winter_factor(day: date) -> float:
    # Peaks around 20 January, +_WINTER_RISE over the late-July trough.
    phase = 2 * math.pi * (day.timetuple().tm_yday - 20) / 365.25
    return 1.0 + _WINTER_RISE * 0.5 * (1.0 + math.cos(phase))


def _emergency_arrivals(
    rng: np.random.Generator, unit: UnitSpec, first: date, end: datetime, wall: _Clock
) -> list[datetime]:
    arrivals: list[datetime] = []
    day = first
    while day <= end.date():
        rate = (
            unit.emergency_per_day
            * _WEEKDAY_FACTOR[day.weekday()]
            * _winter_factor(day)
            * rng.gamma(_ARRIVAL_GAMMA_SHAPE, 1.0 / _ARRIVAL_GAMMA_SHAPE)
        )
        n = int(rng.poisson(rate))
        hours = rng.choice(24, size=n, p=_ARRIVAL_CLOCK)
        minutes = rng.integers(0, 60, size=n)
        for h, m in zip(hours, minutes, strict=True):
            t = wall.wall(datetime.combine(day, time(int(h), int(m))))
            if t <= end:
                arrivals.append(t)
        day += timedelta(days=1)
    arrivals.sort()
    return arrivals


def _is_list_day(day: date) -> bool:
    if day.weekday() >= 5:
        return False
    return not ((day.month == 12 and day.day >= 24) or (day.month == 1 and day.day == 1))


def _bookings(
    rng: np.random.Generator,
    unit: UnitSpec,
    first: date,
    last: date,
    end: datetime,
    ids: _Ids,
    wall: _Clock,
) -> list[Booking]:
    lead_days = list(range(1, MAX_LEAD_DAYS + 1))
    lead_weights = [2.0 if 7 <= d <= 21 else 1.0 for d in lead_days]
    window_start = unit.elective_window[0].hour * 60 + unit.elective_window[0].minute
    window_end = unit.elective_window[1].hour * 60 + unit.elective_window[1].minute
    out: list[Booking] = []
    day = first
    while day <= last:
        if _is_list_day(day):
            for _ in range(int(rng.poisson(unit.bookings_per_list_day))):
                spec = _pick_specialty(rng, unit.elective_mix)
                procedure, _, factor = spec.procedures[
                    _index(rng, [p[1] for p in spec.procedures])
                ]
                lead = int(lead_days[_index(rng, lead_weights)])
                booked_at = datetime.combine(day - timedelta(days=lead), time(8, 0)) + _minutes(
                    rng.integers(0, 10 * 60)
                )
                admit_at = datetime.combine(day, time(0, 0)) + _minutes(
                    rng.integers(window_start, window_end + 1)
                )
                booking = Booking(
                    booking_id=ids.new("B"),
                    unit=unit.code,
                    booked_at=booked_at,
                    planned_date=day,
                    admit_at=admit_at,
                    age=_age(rng, spec),
                    sex=_sex(rng, unit),
                    specialty=spec.name,
                    source=_choice(rng, spec.sources),
                    procedure=procedure,
                    hazard=spec.hazard * factor,
                    score_mean=spec.score_mean,
                )
                if rng.random() < _RANDOM_CANCEL:
                    day_start = datetime.combine(day, time(6, 0))
                    if rng.random() < 1 / 3:
                        # On the day, before the planned admission.
                        span = (admit_at - day_start).total_seconds() / 60 - 15
                        cancel = day_start + _minutes(rng.integers(0, max(1, int(span))))
                    else:
                        # An office-hours day between booking and the planned day.
                        days = (day - booked_at.date()).days
                        cancel = datetime.combine(
                            booked_at.date() + timedelta(days=int(rng.integers(0, days))),
                            time(8, 0),
                        ) + _minutes(rng.integers(0, 10 * 60))
                        if cancel <= booked_at:
                            cancel = booked_at + _minutes(rng.integers(5, 121))
                    booking.cancelled_at = wall.wall(cancel)
                if booking.booked_at <= end:
                    out.append(booking)
        day += timedelta(days=1)
    return out


def _initial_score(rng: np.random.Generator, mean: float, top: int) -> int:
    # Negative binomial: a skewed, overdispersed count around the group's mean.
    return int(min(top, rng.negative_binomial(4, 4.0 / (4.0 + mean))))


def _course(
    rng: np.random.Generator,
    unit: UnitSpec,
    admitted_at: datetime,
    score0: int,
    hazard: float,
    age: int,
    wall: _Clock,
) -> tuple[datetime, bool, list[tuple[datetime, int]]]:
    """Simulate one stay hour by hour: discharge instant, death, daily scores."""
    # Patient-specific pull towards recovery; a few patients drift upwards instead.
    pull = float(np.clip(rng.normal(0.20, 0.10), -0.08, 0.45))
    if rng.random() < unit.long_stay_share:
        hazard *= unit.long_stay_factor
    static = unit.discharge_rate * hazard * math.exp(-0.012 * (age - 60))
    death_static = unit.death_rate * math.exp(0.03 * (age - 60))

    first_score_at = wall.wall(admitted_at + _minutes(rng.integers(30, 121)))
    start_clock = admitted_at.hour + admitted_at.minute / 60.0
    earliest = (first_score_at - admitted_at).total_seconds() / 3600.0 + 4.0
    rounds: list[tuple[int, int]] = []  # (days after the admission date, minutes after 06:00)
    offsets = [0.0]  # hours after admission; the admission score holds from admission on
    values = [score0]
    next_day = 0

    def add_rounds() -> None:
        # One chunk's mornings at a time: array draws are much faster than scalar ones.
        nonlocal next_day
        minutes = rng.integers(0, 121, size=_CHUNK_DAYS).tolist()
        noise = rng.normal(0.0, unit.score_noise, size=_CHUNK_DAYS).tolist()
        for m, e in zip(minutes, noise, strict=True):
            offset = next_day * 24 + 6 + m / 60 - start_clock
            next_day += 1
            if offset <= earliest:
                continue
            s = values[-1]
            values.append(min(unit.score_max, max(0, round(s - pull * s + e))))
            rounds.append((next_day - 1, m))
            offsets.append(offset)

    weekday0 = admitted_at.weekday()
    target = rng.exponential()
    cumulative = 0.0
    k0 = 0
    hours_to_event = float(_MAX_STAY_HOURS)
    died = False
    while k0 < _MAX_STAY_HOURS:
        while offsets[-1] < k0 + _CHUNK_HOURS:
            add_rounds()
        mid = np.arange(k0, k0 + _CHUNK_HOURS) + 0.5
        index = np.searchsorted(np.array(offsets), mid, side="right") - 1
        score = np.array(values, dtype=float)[index]
        wall_hours = start_clock + mid
        hour = np.floor(wall_hours).astype(int) % 24
        weekday = (weekday0 + np.floor(wall_hours / 24).astype(int)) % 7
        discharge = (
            static
            * np.exp(-unit.score_effect * (score - unit.score_ref))
            * _DISCHARGE_CLOCK[hour]
            * np.where(weekday >= 5, _WEEKEND_DISCHARGE, 1.0)
            * np.minimum(1.0, mid / unit.ramp_hours) ** 2
        )
        death = death_static * np.exp(unit.death_effect * (score - unit.death_ref))
        rate = discharge + death
        running = cumulative + np.cumsum(rate)
        j = int(np.searchsorted(running, target))
        if j < _CHUNK_HOURS:
            before = running[j - 1] if j > 0 else cumulative
            hours_to_event = k0 + j + (target - before) / rate[j]
            died = bool(rng.random() < death[j] / rate[j])
            break
        cumulative = float(running[-1])
        k0 += _CHUNK_HOURS
    discharged_at = wall.wall(
        admitted_at + timedelta(minutes=max(10, int(round(hours_to_event * 60))))
    )
    midnight = datetime.combine(admitted_at.date(), time(0, 0))
    score_times = [first_score_at] + [
        midnight + timedelta(days=d, hours=6, minutes=m) for d, m in rounds
    ]
    scores = [(t, v) for t, v in zip(score_times, values, strict=True) if t < discharged_at]
    return discharged_at, died, scores


def _fit_flags(
    rng: np.random.Generator, stay: Stay, wall: _Clock
) -> list[tuple[datetime, int]]:
    """Ward readiness flags: a 1 shortly before a live discharge, some 0s before."""
    if stay.outcome == "died" or rng.random() >= 0.8:
        flag_at = None
    else:
        lead = rng.uniform(2, 30) if rng.random() < 0.85 else rng.uniform(48, 120)
        day = (stay.discharged_at - timedelta(hours=lead)).date()
        flag_at = datetime.combine(day, time(8, 0)) + _minutes(rng.integers(0, 9 * 60))
        if flag_at >= stay.discharged_at - timedelta(minutes=30):
            flag_at -= timedelta(days=1)
        if flag_at < stay.admitted_at + timedelta(hours=2):
            flag_at = None
    flags: list[tuple[datetime, int]] = []
    limit = flag_at if flag_at is not None else stay.discharged_at
    for t, _ in stay.scores[1:]:
        unflagged_at = wall.wall(t + _minutes(rng.integers(60, 181)))
        if rng.random() < 0.25 and unflagged_at < limit:
            flags.append((unflagged_at, 0))
    if flag_at is not None:
        flags.append((wall.wall(flag_at), 1))
    return flags


def _simulate_unit(
    rng: np.random.Generator,
    unit: UnitSpec,
    sim_start: datetime,
    end: datetime,
    ids: _Ids,
    wall: _Clock,
) -> tuple[list[Stay], list[Booking]]:
    bookings = _bookings(
        rng, unit, sim_start.date(), end.date() + timedelta(days=BOOKING_HORIZON_DAYS),
        end, ids, wall,
    )
    emergencies = _emergency_arrivals(rng, unit, sim_start.date(), end, wall)
    events: list[tuple[datetime, int, int]] = [(t, 0, i) for i, t in enumerate(emergencies)]
    events += [
        (b.admit_at, 1, i)
        for i, b in enumerate(bookings)
        if b.admit_at <= end and (b.cancelled_at is None or b.cancelled_at > b.admit_at)
    ]
    events.sort()

    stays: list[Stay] = []
    active: dict[str, Stay] = {}
    leaving: list[tuple[datetime, str]] = []  # heap of (discharge, stay_id); stale ones skipped
    occupied: set[str] = set()
    escalation = f"{unit.bed_prefix}X1"
    last_event = sim_start
    for t, kind, i in events:
        while leaving and leaving[0][0] <= t:
            _, stay_id = heapq.heappop(leaving)
            gone = active.pop(stay_id, None)
            if gone is not None:
                occupied.discard(gone.bed)
        beds = unit.beds_at(t)
        if len(active) >= beds + 1:
            if kind == 0:
                last_event = t
                continue  # emergencies go elsewhere and leave no row here
            booking = bookings[i]
            # A full unit makes room for a booked patient by moving out early the
            # patient due to leave soonest today; failing that the booking is cancelled.
            due = [
                s for s in active.values()
                if s.outcome != "died" and s.discharged_at.date() == t.date()
            ]
            if due:
                early = min(due, key=lambda s: (s.discharged_at, s.stay_id))
                moved = t - _minutes(rng.integers(5, 46))
                floor = max(last_event, early.admitted_at + timedelta(minutes=1))
                # Elective windows start at 07:00, so wall() never moves this past t.
                early.discharged_at = wall.wall(min(t, max(moved, floor)))
                early.scores = [(at, v) for at, v in early.scores if at < early.discharged_at]
                del active[early.stay_id]
                occupied.discard(early.bed)
            else:
                day_start = max(
                    datetime.combine(t.date(), time(6, 0)), booking.booked_at + timedelta(minutes=1)
                )
                span = max(1, int((t - day_start).total_seconds() / 60) - 30)
                booking.cancelled_at = wall.wall(day_start + _minutes(rng.integers(0, span)))
                last_event = t
                continue
        last_event = t
        if kind == 0:
            spec = _pick_specialty(rng, unit.emergency_mix)
            admission_type, booking_id = "emergency", ""
            age, sex = _age(rng, spec), _sex(rng, unit)
            specialty, source = spec.name, _choice(rng, spec.sources)
            hazard, score_mean = spec.hazard * unit.emergency_factor, spec.score_mean
        else:
            booking = bookings[i]
            admission_type, booking_id = "elective", booking.booking_id
            age, sex = booking.age, booking.sex
            specialty, source = booking.specialty, booking.source
            hazard, score_mean = booking.hazard, booking.score_mean
        score0 = _initial_score(rng, score_mean, unit.score_max)
        discharged_at, died, scores = _course(rng, unit, t, score0, hazard, age, wall)
        free = [
            f"{unit.bed_prefix}{n:02d}"
            for n in range(1, beds + 1)
            if f"{unit.bed_prefix}{n:02d}" not in occupied
        ]
        bed = free[int(rng.integers(0, len(free)))] if free else escalation
        outcome = "died" if died else _choice(rng, unit.alive_outcomes)
        stay = Stay(
            stay_id=ids.new("S"), unit=unit.code, bed=bed, admitted_at=t,
            discharged_at=discharged_at, admission_type=admission_type, outcome=outcome,
            age=age, sex=sex, specialty=specialty, source=source, booking_id=booking_id,
            scores=scores,
        )
        stays.append(stay)
        active[stay.stay_id] = stay
        occupied.add(bed)
        heapq.heappush(leaving, (discharged_at, stay.stay_id))
    if unit.fit_flag:
        # After the loop: an early move-out above changes the discharge the flag precedes.
        for stay in stays:
            stay.fit_flags = _fit_flags(rng, stay, wall)
    return stays, bookings


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

    stays: list[Stay] = []
    bookings: list[Booking] = []
    for unit in UNITS:
        unit_stays, unit_bookings = _simulate_unit(rng, unit, sim_start, end, ids, wall)
        stays += [s for s in unit_stays if s.discharged_at > start]
        kept = {s.booking_id for s in stays if s.booking_id}
        bookings += [
            b for b in unit_bookings
            if b.planned_date >= start.date() or b.booking_id in kept
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
            "booking_id": s.booking_id,
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
