"""The demo's patient-level mechanics: arrivals, bookings, courses, scores and flags.

The two units are simulated together in ``app.demo.hospital``."""

from __future__ import annotations

import math
from datetime import date, datetime, time, timedelta

import numpy as np

from app.demo.scenario import Booking, Specialty, Stay, UnitSpec

BOOKING_HORIZON_DAYS = 21
MAX_LEAD_DAYS = 28
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
_MAX_STAY_HOURS = 24 * 365
_CHUNK_DAYS = 7
_CHUNK_HOURS = 24 * _CHUNK_DAYS


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
    return _flag_entries(rng, stay, wall, flag_at,
                         None if flag_at is None else wall.wall(flag_at))


def _flag_entries(
    rng: np.random.Generator, stay: Stay, wall: _Clock, flag_at: datetime | None,
    stamped: datetime | None,
) -> list[tuple[datetime, int]]:
    """A few 0s an hour or more after earlier morning scores (before the flag, or the
    discharge when there is none), then the 1 at ``stamped``."""
    flags: list[tuple[datetime, int]] = []
    limit = flag_at if flag_at is not None else stay.discharged_at
    for t, _ in stay.scores[1:]:
        unflagged_at = wall.wall(t + _minutes(rng.integers(60, 181)))
        if rng.random() < 0.25 and unflagged_at < limit:
            flags.append((unflagged_at, 0))
    if stamped is not None:
        flags.append((stamped, 1))
    return flags


def _readiness_flags(
    rng: np.random.Generator, stay: Stay, wall: _Clock
) -> list[tuple[datetime, int]]:
    """Critical-care readiness: a 1 exactly when the patient is clinically ready to leave
    (every live discharge), some 0s on earlier mornings."""
    flag_at = None if stay.outcome == "died" else stay.ready_at
    return _flag_entries(rng, stay, wall, flag_at, flag_at)
