"""What a planning run is given: patient groups, demand streams, booked lists, scaling."""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from functools import lru_cache
from typing import Any

import numpy as np
import numpy.typing as npt

from app.stats.phasetype import Coxian, PhaseType, distribution_from_dict

FloatArray = npt.NDArray[np.float64]
StayDistribution = PhaseType | Coxian
WEEKDAYS = ("Mon", "Tue", "Wed", "Thu", "Fri", "Sat", "Sun")
# Automatic warm-up: starting empty, the expected occupancy still missing at time w is
# lambda * integral_w^inf S(u) du; warm up until that is below this share of lambda * mean stay.
_WARMUP_TOLERANCE = 1e-3
_MAX_WARMUP_WEEKS = 520


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
