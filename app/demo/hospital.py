"""Simulating the demo hospital's two units together: arrivals, step-downs and exit block.

One event loop runs both units, because KV-CRIT's patients who step down to KV-SURG need a
free staffed bed there: a patient clinically ready to leave critical care keeps its
critical-care bed until the ward has room ("exit block"), so a full ward keeps critical
care fuller, and critical care then turns more emergencies away. The rules of the flow are
``STEP_DOWN`` in ``app.demo.scenario``; the patient-level mechanics are
``app.demo.simulate``'s.
"""

from __future__ import annotations

import heapq
from dataclasses import dataclass, field
from datetime import datetime, time, timedelta

import numpy as np

from app.demo.scenario import STEP_DOWN, UNITS, Booking, Stay, UnitSpec
from app.demo.simulate import (
    BOOKING_HORIZON_DAYS,
    _age,
    _bookings,
    _choice,
    _Clock,
    _course,
    _emergency_arrivals,
    _fit_flags,
    _Ids,
    _index,
    _initial_score,
    _minutes,
    _pick_specialty,
    _readiness_flags,
    _sex,
)

# A discharge not yet known (a step-down waiting for its ward bed).
NOT_YET = datetime(9999, 1, 1)
# Event ranks at one instant: leavings free beds first, then the ward's transfer window
# opens, then ready patients join the queue, then arrivals take what is left.
_LEAVE, _OPEN, _READY, _ARRIVE = 0, 1, 2, 3


@dataclass
class _UnitState:
    spec: UnitSpec
    bookings: list[Booking]
    active: dict[str, Stay] = field(default_factory=dict)
    occupied: set[str] = field(default_factory=set)

    def free_beds(self, t: datetime, *, escalation: bool) -> list[str]:
        beds = self.spec.beds_at(t)
        free = [
            f"{self.spec.bed_prefix}{n:02d}"
            for n in range(1, beds + 1)
            if f"{self.spec.bed_prefix}{n:02d}" not in self.occupied
        ]
        if not free and escalation:
            free = [f"{self.spec.bed_prefix}X1"]
        return free


@dataclass
class _Hospital:
    rng: np.random.Generator
    ids: _Ids
    wall: _Clock
    units: dict[str, _UnitState]
    events: list[tuple[datetime, int, int, str, object]] = field(default_factory=list)
    stays: list[Stay] = field(default_factory=list)
    waiting: list[Stay] = field(default_factory=list)  # ready to step down, no bed yet
    last_event: datetime = datetime.min
    _seq: int = 0
    _patients: int = 0

    def push(self, t: datetime, rank: int, kind: str, data: object) -> None:
        self._seq += 1
        heapq.heappush(self.events, (t, rank, self._seq, kind, data))

    def new_patient(self) -> str:
        self._patients += 1
        return f"P{self._patients:06d}"

    # -- admissions ------------------------------------------------------------------

    def admit(self, unit: _UnitState, t: datetime, *, admission_type: str, booking_id: str,
              age: int, sex: str, specialty: str, source: str, hazard: float,
              score_mean: float, previous: Stay | None = None) -> Stay:
        rng, spec = self.rng, unit.spec
        score0 = _initial_score(rng, score_mean, spec.score_max)
        end, died, scores = _course(rng, spec, t, score0, hazard, age, self.wall)
        free = unit.free_beds(t, escalation=previous is None)
        bed = free[int(rng.integers(0, len(free)))]
        stay = Stay(
            stay_id=self.ids.new("S"), unit=spec.code, bed=bed, admitted_at=t,
            discharged_at=end, admission_type=admission_type, outcome="died" if died else "",
            age=age, sex=sex, specialty=specialty, source=source, booking_id=booking_id,
            scores=scores,
            patient=previous.patient if previous is not None else self.new_patient(),
            from_unit=previous.unit if previous is not None else "", previous=previous,
        )
        self.stays.append(stay)
        unit.active[stay.stay_id] = stay
        unit.occupied.add(bed)
        if died:
            self.push(end, _LEAVE, "leave", stay)
        elif spec.code == STEP_DOWN.sender:
            self.route_out(stay, end)
        else:
            stay.outcome = _choice(rng, spec.alive_outcomes)
            self.push(end, _LEAVE, "leave", stay)
        return stay

    def route_out(self, stay: Stay, ready: datetime) -> None:
        """Where a live critical-care patient goes once clinically ready, and when."""
        rng = self.rng
        stay.ready_at = ready
        share = dict(STEP_DOWN.share).get(stay.specialty, 0.5)
        if rng.random() < share:
            stay.outcome, stay.to_unit, stay.discharged_at = "ward", STEP_DOWN.receiver, NOT_YET
            low, high = STEP_DOWN.handover
            self.push(self.wall.wall(ready + _minutes(rng.integers(low, high + 1))),
                      _READY, "ready", stay)
            return
        stay.outcome = _choice(rng, self.units[stay.unit].spec.alive_outcomes)
        stay.to_unit = STEP_DOWN.other_ward if stay.outcome == "ward" else ""
        delays = STEP_DOWN.delays
        _, shortest, longest = delays[_index(rng, [d[0] for d in delays])]
        leave = ready + timedelta(hours=float(rng.uniform(shortest, longest)))
        opens, closes = STEP_DOWN.window
        if not opens <= leave.time() < closes:
            day = leave.date() + timedelta(days=1 if leave.time() >= closes else 0)
            leave = datetime.combine(day, opens) + _minutes(rng.integers(0, 121))
        stay.discharged_at = self.wall.wall(leave)
        self.push(stay.discharged_at, _LEAVE, "leave", stay)

    # -- the step-down queue ---------------------------------------------------------

    def in_window(self, t: datetime) -> bool:
        return STEP_DOWN.window[0] <= t.time() < STEP_DOWN.window[1]

    def step_down(self, t: datetime) -> None:
        """Move the longest-waiting ready patients while the ward has a free staffed bed."""
        ward = self.units[STEP_DOWN.receiver]
        if not self.in_window(t):
            return
        while self.waiting and len(ward.active) < ward.spec.beds_at(t):
            first = min(self.waiting, key=lambda s: (s.ready_at or t, s.stay_id))
            self.waiting.remove(first)
            sender = self.units[first.unit]
            first.discharged_at = t
            del sender.active[first.stay_id]
            sender.occupied.discard(first.bed)
            self.admit_step_down(first, t)

    def admit_step_down(self, previous: Stay, t: datetime) -> None:
        ward = self.units[STEP_DOWN.receiver]
        specialty = dict(STEP_DOWN.specialty).get(previous.specialty, previous.specialty)
        mix = {s.name: s for s in ward.spec.emergency_mix}
        hazard = mix[specialty].hazard if specialty in mix else STEP_DOWN.other_hazard
        score_mean = mix[specialty].score_mean if specialty in mix else 3.0
        self.admit(ward, t, admission_type="emergency", booking_id="", age=previous.age,
                   sex=previous.sex, specialty=specialty, source=STEP_DOWN.source,
                   hazard=hazard * ward.spec.emergency_factor * STEP_DOWN.hazard_factor,
                   score_mean=score_mean, previous=previous)

    # -- arrivals --------------------------------------------------------------------

    def arrive(self, unit: _UnitState, t: datetime, kind: int, i: int) -> None:
        rng, spec = self.rng, unit.spec
        if len(unit.active) >= spec.beds_at(t) + 1:
            if kind == 0:
                return  # emergencies go elsewhere and leave no row here
            booking = unit.bookings[i]
            # A full unit makes room for a booked patient by moving out early the
            # patient due to leave soonest today; failing that the booking is cancelled.
            due = [
                s for s in unit.active.values()
                if s.outcome != "died" and s.discharged_at.date() == t.date()
            ]
            if due:
                early = min(due, key=lambda s: (s.discharged_at, s.stay_id))
                moved = t - _minutes(rng.integers(5, 46))
                floor = max(self.last_event, early.admitted_at + timedelta(minutes=1))
                # Elective windows start at 07:00, so wall() never moves this past t.
                early.discharged_at = self.wall.wall(min(t, max(moved, floor)))
                early.scores = [(at, v) for at, v in early.scores if at < early.discharged_at]
                if early.ready_at is not None:
                    early.ready_at = min(early.ready_at, early.discharged_at)
                del unit.active[early.stay_id]
                unit.occupied.discard(early.bed)
            else:
                day_start = max(
                    datetime.combine(t.date(), time(6, 0)),
                    booking.booked_at + timedelta(minutes=1),
                )
                span = max(1, int((t - day_start).total_seconds() / 60) - 30)
                booking.cancelled_at = self.wall.wall(day_start + _minutes(rng.integers(0, span)))
                return
        if kind == 0:
            group = _pick_specialty(rng, spec.emergency_mix)
            self.admit(unit, t, admission_type="emergency", booking_id="",
                       age=_age(rng, group), sex=_sex(rng, spec), specialty=group.name,
                       source=_choice(rng, group.sources),
                       hazard=group.hazard * spec.emergency_factor,
                       score_mean=group.score_mean)
        else:
            booking = unit.bookings[i]
            self.admit(unit, t, admission_type="elective", booking_id=booking.booking_id,
                       age=booking.age, sex=booking.sex, specialty=booking.specialty,
                       source=booking.source, hazard=booking.hazard,
                       score_mean=booking.score_mean)

    # -- the loop --------------------------------------------------------------------

    def run(self, end: datetime) -> None:
        while self.events and self.events[0][0] <= end:
            t, _, _, kind, data = heapq.heappop(self.events)
            if kind == "leave":
                assert isinstance(data, Stay)
                unit = self.units[data.unit]
                if unit.active.get(data.stay_id) is not data or data.discharged_at != t:
                    continue  # moved out early: a stale entry
                del unit.active[data.stay_id]
                unit.occupied.discard(data.bed)
                if data.unit == STEP_DOWN.receiver:
                    self.step_down(t)
            elif kind == "open":
                self.step_down(t)
            elif kind == "ready":
                assert isinstance(data, Stay)
                self.waiting.append(data)
                self.step_down(t)
            else:
                assert isinstance(data, tuple)
                code, arrival_kind, i = data
                self.arrive(self.units[str(code)], t, int(arrival_kind), int(i))
                self.last_event = t
                continue
            self.last_event = max(self.last_event, t)


def _waiting_scores(
    rng: np.random.Generator, stay: Stay, unit: UnitSpec, end: datetime
) -> None:
    """Mornings' scores while a ready patient waits to leave (stable, near the last one)."""
    if stay.ready_at is None or not stay.scores:
        return
    seen = {t.date() for t, _ in stay.scores[1:]}
    last = stay.scores[-1][1]
    day = stay.ready_at.date()
    until = min(stay.discharged_at, end)
    while datetime.combine(day, time(6, 0)) < until:
        at = datetime.combine(day, time(6, 0)) + _minutes(rng.integers(0, 121))
        if stay.ready_at <= at < until and day not in seen:
            last = int(np.clip(last + int(rng.integers(-1, 2)), 0, unit.score_max))
            stay.scores.append((at, last))
        day += timedelta(days=1)


def simulate_hospital(
    rng: np.random.Generator, sim_start: datetime, end: datetime, ids: _Ids, wall: _Clock
) -> tuple[list[Stay], list[Booking]]:
    """Every stay of both units (in admission order) and every booking, up to ``end``.

    A stay whose patient is still in its unit at ``end`` has a ``discharged_at`` after
    ``end`` (``NOT_YET`` for a step-down still waiting for its ward bed)."""
    units: dict[str, _UnitState] = {}
    hospital = _Hospital(rng, ids, wall, units)
    for spec in UNITS:
        bookings = _bookings(
            rng, spec, sim_start.date(), end.date() + timedelta(days=BOOKING_HORIZON_DAYS),
            end, ids, wall,
        )
        units[spec.code] = _UnitState(spec, bookings)
        for t in _emergency_arrivals(rng, spec, sim_start.date(), end, wall):
            hospital.push(t, _ARRIVE, "arrive", (spec.code, 0, 0))
        for i, b in enumerate(bookings):
            if b.admit_at <= end and (b.cancelled_at is None or b.cancelled_at > b.admit_at):
                hospital.push(b.admit_at, _ARRIVE, "arrive", (spec.code, 1, i))
    day = sim_start.date()
    while day <= end.date():
        hospital.push(datetime.combine(day, STEP_DOWN.window[0]), _OPEN, "open", None)
        day += timedelta(days=1)
    hospital.run(end)
    # After the loop: early move-outs and waits change the discharges flags and scores follow.
    for stay in hospital.stays:
        spec = units[stay.unit].spec
        _waiting_scores(rng, stay, spec, end)
        if spec.fit_flag == "ward":
            stay.fit_flags = _fit_flags(rng, stay, wall)
        elif spec.fit_flag == "ready":
            stay.fit_flags = _readiness_flags(rng, stay, wall)
    bookings = [b for u in units.values() for b in u.bookings]
    return hospital.stays, bookings
