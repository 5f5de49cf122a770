"""The demo hospital's units, specialties and the invented rules of their patients."""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import date, datetime, time


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
    # Which ``fit_for_discharge`` flags the unit records: "" none, "ward" a noisy 1 hours
    # to days before a live discharge, "ready" a 1 exactly at the clinical readiness.
    fit_flag: str

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
    # Used only for the live discharges that do not step down to KV-SURG (see STEP_DOWN).
    alive_outcomes=(("ward", 0.76), ("transfer", 0.13), ("home", 0.11)),
    fit_flag="ready",
)


SURGICAL_WARD = UnitSpec(
    code="KV-SURG",
    bed_prefix="W",
    beds=((None, 28),),
    census_time=time(23, 0),
    score="news2",
    score_max=20,
    # Lowered from 2.4 when the step-downs from KV-CRIT came in, so the ward's load
    # stays about what it was (its mean occupancy, before and after, in the report).
    emergency_per_day=0.55,
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
    fit_flag="ward",
)


UNITS: tuple[UnitSpec, ...] = (CRITICAL_CARE, SURGICAL_WARD)


@dataclass(frozen=True)
class StepDown:
    """The invented routing out of KV-CRIT and the step-down rules of the pair."""

    sender: str
    receiver: str
    # Chance that a live KV-CRIT discharge steps down to KV-SURG, by specialty (the
    # surgical ones mostly do; medicine mostly goes to the medical ward).
    share: tuple[tuple[str, float], ...]
    # The medical ward Morrow does not forecast (the other "ward" outcomes go there).
    other_ward: str
    # Step-downs move only between these hours (ward policy).
    window: tuple[time, time]
    # Handover once clinically ready, minutes (uniform).
    handover: tuple[int, int]
    # Length of stay on the ward after critical care: the receiving unit's emergency
    # hazard for the mapped specialty times this factor (below 1: a bit longer).
    hazard_factor: float
    source: str
    # Specialty on the ward for a critical-care specialty (others keep their name).
    specialty: tuple[tuple[str, str], ...]
    # Hazard of the ward's emergency specialties, for step-downs of other specialties.
    other_hazard: float
    # Delay before a discharge that does not go to KV-SURG: (share, low, high) hours.
    delays: tuple[tuple[float, float, float], ...]


STEP_DOWN = StepDown(
    sender="KV-CRIT",
    receiver="KV-SURG",
    share=(("medicine", 0.25), ("general-surgery", 0.80), ("trauma", 0.70),
           ("neurosurgery", 0.50), ("cardiac-surgery", 0.60), ("vascular", 0.80)),
    other_ward="KV-MEDW",
    window=(time(8, 0), time(22, 0)),
    handover=(15, 60),
    hazard_factor=0.85,
    source="critical-care",
    specialty=(("trauma", "orthopaedics"),),
    other_hazard=0.8,
    delays=((0.80, 0.5, 6.0), (0.20, 12.0, 30.0)),
)


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
    patient: str = ""
    from_unit: str = ""
    to_unit: str = ""
    ready_at: datetime | None = None  # clinically ready to leave (live discharges)
    previous: Stay | None = None  # the stay this one continues (a step-down)
