"""Capacity planning: a unit of c beds simulated over months as a loss system.

Demand
------
Patients arrive in streams (:class:`DemandStream`: emergency or other unbooked arrivals, a
Poisson or negative binomial count per day with a weekday pattern; :class:`ElectiveList`: booked
operations per weekday, each cancelled with a given probability). Each arrival belongs to a
:class:`PatientGroup`, chosen by its stream's group weights, and draws its stay from that group's
phase-type distribution. Times are in days; day 0 is ``start_weekday`` (0 = Monday) and an
arrival's clock time within its day follows the stream's 24-hour profile.

The unit
--------
A loss system: an arrival that finds every bed taken is turned away (placed elsewhere,
transferred, or the operation cancelled on the day) and never enters; nobody waits for a bed.
With ``beds=None`` there is no limit (the "offered" occupancy, an M/G/infinity system). For
Poisson arrivals at a flat rate the share turned away is the Erlang loss formula
(``app.stats.erlang.erlang_b``) whatever the stay distribution's shape (M/G/c/c insensitivity),
which the tests use as the oracle.

What is measured (per replication, over ``days`` days after ``warmup_days`` of warm-up)
-----------------------------------------------------------------------------------------
``mean_occupancy``
    Time-average number of occupied beds.
``occupancy_rate``
    ``mean_occupancy / beds``: the "average bed occupancy" of the trade (loss systems only).
``mean_census``
    Mean number of occupied beds at the daily census instant (``census_hour``).
``share_turned_away`` (and ``share_turned_away_<admission_type>``)
    Arrivals that found no bed / arrivals, over the measured days.
``share_days_turning_away``
    The days "over capacity": share of calendar days on which at least one arrival found no
    bed (demand exceeded the beds at least once that day). A loss system is never over its bed
    count, so this, not a census above c, is what over capacity means here.
``share_days_full_at_census``
    Share of census instants with every bed occupied.
``arrivals_per_day``, ``turned_away_per_day``
    Offered arrivals and arrivals that found no bed, per day.

With ``beds=None`` only ``mean_occupancy``, ``mean_census`` and ``arrivals_per_day`` are
reported (nobody is turned away).

The census distribution (``occupancy_pmf``) is the share of census instants with k beds
occupied. Across the independent replications each figure is reported as a mean with a
Student-t confidence interval (``scipy.stats.t``).

Common random numbers
---------------------
Every random quantity is tied to a slot, not to the order of drawing: stream s on day d has
its own uniform for the day's count (inverted through the count distribution's quantile
function), and its k-th arrival of the day its own uniforms for the clock time, the group and
the stay (inverted through the group's stay quantile function, tabulated on a fine grid). The
uniforms come from generators keyed by (seed, replication, stream name, purpose), filled one
slot row at a time, so for the same days and warm-up (``compare`` in
``app.stats.planning_scenarios`` makes them common) a different rate or a different stay
distribution changes only what it must: more arrivals add slots, a stay scaled by f is
exactly f times as long, and a patient moved to another group keeps their stay quantile.
Bed counts share the very same demand. The curve of the share turned away against beds is
therefore smooth, and scenario differences are estimated from paired replications (much
narrower intervals than two independent runs).

Limits
------
Rates vary by weekday only (no season or trend: scale a stream for a winter scenario); days
are independent; a stay runs from the arrival instant for its drawn length, so discharges have
no clock-time profile of their own; nobody waits for a bed (a queue is not modelled).

References
----------
Erlang loss formula and its insensitivity: METHODS.md section 4 (Erlang B tables).
Little's law L = lambda W: METHODS.md section 3.
Bagust A, Place M, Posnett JW (1999). Dynamics of bed use in accommodating emergency
admissions: stochastic simulation model. BMJ 319:155-158 (title and pages from memory; the
85% / 90% occupancy shape as quoted in METHODS.md).
Law AM (2015). Simulation Modeling and Analysis, 5th ed.: independent replications with
t intervals and common random numbers (cited from memory; standard practice).
"""

from __future__ import annotations

import dataclasses
import heapq
import math
import zlib
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from functools import lru_cache
from itertools import islice
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd
from scipy import stats

from app.stats.cancel import checkpoint
from app.stats.erlang import beds_for_blocking, erlang_b, mean_occupancy
from app.stats.phasetype import Coxian, PhaseType, distribution_from_dict

__all__ = [
    "BedsNeeded",
    "CapacityCurve",
    "Demand",
    "DemandStream",
    "ElectiveList",
    "Estimate",
    "PatientGroup",
    "PlanningInput",
    "PlanningResult",
    "beds_needed",
    "capacity_curve",
    "demand_scale_for_occupancy",
    "draw_demand",
    "scale_arrivals",
    "scale_stay",
    "simulate",
    "t_interval",
]

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]
StayDistribution = PhaseType | Coxian

WEEKDAYS = ("Mon", "Tue", "Wed", "Thu", "Fri", "Sat", "Sun")

# Stay quantile table on [0, x_max], x_max where S(x) first drops below exp(_LOG_TAIL).
_STAY_GRID_POINTS = 8193
_LOG_TAIL = math.log(1e-12)
# Automatic warm-up: starting empty, the expected occupancy still missing at time w is
# lambda * integral_w^inf S(u) du; warm up until that is below this share of lambda * mean stay.
_WARMUP_TOLERANCE = 1e-3
_MAX_WARMUP_WEEKS = 520
# The loss system's loop calls the caller's cancellation check once per this many arrivals
# (about 10 ms of work; app.stats.cancel).
_CHECK_EVERY = 16384
# Purposes of the generators of one stream in one replication (part of the seed key).
_COUNT, _HOUR, _GROUP, _STAY, _CANCEL, _BOOKED = range(6)


# ---------------------------------------------------------------------------------------------
# Inputs
# ---------------------------------------------------------------------------------------------


def _weekday_vector(values: Sequence[float] | npt.ArrayLike, name: str) -> tuple[float, ...]:
    vector = np.asarray(values, dtype=float).reshape(-1)
    if vector.size != 7:
        raise ValueError(f"{name}: needs 7 values, Monday first; got {vector.size}")
    if not np.all(np.isfinite(vector)) or np.any(vector < 0):
        raise ValueError(f"{name}: values must be finite and >= 0, got {vector.tolist()!r}")
    return tuple(float(v) for v in vector)


def _hour_profile(values: Sequence[float] | None, name: str) -> tuple[float, ...] | None:
    if values is None:
        return None
    profile = np.asarray(values, dtype=float).reshape(-1)
    if profile.size != 24:
        raise ValueError(f"{name}: needs 24 weights (hours 0..23), got {profile.size}")
    if not np.all(np.isfinite(profile)) or np.any(profile < 0) or not profile.sum() > 0:
        raise ValueError(f"{name}: weights must be finite, >= 0 and not all 0")
    return tuple(float(v) for v in profile / profile.sum())


def _group_weights(
    values: Mapping[str, float] | Sequence[tuple[str, float]], name: str
) -> tuple[tuple[str, float], ...]:
    pairs = list(values.items()) if isinstance(values, Mapping) else list(values)
    names = [str(k) for k, _ in pairs]
    weights = np.asarray([float(w) for _, w in pairs], dtype=float)
    if not pairs:
        raise ValueError(f"{name}: needs at least one patient group")
    if len(set(names)) != len(names):
        raise ValueError(f"{name}: a group is named twice in {names!r}")
    if not np.all(np.isfinite(weights)) or np.any(weights < 0) or not weights.sum() > 0:
        raise ValueError(f"{name}: weights must be finite, >= 0 and not all 0, got {pairs!r}")
    weights = weights / weights.sum()
    return tuple((n, float(w)) for n, w in zip(names, weights, strict=True))


@dataclass(frozen=True)
class PatientGroup:
    """A patient group and its length-of-stay distribution.

    Parameters
    ----------
    name : str
        Unique within a :class:`PlanningInput`.
    stay : PhaseType or Coxian
        Stay in days (for example a group's BIC-chosen Coxian from ``app.stats.stay_groups``).
    """

    name: str
    stay: StayDistribution

    def __post_init__(self) -> None:
        if not isinstance(self.name, str) or not self.name:
            raise ValueError(f"name: must be a non-empty string, got {self.name!r}")
        if not isinstance(self.stay, PhaseType | Coxian):
            raise ValueError(f"stay: must be a PhaseType or Coxian, got {type(self.stay)!r}")

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict; exact round trip with :meth:`from_dict`."""
        return {"name": self.name, "stay": self.stay.to_dict()}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> PatientGroup:
        """Inverse of :meth:`to_dict`."""
        return cls(name=str(data["name"]), stay=distribution_from_dict(data["stay"]))


@dataclass(frozen=True)
class DemandStream:
    """Unbooked arrivals (emergencies, typically): a random count per day.

    (Not ``app.stats.occupancy.ArrivalStream``, the forecast's hourly arrival slots.)

    Parameters
    ----------
    name : str
        Unique within a :class:`PlanningInput`; also keys the stream's random numbers.
    admission_type : str
        For example ``"emergency"``; the share turned away is also reported per type.
    rate_by_weekday : sequence of 7 float
        Expected arrivals per day, Monday first.
    group_weights : mapping of str to float, or sequence of (str, float)
        Share of the stream's arrivals in each patient group (normalised to sum to 1).
    dispersion : float or None, default None
        None: Poisson counts. Otherwise the negative binomial size r > 0 (NB2,
        Var = m + m^2 / r, as fitted by ``app.stats.arrivals``). Days are independent.
    hour_profile : sequence of 24 float, optional
        Relative weights of the arrival hour (0..23); uniform within each hour. None: uniform
        over the day.
    """

    name: str
    admission_type: str
    rate_by_weekday: tuple[float, ...]
    group_weights: tuple[tuple[str, float], ...]
    dispersion: float | None = None
    hour_profile: tuple[float, ...] | None = None

    def __post_init__(self) -> None:
        _check_name(self.name, "name")
        _check_name(self.admission_type, "admission_type")
        object.__setattr__(
            self, "rate_by_weekday", _weekday_vector(self.rate_by_weekday, "rate_by_weekday")
        )
        object.__setattr__(
            self, "group_weights", _group_weights(self.group_weights, "group_weights")
        )
        if self.dispersion is not None:
            size = float(self.dispersion)
            if not (math.isfinite(size) and size > 0):
                raise ValueError(
                    f"dispersion: must be None or a size > 0, got {self.dispersion!r}")
            object.__setattr__(self, "dispersion", size)
        object.__setattr__(self, "hour_profile", _hour_profile(self.hour_profile, "hour_profile"))

    def expected_by_weekday(self) -> FloatArray:
        """Expected admissions (arrivals) per day by weekday, Monday first, shape (7,)."""
        return np.asarray(self.rate_by_weekday, dtype=float)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict; exact round trip with :meth:`from_dict`."""
        return {
            "kind": "demand_stream",
            "name": self.name,
            "admission_type": self.admission_type,
            "rate_by_weekday": list(self.rate_by_weekday),
            "group_weights": [[n, w] for n, w in self.group_weights],
            "dispersion": self.dispersion,
            "hour_profile": None if self.hour_profile is None else list(self.hour_profile),
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> DemandStream:
        """Inverse of :meth:`to_dict`."""
        return cls(
            name=str(data["name"]),
            admission_type=str(data["admission_type"]),
            rate_by_weekday=tuple(data["rate_by_weekday"]),
            group_weights=tuple((str(n), float(w)) for n, w in data["group_weights"]),
            dispersion=data["dispersion"],
            hour_profile=None if data["hour_profile"] is None else tuple(data["hour_profile"]),
        )


@dataclass(frozen=True)
class ElectiveList:
    """Booked admissions: a list of operations per weekday, each possibly cancelled.

    Parameters
    ----------
    name : str
        Unique within a :class:`PlanningInput`.
    booked_by_weekday : sequence of 7 float
        Operations booked per day, Monday first. A fractional value n means floor(n) bookings
        plus one more with probability n - floor(n) (an average list size).
    group_weights : mapping of str to float, or sequence of (str, float)
        Share of the list's patients in each patient group.
    cancellation : float, default 0
        Probability that a booking does not come (cancelled before the day), independently.
    hour_profile : sequence of 24 float, optional
        Arrival hour weights (for example the afternoon after theatre); None: uniform.
    admission_type : str, default "elective"
    """

    name: str
    booked_by_weekday: tuple[float, ...]
    group_weights: tuple[tuple[str, float], ...]
    cancellation: float = 0.0
    hour_profile: tuple[float, ...] | None = None
    admission_type: str = "elective"

    def __post_init__(self) -> None:
        _check_name(self.name, "name")
        _check_name(self.admission_type, "admission_type")
        object.__setattr__(
            self, "booked_by_weekday", _weekday_vector(self.booked_by_weekday, "booked_by_weekday")
        )
        object.__setattr__(
            self, "group_weights", _group_weights(self.group_weights, "group_weights")
        )
        cancel = float(self.cancellation)
        if not (math.isfinite(cancel) and 0 <= cancel <= 1):
            raise ValueError(f"cancellation: must be in [0, 1], got {self.cancellation!r}")
        object.__setattr__(self, "cancellation", cancel)
        object.__setattr__(self, "hour_profile", _hour_profile(self.hour_profile, "hour_profile"))

    def expected_by_weekday(self) -> FloatArray:
        """Expected admissions per day by weekday (bookings that are not cancelled), shape (7,)."""
        return np.asarray(self.booked_by_weekday, dtype=float) * (1.0 - self.cancellation)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict; exact round trip with :meth:`from_dict`."""
        return {
            "kind": "elective_list",
            "name": self.name,
            "booked_by_weekday": list(self.booked_by_weekday),
            "group_weights": [[n, w] for n, w in self.group_weights],
            "cancellation": self.cancellation,
            "hour_profile": None if self.hour_profile is None else list(self.hour_profile),
            "admission_type": self.admission_type,
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> ElectiveList:
        """Inverse of :meth:`to_dict`."""
        return cls(
            name=str(data["name"]),
            booked_by_weekday=tuple(data["booked_by_weekday"]),
            group_weights=tuple((str(n), float(w)) for n, w in data["group_weights"]),
            cancellation=float(data["cancellation"]),
            hour_profile=None if data["hour_profile"] is None else tuple(data["hour_profile"]),
            admission_type=str(data["admission_type"]),
        )


def _check_name(value: object, name: str) -> None:
    if not isinstance(value, str) or not value:
        raise ValueError(f"{name}: must be a non-empty string, got {value!r}")


def _stream_from_dict(data: Mapping[str, Any]) -> DemandStream | ElectiveList:
    kind = data.get("kind")
    if kind == "demand_stream":
        return DemandStream.from_dict(data)
    if kind == "elective_list":
        return ElectiveList.from_dict(data)
    raise ValueError(f"data: unknown stream kind {kind!r}")


@dataclass(frozen=True)
class PlanningInput:
    """Everything one simulation needs.

    Parameters
    ----------
    groups : sequence of PatientGroup
    streams : sequence of DemandStream or ElectiveList
        Every group a stream names must be in ``groups``.
    beds : int or None
        Beds in the unit (>= 1); None for no limit (offered occupancy, nobody turned away).
    days : int, default 730
        Days measured per replication, after the warm-up.
    warmup_days : int or None, default None
        Days simulated before measuring, starting from an empty unit. None: the smallest whole
        number of weeks after which, starting empty, the expected occupancy still missing is
        below 0.1% of its long-run value for every group (lambda * integral_w^inf S(u) du,
        the M/G/infinity build-up; the loss system settles no slower in practice).
    replications : int, default 20
        Independent replications (>= 2, for the confidence intervals).
    seed : int, default 0
        Root of every random number (with the replication and stream name).
    census_hour : float, default 0
        Clock time of the daily census instant, hours in [0, 24).
    start_weekday : int, default 0
        Weekday of day 0 (0 = Monday).
    """

    groups: tuple[PatientGroup, ...]
    streams: tuple[DemandStream | ElectiveList, ...]
    beds: int | None
    days: int = 730
    warmup_days: int | None = None
    replications: int = 20
    seed: int = 0
    census_hour: float = 0.0
    start_weekday: int = 0

    def __post_init__(self) -> None:
        groups = tuple(self.groups)
        streams = tuple(self.streams)
        object.__setattr__(self, "groups", groups)
        object.__setattr__(self, "streams", streams)
        if not groups:
            raise ValueError("groups: needs at least one patient group")
        if not streams:
            raise ValueError("streams: needs at least one arrival stream or elective list")
        group_names = [g.name for g in groups]
        if len(set(group_names)) != len(group_names):
            raise ValueError(f"groups: names must be unique, got {group_names!r}")
        stream_names = [s.name for s in streams]
        if len(set(stream_names)) != len(stream_names):
            raise ValueError(f"streams: names must be unique, got {stream_names!r}")
        for stream in streams:
            if not isinstance(stream, DemandStream | ElectiveList):
                raise ValueError(f"streams: {stream!r} is not a DemandStream or ElectiveList")
            unknown = [n for n, _ in stream.group_weights if n not in group_names]
            if unknown:
                raise ValueError(
                    f"streams: stream {stream.name!r} names unknown groups {unknown!r}"
                )
        if self.beds is not None and not _is_whole(self.beds, minimum=1):
            raise ValueError(f"beds: must be a whole number >= 1 or None, got {self.beds!r}")
        if not _is_whole(self.days, minimum=1):
            raise ValueError(f"days: must be a whole number >= 1, got {self.days!r}")
        if self.warmup_days is not None and not _is_whole(self.warmup_days, minimum=0):
            raise ValueError(f"warmup_days: must be a whole number >= 0, got {self.warmup_days!r}")
        if not _is_whole(self.replications, minimum=2):
            raise ValueError(
                f"replications: must be a whole number >= 2, got {self.replications!r}"
            )
        if not _is_whole(self.seed, minimum=0):
            raise ValueError(f"seed: must be a whole number >= 0, got {self.seed!r}")
        if not (math.isfinite(self.census_hour) and 0 <= self.census_hour < 24):
            raise ValueError(f"census_hour: must be in [0, 24), got {self.census_hour!r}")
        if not (_is_whole(self.start_weekday, minimum=0) and self.start_weekday <= 6):
            raise ValueError(f"start_weekday: must be 0..6, got {self.start_weekday!r}")
        if not self.daily_arrivals() > 0:
            raise ValueError("streams: the expected number of arrivals is 0")

    # -- derived quantities --------------------------------------------------------------------

    def group(self, name: str) -> PatientGroup:
        """The patient group called ``name``."""
        for g in self.groups:
            if g.name == name:
                return g
        raise ValueError(f"name: no patient group {name!r}; groups are {self.group_names()!r}")

    def group_names(self) -> tuple[str, ...]:
        """Names of the patient groups, in order."""
        return tuple(g.name for g in self.groups)

    def admission_types(self) -> tuple[str, ...]:
        """Admission types of the streams, sorted."""
        return tuple(sorted({s.admission_type for s in self.streams}))

    def daily_arrivals(self) -> float:
        """Expected arrivals per day (averaged over the week)."""
        return float(sum(s.expected_by_weekday().mean() for s in self.streams))

    def mean_stay(self, stream: DemandStream | ElectiveList) -> float:
        """Mean stay (days) of an arrival of ``stream``: its groups' means by its weights."""
        means = {g.name: g.stay.mean() for g in self.groups}
        return float(sum(w * means[n] for n, w in stream.group_weights))

    def offered_load(self) -> float:
        """Offered load A = sum over streams of (arrivals per day x mean stay), in Erlangs.

        The mean number of beds that would be occupied with no limit (Little's law), and the
        load the Erlang loss formula takes.
        """
        return float(
            sum(s.expected_by_weekday().mean() * self.mean_stay(s) for s in self.streams)
        )

    def resolved_warmup_days(self) -> int:
        """``warmup_days``, or the automatic warm-up when it is None (see the class doc)."""
        if self.warmup_days is not None:
            return int(self.warmup_days)
        return max(_warmup_days(g.stay) for g in self.groups)

    def replace(self, **changes: Any) -> PlanningInput:
        """A copy with some fields changed (validated again)."""
        return dataclasses.replace(self, **changes)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict; exact round trip with :meth:`from_dict`."""
        return {
            "groups": [g.to_dict() for g in self.groups],
            "streams": [s.to_dict() for s in self.streams],
            "beds": self.beds,
            "days": self.days,
            "warmup_days": self.warmup_days,
            "replications": self.replications,
            "seed": self.seed,
            "census_hour": self.census_hour,
            "start_weekday": self.start_weekday,
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> PlanningInput:
        """Inverse of :meth:`to_dict`."""
        return cls(
            groups=tuple(PatientGroup.from_dict(g) for g in data["groups"]),
            streams=tuple(_stream_from_dict(s) for s in data["streams"]),
            beds=None if data["beds"] is None else int(data["beds"]),
            days=int(data["days"]),
            warmup_days=None if data["warmup_days"] is None else int(data["warmup_days"]),
            replications=int(data["replications"]),
            seed=int(data["seed"]),
            census_hour=float(data["census_hour"]),
            start_weekday=int(data["start_weekday"]),
        )


def _is_whole(value: object, *, minimum: int) -> bool:
    return (
        not isinstance(value, bool)
        and isinstance(value, int | np.integer)
        and int(value) >= minimum
    )


@lru_cache(maxsize=256)
def _warmup_days(stay: StayDistribution) -> int:
    mean = stay.mean()
    for weeks in range(1, _MAX_WARMUP_WEEKS + 1):
        w = 7.0 * weeks
        survival = float(stay.sf(w))
        if survival == 0.0:
            return 7 * weeks
        missing = survival * stay.conditional(w).mean()
        if missing <= _WARMUP_TOLERANCE * mean:
            return 7 * weeks
    return 7 * _MAX_WARMUP_WEEKS


def scale_stay(stay: StayDistribution, factor: float) -> StayDistribution:
    """The stay distribution of ``factor`` times the stay (time scaling).

    If X ~ PH(alpha, T) then f X ~ PH(alpha, T / f): every phase rate is divided by f, the
    shape is kept and the mean is multiplied by f. A Coxian stays a Coxian.

    Parameters
    ----------
    stay : PhaseType or Coxian
    factor : float
        > 0; 0.8 means stays 20% shorter.

    Returns
    -------
    PhaseType or Coxian
        Same class as ``stay``.
    """
    f = float(factor)
    if not (math.isfinite(f) and f > 0):
        raise ValueError(f"factor: must be finite and > 0, got {factor!r}")
    if isinstance(stay, Coxian):
        return Coxian(lam=tuple(v / f for v in stay.lam), mu=tuple(v / f for v in stay.mu))
    return PhaseType(alpha=stay.alpha, T=tuple(tuple(v / f for v in row) for row in stay.T))


def scale_arrivals(
    inp: PlanningInput,
    factor: float,
    *,
    stream: str | None = None,
    admission_type: str | None = None,
) -> PlanningInput:
    """A copy of ``inp`` with the arrivals of some streams multiplied by ``factor``.

    A :class:`DemandStream`'s weekday rates are multiplied (its negative binomial size is
    kept, so the share of the variance beyond Poisson, m / r, grows with the rate); an
    :class:`ElectiveList`'s booked counts are multiplied (the cancellation probability kept).

    Parameters
    ----------
    inp : PlanningInput
    factor : float
        >= 0; 1.1 means 10% more arrivals.
    stream : str, optional
        Only the stream of this name.
    admission_type : str, optional
        Only the streams of this admission type. With neither, every stream.

    Returns
    -------
    PlanningInput
    """
    f = float(factor)
    if not (math.isfinite(f) and f >= 0):
        raise ValueError(f"factor: must be finite and >= 0, got {factor!r}")
    matched = False
    streams: list[DemandStream | ElectiveList] = []
    for s in inp.streams:
        if (stream is None or s.name == stream) and (
            admission_type is None or s.admission_type == admission_type
        ):
            matched = True
            if isinstance(s, DemandStream):
                s = dataclasses.replace(s, rate_by_weekday=tuple(v * f for v in s.rate_by_weekday))
            else:
                s = dataclasses.replace(
                    s, booked_by_weekday=tuple(v * f for v in s.booked_by_weekday)
                )
        streams.append(s)
    if not matched:
        raise ValueError(
            f"stream, admission_type: no stream matches stream={stream!r}, "
            f"admission_type={admission_type!r}"
        )
    return inp.replace(streams=tuple(streams))


# ---------------------------------------------------------------------------------------------
# Demand: who arrives when, in which group, for how long
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class Demand:
    """The arrivals of one replication, sorted by time (before any bed is refused).

    Attributes
    ----------
    time : ndarray of float, shape (n,)
        Arrival times in days from the start of the warm-up.
    stay : ndarray of float, shape (n,)
        Stay in days, if admitted.
    stream : ndarray of int, shape (n,)
        Index of the arrival's stream in ``PlanningInput.streams``.
    group : ndarray of int, shape (n,)
        Index of the arrival's group in ``PlanningInput.groups``.
    n_days : int
        Days simulated (warm-up plus measured).
    """

    time: FloatArray
    stay: FloatArray
    stream: IntArray
    group: IntArray
    n_days: int

    def counts_by_day(self, stream: int | None = None) -> IntArray:
        """Arrivals on each day 0..n_days-1 (of one stream, or of all)."""
        mask = slice(None) if stream is None else self.stream == stream
        days = np.floor(self.time[mask]).astype(np.int64)
        return np.bincount(days, minlength=self.n_days).astype(np.int64)


def _key(text: str) -> int:
    return zlib.crc32(text.encode("utf-8"))


def _generator(
    inp: PlanningInput, replication: int, name: str, purpose: int
) -> np.random.Generator:
    sequence = np.random.SeedSequence(inp.seed, spawn_key=(replication, _key(name), purpose))
    return np.random.Generator(np.random.PCG64(sequence))


@lru_cache(maxsize=256)
def _stay_table(stay: StayDistribution) -> tuple[FloatArray, FloatArray, float]:
    """Grid x_j and -log S(x_j), increasing, and the tail slope (days per unit of -log S).

    A quantile is read off by linear interpolation of x against -log S: exact for an
    exponential, and every phase-type tail is asymptotically exponential, so interpolation in
    log S (not S) keeps the far tail right too.
    """
    x_max = stay.mean()
    while float(stay.logsf(x_max)) > _LOG_TAIL:
        x_max *= 2.0
    # Uniform points for the body and tail, geometric ones near 0 where S is flat (an Erlang's
    # -log S grows like x^k there, which a uniform grid would interpolate too coarsely).
    x = np.unique(
        np.r_[
            np.linspace(0.0, x_max, _STAY_GRID_POINTS),
            np.geomspace(x_max * 1e-8, x_max, _STAY_GRID_POINTS // 2),
        ]
    )
    neg_log_s = -np.asarray(stay.logsf(x), dtype=float)
    neg_log_s[0] = 0.0
    # Round-off near x = 0 can make -log S dip by 1e-16; np.interp needs it non-decreasing.
    neg_log_s = np.maximum.accumulate(neg_log_s)
    slope = (x[-1] - x[-2]) / max(neg_log_s[-1] - neg_log_s[-2], 1e-300)
    return x, neg_log_s, float(slope)


def _stay_quantile(stay: StayDistribution, survival: FloatArray) -> FloatArray:
    """Stays x with S(x) = survival (survival in (0, 1]): inverse-CDF sampling."""
    x, neg_log_s, slope = _stay_table(stay)
    target = -np.log(survival)
    out = np.interp(target, neg_log_s, x)
    beyond = target > neg_log_s[-1]
    out[beyond] = x[-1] + (target[beyond] - neg_log_s[-1]) * slope
    return out


def _clock_time(profile: tuple[float, ...] | None, u: FloatArray) -> FloatArray:
    """Time within the day (fraction of a day) from uniforms, by the hour profile."""
    if profile is None:
        return u
    cumulative = np.cumsum(profile)
    cumulative[-1] = 1.0
    hour = np.minimum(np.searchsorted(cumulative, u, side="right"), 23)
    start = np.where(hour > 0, cumulative[hour - 1], 0.0)
    within = np.clip((u - start) / np.asarray(profile)[hour], 0.0, 1.0 - 1e-12)
    return (hour + within) / 24.0


def _daily_counts(
    stream: DemandStream | ElectiveList,
    inp: PlanningInput,
    replication: int,
    weekday: IntArray,
) -> tuple[IntArray, npt.NDArray[np.bool_] | None]:
    """Arrivals per day, and for an elective list which booked slots go ahead (K x days)."""
    n_days = weekday.size
    if isinstance(stream, DemandStream):
        mean = np.asarray(stream.rate_by_weekday)[weekday]
        # Inverse-CDF counts: a higher rate gives at least as many arrivals from the same u.
        u = np.maximum(_generator(inp, replication, stream.name, _COUNT).random(n_days), 1e-300)
        if stream.dispersion is None:
            counts = stats.poisson.ppf(u, mean)
        else:
            size = stream.dispersion
            counts = stats.nbinom.ppf(u, size, size / (size + mean))
        return counts.astype(np.int64), None
    booked = np.asarray(stream.booked_by_weekday)[weekday]
    whole = np.floor(booked)
    extra = _generator(inp, replication, stream.name, _BOOKED).random(n_days) < booked - whole
    n_booked = (whole + extra).astype(np.int64)
    slots = int(n_booked.max(initial=0))
    goes_ahead = (
        _generator(inp, replication, stream.name, _CANCEL).random((slots, n_days))
        >= stream.cancellation
    )
    booked_slot = np.arange(slots)[:, None] < n_booked[None, :]
    return n_booked, goes_ahead & booked_slot


def draw_demand(inp: PlanningInput, replication: int) -> Demand:
    """Draw one replication's arrivals, groups and stays (see "Common random numbers").

    Parameters
    ----------
    inp : PlanningInput
    replication : int
        0-based replication number (part of the random-number key).

    Returns
    -------
    Demand
        Over warm-up plus measured days, sorted by arrival time.
    """
    n_days = inp.resolved_warmup_days() + inp.days
    weekday = (inp.start_weekday + np.arange(n_days)) % 7
    group_index = {g.name: i for i, g in enumerate(inp.groups)}
    times, stays, streams, groups = [], [], [], []
    for s_index, stream in enumerate(inp.streams):
        checkpoint()
        counts, present = _daily_counts(stream, inp, replication, weekday)
        slots = int(counts.max(initial=0))
        if present is None:
            present = np.arange(slots)[:, None] < counts[None, :]
        # One row of uniforms per slot k (k-th arrival of each day), drawn row by row, so the
        # rows a smaller count uses are the same whatever the largest count is.
        hour_u = _generator(inp, replication, stream.name, _HOUR).random((slots, n_days))
        group_u = _generator(inp, replication, stream.name, _GROUP).random((slots, n_days))
        stay_u = 1.0 - _generator(inp, replication, stream.name, _STAY).random((slots, n_days))
        day = np.broadcast_to(np.arange(n_days, dtype=float), (slots, n_days))[present]
        time = day + _clock_time(stream.hour_profile, hour_u[present])
        names = [n for n, _ in stream.group_weights]
        cumulative = np.cumsum([w for _, w in stream.group_weights])
        cumulative[-1] = 1.0
        choice = np.minimum(
            np.searchsorted(cumulative, group_u[present], side="right"), len(names) - 1
        )
        survival = stay_u[present]
        stay = np.empty(time.size)
        group = np.empty(time.size, dtype=np.int64)
        for j, name in enumerate(names):
            chosen = choice == j
            stay[chosen] = _stay_quantile(inp.groups[group_index[name]].stay, survival[chosen])
            group[chosen] = group_index[name]
        times.append(time)
        stays.append(stay)
        streams.append(np.full(time.size, s_index, dtype=np.int64))
        groups.append(group)
    time_all = np.concatenate(times)
    order = np.argsort(time_all, kind="stable")
    return Demand(
        time=time_all[order],
        stay=np.concatenate(stays)[order],
        stream=np.concatenate(streams)[order],
        group=np.concatenate(groups)[order],
        n_days=n_days,
    )


# ---------------------------------------------------------------------------------------------
# The loss system and what is measured
# ---------------------------------------------------------------------------------------------


def _turned_away(time: list[float], leave: list[float], beds: int) -> list[int]:
    """Indices of arrivals that find all ``beds`` occupied (arrivals in time order).

    A heap of the admitted patients' leaving times; O(n log beds). A patient leaving at the
    very instant of an arrival frees the bed for it.
    """
    if len(time) != len(leave):
        raise ValueError(f"time and leave differ in length: {len(time)} and {len(leave)}")
    occupied: list[float] = []
    refused: list[int] = []
    push, pop = heapq.heappush, heapq.heappop
    arrivals = enumerate(zip(time, leave))  # noqa: B905 (lengths checked above)
    # In chunks, so the caller's cancellation check stays out of the per-arrival loop.
    for _ in range(0, len(time), _CHECK_EVERY):
        checkpoint()
        for i, (t, d) in islice(arrivals, _CHECK_EVERY):
            while occupied and occupied[0] <= t:
                pop(occupied)
            if len(occupied) < beds:
                push(occupied, d)
            else:
                refused.append(i)
    return refused


@dataclass(frozen=True)
class _Prepared:
    demand: Demand
    leave: FloatArray
    time_list: list[float] = field(repr=False)
    leave_list: list[float] = field(repr=False)


def _prepare(demand: Demand) -> _Prepared:
    leave = demand.time + demand.stay
    return _Prepared(demand, leave, demand.time.tolist(), leave.tolist())


def _measure(
    inp: PlanningInput, prepared: _Prepared, beds: int | None
) -> tuple[dict[str, float], IntArray]:
    """One replication's figures for one bed count, and its census counts."""
    checkpoint()
    demand = prepared.demand
    admitted = np.ones(demand.time.size, dtype=bool)
    if beds is not None:
        admitted[_turned_away(prepared.time_list, prepared.leave_list, beds)] = False
    start = float(inp.resolved_warmup_days())
    end = start + inp.days
    in_window = (demand.time >= start) & (demand.time < end)
    arrived = int(in_window.sum())
    refused = in_window & ~admitted

    came_in = demand.time[admitted]
    went_out = prepared.leave[admitted]
    overlap = np.clip(np.minimum(went_out, end) - np.maximum(came_in, start), 0.0, None)
    census_at = start + np.arange(inp.days) + inp.census_hour / 24.0
    census = np.searchsorted(came_in, census_at, side="right") - np.searchsorted(
        np.sort(went_out), census_at, side="right"
    )
    refused_days = np.unique(np.floor(demand.time[refused] - start)).size

    values: dict[str, float] = {"mean_occupancy": float(overlap.sum() / inp.days)}
    if beds is not None:
        values["occupancy_rate"] = values["mean_occupancy"] / beds
    values["mean_census"] = float(census.mean())
    values["arrivals_per_day"] = arrived / inp.days
    if beds is None:
        # Nobody is turned away without a bed limit: the refusal figures would be zeros.
        return values, census.astype(np.int64)
    values["share_turned_away"] = float(refused.sum() / arrived) if arrived else 0.0
    stream_type = np.asarray([s.admission_type for s in inp.streams], dtype=object)
    arrival_type = stream_type[demand.stream]
    for kind in inp.admission_types():
        of_kind = in_window & (arrival_type == kind)
        n_kind = int(of_kind.sum())
        values[f"share_turned_away_{kind}"] = (
            float((of_kind & refused).sum() / n_kind) if n_kind else 0.0
        )
    values["share_days_turning_away"] = refused_days / inp.days
    values["share_days_full_at_census"] = float(np.mean(census >= beds))
    values["turned_away_per_day"] = float(refused.sum()) / inp.days
    return values, census.astype(np.int64)


# ---------------------------------------------------------------------------------------------
# Results
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Estimate:
    """A mean over replications and its confidence interval.

    Attributes
    ----------
    mean : float
    ci_low, ci_high : float
        Student-t interval mean -/+ t_{(1+level)/2, n-1} s / sqrt(n).
    level : float
    n : int
        Replications.
    """

    mean: float
    ci_low: float
    ci_high: float
    level: float
    n: int

    def contains(self, value: float) -> bool:
        """Whether ``value`` lies in the interval (inclusive)."""
        return self.ci_low <= value <= self.ci_high

    @property
    def half_width(self) -> float:
        """Half the interval's width."""
        return (self.ci_high - self.ci_low) / 2.0


def t_interval(values: npt.ArrayLike, level: float = 0.95) -> Estimate:
    """Mean of independent replications with a Student-t confidence interval.

    Parameters
    ----------
    values : array_like, shape (n,)
        One figure per replication, n >= 2.
    level : float, default 0.95

    Returns
    -------
    Estimate
    """
    x = np.asarray(values, dtype=float).reshape(-1)
    if x.size < 2:
        raise ValueError(f"values: needs at least 2 replications, got {x.size}")
    if not np.all(np.isfinite(x)):
        raise ValueError("values: must be finite")
    if not 0 < level < 1:
        raise ValueError(f"level: must be in (0, 1), got {level!r}")
    mean = float(x.mean())
    half = float(stats.t.ppf(0.5 + level / 2.0, x.size - 1) * x.std(ddof=1) / math.sqrt(x.size))
    return Estimate(mean=mean, ci_low=mean - half, ci_high=mean + half, level=level, n=x.size)


@dataclass(frozen=True, eq=False)
class PlanningResult:
    """Figures of every replication of one simulation, and their summaries.

    Attributes
    ----------
    beds : int or None
        Beds simulated (None: no limit).
    days, warmup_days, replications : int
    offered_load : float
        Expected arrivals per day x mean stay (Erlangs), from the input.
    values : mapping of str to tuple of float
        Metric name -> one value per replication (the names are in the module docstring).
    census_counts : tuple of tuple of int
        Per replication, the number of census instants at which k beds were occupied, k = 0..K
        (K the largest seen in any replication, or ``beds``).
    """

    beds: int | None
    days: int
    warmup_days: int
    replications: int
    offered_load: float
    values: Mapping[str, tuple[float, ...]]
    census_counts: tuple[tuple[int, ...], ...]

    @property
    def metrics(self) -> tuple[str, ...]:
        """Metric names, in report order."""
        return tuple(self.values)

    def estimate(self, metric: str, level: float = 0.95) -> Estimate:
        """Mean and confidence interval of ``metric`` over the replications."""
        if metric not in self.values:
            raise ValueError(f"metric: unknown {metric!r}; known are {self.metrics!r}")
        return t_interval(self.values[metric], level)

    def summary(self, level: float = 0.95) -> pd.DataFrame:
        """One row per metric: metric, mean, ci_low, ci_high."""
        rows = []
        for name in self.metrics:
            e = self.estimate(name, level)
            rows.append({"metric": name, "mean": e.mean, "ci_low": e.ci_low, "ci_high": e.ci_high})
        return pd.DataFrame(rows, columns=["metric", "mean", "ci_low", "ci_high"])

    def occupancy_pmf(self) -> FloatArray:
        """Share of census instants with k beds occupied, k = 0..K, pooled over replications."""
        counts = np.asarray(self.census_counts, dtype=float)
        return counts.sum(axis=0) / counts.sum()

    def occupancy_table(self, level: float = 0.95) -> pd.DataFrame:
        """The census distribution with a t interval per k: census, share, ci_low, ci_high."""
        counts = np.asarray(self.census_counts, dtype=float)
        shares = counts / counts.sum(axis=1, keepdims=True)
        rows = []
        for k in range(shares.shape[1]):
            e = t_interval(shares[:, k], level)
            rows.append({"census": k, "share": e.mean, "ci_low": max(e.ci_low, 0.0),
                         "ci_high": min(e.ci_high, 1.0)})
        return pd.DataFrame(rows, columns=["census", "share", "ci_low", "ci_high"])

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict; exact round trip with :meth:`from_dict`."""
        return {
            "beds": self.beds,
            "days": self.days,
            "warmup_days": self.warmup_days,
            "replications": self.replications,
            "offered_load": self.offered_load,
            "values": {k: list(v) for k, v in self.values.items()},
            "census_counts": [list(c) for c in self.census_counts],
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> PlanningResult:
        """Inverse of :meth:`to_dict`."""
        return cls(
            beds=None if data["beds"] is None else int(data["beds"]),
            days=int(data["days"]),
            warmup_days=int(data["warmup_days"]),
            replications=int(data["replications"]),
            offered_load=float(data["offered_load"]),
            values={str(k): tuple(float(x) for x in v) for k, v in data["values"].items()},
            census_counts=tuple(tuple(int(x) for x in c) for c in data["census_counts"]),
        )


def _collect(
    inp: PlanningInput,
    beds: int | None,
    per_replication: Sequence[tuple[dict[str, float], IntArray]],
) -> PlanningResult:
    names = list(per_replication[0][0])
    values = {n: tuple(float(v[n]) for v, _ in per_replication) for n in names}
    width = max(int(c.max(initial=0)) for _, c in per_replication) + 1
    if beds is not None:
        width = max(width, beds + 1)
    counts = tuple(
        tuple(int(x) for x in np.bincount(c, minlength=width)) for _, c in per_replication
    )
    return PlanningResult(
        beds=beds,
        days=inp.days,
        warmup_days=inp.resolved_warmup_days(),
        replications=inp.replications,
        offered_load=inp.offered_load(),
        values=values,
        census_counts=counts,
    )


def _prepared_demands(inp: PlanningInput) -> list[_Prepared]:
    return [_prepare(draw_demand(inp, r)) for r in range(inp.replications)]


def simulate(inp: PlanningInput) -> PlanningResult:
    """Simulate the unit ``inp.replications`` times and collect the figures.

    Parameters
    ----------
    inp : PlanningInput
        ``inp.beds`` None simulates no bed limit (offered occupancy).

    Returns
    -------
    PlanningResult
    """
    demands = _prepared_demands(inp)
    return _collect(inp, inp.beds, [_measure(inp, d, inp.beds) for d in demands])


# ---------------------------------------------------------------------------------------------
# Beds: the whole curve, and the number needed
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class CapacityCurve:
    """Simulated figures for a range of bed counts, on the same demand.

    Attributes
    ----------
    offered_load : float
        Erlangs.
    results : tuple of PlanningResult
        One per bed count, increasing.
    """

    offered_load: float
    results: tuple[PlanningResult, ...]

    @property
    def beds(self) -> tuple[int, ...]:
        """Bed counts, increasing."""
        return tuple(int(r.beds) for r in self.results if r.beds is not None)

    def result(self, beds: int) -> PlanningResult:
        """The result for ``beds`` beds."""
        for r in self.results:
            if r.beds == beds:
                return r
        raise ValueError(f"beds: {beds!r} is not on the curve ({self.beds!r})")

    def to_frame(self, level: float = 0.95) -> pd.DataFrame:
        """One row per bed count, for the planning plot.

        Columns: beds; for share_turned_away, mean_occupancy, occupancy_rate and
        share_days_turning_away the mean and ``_low`` / ``_high`` interval bounds; erlang_b
        (the Erlang loss formula at the offered load, for comparison).
        """
        rows = []
        for r in self.results:
            assert r.beds is not None
            row: dict[str, float] = {"beds": r.beds}
            for name in ("share_turned_away", "mean_occupancy", "occupancy_rate",
                         "share_days_turning_away"):
                e = r.estimate(name, level)
                row[name], row[f"{name}_low"], row[f"{name}_high"] = e.mean, e.ci_low, e.ci_high
            row["erlang_b"] = erlang_b(r.beds, self.offered_load)
            rows.append(row)
        return pd.DataFrame(rows)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict; exact round trip with :meth:`from_dict`."""
        return {"offered_load": self.offered_load, "results": [r.to_dict() for r in self.results]}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> CapacityCurve:
        """Inverse of :meth:`to_dict`."""
        return cls(
            offered_load=float(data["offered_load"]),
            results=tuple(PlanningResult.from_dict(r) for r in data["results"]),
        )


def _default_bed_range(inp: PlanningInput) -> range:
    load = inp.offered_load()
    low = max(1, math.floor(0.6 * load))
    high = max(low + 1, beds_for_blocking(load, 1e-3) + 2)
    return range(low, high + 1)


def capacity_curve(
    inp: PlanningInput,
    beds: Iterable[int] | None = None,
    *,
    progress: Callable[[int, int], None] | None = None,
) -> CapacityCurve:
    """Simulate every bed count in ``beds`` on the same demand (common random numbers).

    Parameters
    ----------
    inp : PlanningInput
        ``inp.beds`` is ignored.
    beds : iterable of int, optional
        Bed counts (>= 1). Default: from 60% of the offered load up to two beds past the
        Erlang loss formula's count for 0.1% turned away.
    progress : callable, optional
        Called as ``progress(done, total)`` after each replication's demand is drawn and each
        bed count is measured (for a progress bar on long runs).

    Returns
    -------
    CapacityCurve
    """
    counts = sorted({int(b) for b in (_default_bed_range(inp) if beds is None else beds)})
    if not counts or counts[0] < 1:
        raise ValueError(f"beds: needs bed counts >= 1, got {counts!r}")
    total = inp.replications + len(counts)
    demands = []
    for r in range(inp.replications):
        demands.append(_prepare(draw_demand(inp, r)))
        if progress is not None:
            progress(r + 1, total)
    results = []
    for i, c in enumerate(counts):
        results.append(_collect(inp, c, [_measure(inp, d, c) for d in demands]))
        if progress is not None:
            progress(inp.replications + i + 1, total)
    return CapacityCurve(offered_load=inp.offered_load(), results=tuple(results))


@dataclass(frozen=True, eq=False)
class BedsNeeded:
    """The smallest bed count that keeps the share turned away under a target.

    Attributes
    ----------
    target : float
        Largest acceptable share of arrivals finding no bed.
    beds : int
        Smallest bed count whose simulated mean share turned away is <= target, as is every
        larger count on the curve.
    beds_confident : int
        Smallest bed count whose upper confidence bound is <= target (the cautious answer).
    erlang_beds : int
        The Erlang loss formula's answer for the same offered load (Poisson arrivals at a flat
        rate); a weekday pattern, booked lists and overdispersion usually need more.
    offered_load : float
    curve : CapacityCurve
        Every bed count simulated in the search.
    level : float
        Confidence level of ``beds_confident``.
    """

    target: float
    beds: int
    beds_confident: int
    erlang_beds: int
    offered_load: float
    curve: CapacityCurve
    level: float

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict; exact round trip with :meth:`from_dict`."""
        return {
            "target": self.target,
            "beds": self.beds,
            "beds_confident": self.beds_confident,
            "erlang_beds": self.erlang_beds,
            "offered_load": self.offered_load,
            "curve": self.curve.to_dict(),
            "level": self.level,
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> BedsNeeded:
        """Inverse of :meth:`to_dict`."""
        return cls(
            target=float(data["target"]),
            beds=int(data["beds"]),
            beds_confident=int(data["beds_confident"]),
            erlang_beds=int(data["erlang_beds"]),
            offered_load=float(data["offered_load"]),
            curve=CapacityCurve.from_dict(data["curve"]),
            level=float(data["level"]),
        )


def beds_needed(
    inp: PlanningInput,
    target: float = 0.05,
    *,
    level: float = 0.95,
    max_beds: int | None = None,
) -> BedsNeeded:
    """Smallest bed count whose share of arrivals finding no bed is at most ``target``.

    Starts at the Erlang loss formula's answer and walks down while the simulated share stays
    under the target, then up until both the mean and the upper confidence bound are under
    it. Every bed count is simulated on the same demand (common random numbers), so the
    curve is smooth and the search needs few steps.

    Parameters
    ----------
    inp : PlanningInput
        ``inp.beds`` is ignored.
    target : float, default 0.05
        In (0, 1).
    level : float, default 0.95
        Confidence level for ``beds_confident``.
    max_beds : int, optional
        Search limit (default: four times the Erlang answer plus 20); exceeding it raises.

    Returns
    -------
    BedsNeeded
    """
    if not (math.isfinite(target) and 0 < target < 1):
        raise ValueError(f"target: must be in (0, 1), got {target!r}")
    load = inp.offered_load()
    erlang_beds = beds_for_blocking(load, target)
    limit = 4 * erlang_beds + 20 if max_beds is None else int(max_beds)
    demands = _prepared_demands(inp)
    done: dict[int, PlanningResult] = {}

    def share(c: int) -> Estimate:
        if c not in done:
            done[c] = _collect(inp, c, [_measure(inp, d, c) for d in demands])
        return done[c].estimate("share_turned_away", level)

    c = max(1, erlang_beds)
    while c > 1 and share(c).mean <= target:
        c -= 1
    while share(c).mean > target or share(c).ci_high > target:
        c += 1
        if c > limit:
            raise ValueError(
                f"max_beds: more than {limit} beds needed for target={target!r} "
                f"(offered load {load:.3g} Erlangs)"
            )
    counts = sorted(done)
    curve = CapacityCurve(offered_load=load, results=tuple(done[b] for b in counts))
    under = [share(b).mean <= target for b in counts]
    under_ci = [share(b).ci_high <= target for b in counts]
    return BedsNeeded(
        target=float(target),
        beds=_first_of_tail(counts, under),
        beds_confident=_first_of_tail(counts, under_ci),
        erlang_beds=erlang_beds,
        offered_load=load,
        curve=curve,
        level=level,
    )


def _first_of_tail(counts: Sequence[int], ok: Sequence[bool]) -> int:
    """The smallest count from which every larger count is ok (the last one is ok)."""
    first = counts[-1]
    for c, good in zip(reversed(counts), reversed(ok), strict=True):
        if not good:
            break
        first = c
    return first


def demand_scale_for_occupancy(
    inp: PlanningInput,
    target: float,
    *,
    admission_type: str | None = None,
    tolerance: float = 0.002,
    max_iterations: int = 30,
) -> float:
    """The factor on arrival rates that makes the simulated occupancy rate equal ``target``.

    For example, the demand a unit of ``inp.beds`` beds carries at 85% mean occupancy. Solved
    by the Illinois variant of regula falsi on the simulated occupancy rate (common random
    numbers make it a smooth, increasing function of the factor), started from the Erlang loss
    formula's answer.

    Parameters
    ----------
    inp : PlanningInput
        Needs ``beds``.
    target : float
        Mean occupancy rate in (0, 1).
    admission_type : str, optional
        Scale only the streams of this type (rates, or booked lists); default all.
    tolerance : float, default 0.002
        Stop when the simulated occupancy rate is within this of ``target``.
    max_iterations : int, default 30

    Returns
    -------
    float
        The factor; apply it with :func:`scale_arrivals` (or a ``ScaleArrivals`` scenario).
    """
    if inp.beds is None:
        raise ValueError("inp: beds must be set to aim at an occupancy rate")
    if not (math.isfinite(target) and 0 < target < 1):
        raise ValueError(f"target: must be in (0, 1), got {target!r}")
    beds = int(inp.beds)

    def occupancy(factor: float) -> float:
        scaled = scale_arrivals(inp, factor, admission_type=admission_type)
        return simulate(scaled).estimate("occupancy_rate").mean - target

    load = inp.offered_load()
    if admission_type is None:
        scaled_part = load
    else:
        scaled_part = sum(
            s.expected_by_weekday().mean() * inp.mean_stay(s)
            for s in inp.streams
            if s.admission_type == admission_type
        )
        if scaled_part == 0:
            raise ValueError(f"admission_type: no stream of type {admission_type!r}")
    # Erlang: the offered load whose carried load is target * beds (mean_occupancy increases
    # in the load up to 1, so bisection on the load finds it).
    lo_load, hi_load = 0.0, float(beds)
    while mean_occupancy(beds, hi_load) < target:
        hi_load *= 2.0
    for _ in range(100):
        mid = (lo_load + hi_load) / 2.0
        lo_load, hi_load = (mid, hi_load) if mean_occupancy(beds, mid) < target else (lo_load, mid)
    guess = max((lo_load - (load - scaled_part)) / scaled_part, 1e-3)

    a, fa = guess, occupancy(guess)
    if abs(fa) <= tolerance:
        return a
    b = a * (1.1 if fa < 0 else 0.9)
    fb = occupancy(b)
    widenings = 0
    while fa * fb > 0:  # widen until the target is bracketed
        widenings += 1
        if widenings > max_iterations:
            raise ValueError(f"target: occupancy {target!r} not bracketed by arrival factors "
                             f"up to {b!r}")
        a, fa = b, fb
        b = b * (1.25 if fb < 0 else 0.8)
        fb = occupancy(b)
    for _ in range(max_iterations):
        c = (a * fb - b * fa) / (fb - fa)
        fc = occupancy(c)
        if abs(fc) <= tolerance:
            return c
        if fc * fb < 0:
            a, fa = b, fb
        else:
            # Illinois step: halve the kept end's value so regula falsi cannot stall on it.
            fa = fa / 2.0
        b, fb = c, fc
    raise ValueError(
        f"target: occupancy {target!r} not reached within {max_iterations} iterations"
    )
