"""The demand of a unit for capacity planning, read from its trained model.

The planning simulation (``app.stats.planning``) replays months of demand on a given number of
beds. Everything it replays comes from the unit's stored model and from what was known when
that model was trained, never from later data:

Patient groups
    The admission groups of the length-of-stay model (``los.groups``: a log-rank tree on what
    is known at admission), each with its BIC-chosen Coxian stay distribution. They are named
    ``G1``, ``G2``, ... in the tree's order; the rule text is kept for display.
Emergency admissions
    The fitted daily count model (Poisson GLM, or negative binomial where the counts were
    overdispersed; ``app.stats.arrivals``). The simulation's rates vary by weekday only, so
    each weekday's rate is the model's mean over the 52 such weekdays of the year after the
    model's cut-off: the seasonal cycle averaged out, the weekday pattern kept. The negative
    binomial size (1 / alpha) is kept as the stream's dispersion. Arrival clock hours follow
    the model's hourly profile; arrivals fall into groups by each group's share of emergency
    stays.
Booked electives
    The arrivals payload holds what the 7-day forecast needs (the chance a booking still open
    L days ahead goes ahead, electives not yet booked by weekday and lead), not the size of the
    booked list by weekday. So the list is counted from the unit's history as known at the
    model's ``trained_until``: bookings planned for each weekday over the same recent window
    the arrivals model uses (``ELECTIVE_WINDOW_DAYS``), and as the cancellation probability the
    share of those bookings that did not become an admission (cancelled or not come). Elective
    admissions without a booking in that window form a separate Poisson stream by weekday.
Transfers in
    Patients passed on from another unit of the hospital, which a model trained with the
    hospital's units keeps apart from its emergency stream: one stream per sending unit
    (:func:`transfer_streams`), so the unit planned alone still receives them.
Beds and census
    The staffed beds on the day planned from (the bed plan), and the unit's census clock time.

What is not carried over: the season and any trend (scale a stream for a winter scenario),
and the weekday effect on discharges (stays run for their drawn length).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import date, datetime, timedelta
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
from sqlalchemy.orm import Session

from app.forecast.arrivals import ELECTIVE_WINDOW_DAYS, _window, emergency_rate
from app.forecast.los import LosModel
from app.forecast.service import ModelRecord, model_for
from app.state import UnitState, load_state
from app.stats.arrivals import DailyRateModel
from app.stats.planning import DemandStream, ElectiveList, PatientGroup, PlanningInput

__all__ = ["UnitDemand", "build_planning_input", "transfer_streams", "unit_planning_input",
           "weekday_rates"]

DAYS_PER_YEAR_OF_WEEKDAYS = 364
EMERGENCY_STREAM = "emergency"
BOOKED_STREAM = "booked electives"
UNBOOKED_STREAM = "unbooked electives"
TRANSFER_STREAM = "transfers from"
# The admission type of the transfer streams in planning (their stays are emergency
# admissions in the data): a scenario of "10% more emergency admissions" leaves them alone,
# and "10% more transfer admissions" is a scenario of its own.
TRANSFER_TYPE = "transfer"


@dataclass(frozen=True, eq=False)
class UnitDemand:
    """A unit's planning input as known to one trained model, with what explains it.

    Attributes
    ----------
    unit : str
    model_id : str
    trained_until : datetime
    staffed_beds : int or None
        Beds in the bed plan on the day planned from (None: no plan).
    baseline : PlanningInput
        The current state: the groups, streams and ``staffed_beds``.
    group_rules : mapping of str to str
        Group name (``G1``...) -> the admission rule that defines it.
    elective_window : tuple of date, or None
        First and last day the booked list and the unbooked electives were counted over.
    """

    unit: str
    model_id: str
    trained_until: datetime
    staffed_beds: int | None
    baseline: PlanningInput
    group_rules: Mapping[str, str]
    elective_window: tuple[date, date] | None

    def group_label(self, name: str) -> str:
        """'G2: emergency admission, specialty ...' for tables and forms."""
        return f"{name}: {self.group_rules[name]}"

    def longest_group(self) -> str:
        """The group with the longest mean stay (the usual first target for shorter stays)."""
        return max(self.baseline.groups, key=lambda g: g.stay.mean()).name

    def groups_table(self) -> list[dict[str, Any]]:
        """Per group: name, rule, mean stay (days) and arrivals per day (all streams)."""
        per_day = {g.name: 0.0 for g in self.baseline.groups}
        for s in self.baseline.streams:
            daily = float(s.expected_by_weekday().mean())
            for name, weight in s.group_weights:
                per_day[name] += daily * weight
        return [{"name": g.name, "rule": self.group_rules[g.name],
                 "mean_stay": float(g.stay.mean()), "arrivals_per_day": per_day[g.name],
                 "offered_load": per_day[g.name] * float(g.stay.mean())}
                for g in self.baseline.groups]

    def streams_table(self) -> list[dict[str, Any]]:
        """Per stream: name, admission type, expected admissions by weekday and per day,
        mean stay and offered load (Erlangs)."""
        out = []
        for s in self.baseline.streams:
            by_weekday = s.expected_by_weekday()
            row: dict[str, Any] = {
                "name": s.name, "admission_type": s.admission_type,
                "admissions_by_weekday": [float(v) for v in by_weekday],
                "admissions_per_day": float(by_weekday.mean()),
                "mean_stay": self.baseline.mean_stay(s),
                "offered_load": float(by_weekday.mean()) * self.baseline.mean_stay(s)}
            if isinstance(s, ElectiveList):
                row["booked_by_weekday"] = list(s.booked_by_weekday)
                row["cancellation"] = s.cancellation
            else:
                row["dispersion"] = s.dispersion
            out.append(row)
        return out


def weekday_rates(arrivals: Mapping[str, Any], start: date,
                  days: int = DAYS_PER_YEAR_OF_WEEKDAYS, *,
                  rate: DailyRateModel | None = None) -> tuple[float, ...]:
    """Mean expected emergency admissions per day by weekday (Monday first) over ``days``
    days from ``start`` (a whole number of weeks: each weekday equally often); of ``rate``
    instead of the emergency stream's when given."""
    if days <= 0 or days % 7:
        raise ValueError(f"days: must be a positive multiple of 7, got {days!r}")
    rate = emergency_rate(arrivals) if rate is None else rate
    span = [start + timedelta(days=i) for i in range(days)]
    means = np.asarray(rate.mean(span), dtype=float)
    weekday = np.asarray([d.weekday() for d in span])
    return tuple(float(means[weekday == w].mean()) for w in range(7))


def transfer_streams(record: ModelRecord, start: date, *, exclude: Sequence[str] = ()
                     ) -> list[DemandStream]:
    """The unit's transfers in from other units, one Poisson or negative binomial stream per
    sending unit (not in ``exclude``), as its model learnt them.

    A model trained with the hospital's units leaves the patients passed on from another unit
    out of its emergency stream (``arrivals["emergency"]["not_from"]``) and keeps them as a
    stream of their own per sender (``arrivals["transfers_in"]``); planning the unit alone
    puts them back as arrivals. Their patients fall into the unit's groups as its stays that
    came from that sender did (``routing.received_groups``), else by the emergency shares.
    Their admission type is ``TRANSFER_TYPE``.
    """
    from app.forecast.routing import Routing

    arrivals = record.payload["arrivals"]
    streams: list[DemandStream] = []
    los = LosModel.from_payload(record.payload)
    names = _group_names(los)
    routing = Routing.from_payload(record.payload)
    fallback = _weights(los, names, "emergency") or tuple((n, 1.0) for n in names.values())
    for sender, stream in sorted(arrivals.get("transfers_in", {}).items()):
        if sender in exclude:
            continue
        rate = DailyRateModel.from_dict(stream["rate"])
        found = {} if routing is None else routing.received_groups(sender)
        weights = tuple((names[g], w) for g, w in found.items() if g in names and w > 0)
        streams.append(DemandStream(
            f"{TRANSFER_STREAM} {sender}", TRANSFER_TYPE,
            weekday_rates(arrivals, start, rate=rate), weights or fallback,
            dispersion=rate.size, hour_profile=tuple(stream["hour_profile"])))
    return streams


def _group_names(los: LosModel) -> dict[int, str]:
    return {g.node: f"G{i}" for i, g in enumerate(los.groups.groups, start=1)}


def _weights(los: LosModel, names: Mapping[int, str], admission_type: str
             ) -> tuple[tuple[str, float], ...]:
    """Each group's share of the admission type's stays (groups with none left out)."""
    return tuple((names[g.node], float(g.share.get(admission_type, 0.0)))
                 for g in los.groups.groups if float(g.share.get(admission_type, 0.0)) > 0)


def _electives(state: UnitState) -> tuple[tuple[float, ...], float, tuple[float, ...],
                                          tuple[date, date]]:
    """Booked list by weekday, its cancellation share, unbooked electives by weekday, window.

    Counted over whole local days before the state's cut-off (``state`` is as known at the
    model's ``trained_until``), so nothing later enters.
    """
    first, last = _window(state, ELECTIVE_WINDOW_DAYS)
    n_days = np.bincount([(first + timedelta(days=i)).weekday()
                          for i in range(max((last - first).days + 1, 0))], minlength=7)
    per_weekday = np.maximum(n_days, 1).astype(float)
    bookings = state.bookings
    planned = bookings["planned_date"]
    in_window = bookings.loc[(planned >= first) & (planned <= last)]
    admitted = set(state.stays["booking_id"].dropna())
    booked_counts = np.bincount([d.weekday() for d in in_window["planned_date"]], minlength=7)
    went = in_window["booking_id"].isin(admitted)
    cancellation = float(1.0 - went.mean()) if len(in_window) else 0.0

    stays = state.stays
    elective = stays.loc[(stays["admission_type"] != "emergency") & stays["booking_id"].isna()]
    admitted_day = elective["admitted_at"].dt.tz_convert(state.tz).dt.date
    unbooked = admitted_day.loc[(admitted_day >= first) & (admitted_day <= last)]
    unbooked_counts = np.bincount([d.weekday() for d in unbooked], minlength=7)
    return (tuple(float(v) for v in booked_counts / per_weekday), cancellation,
            tuple(float(v) for v in unbooked_counts / per_weekday), (first, last))


def build_planning_input(record: ModelRecord, history: UnitState, *, beds: int | None,
                         days: int = 730, replications: int = 20, seed: int = 0,
                         warmup_days: int | None = None) -> UnitDemand:
    """The planning input of a unit from its model and the history known when it was trained.

    Parameters
    ----------
    record : ModelRecord
        The unit's stored model.
    history : UnitState
        ``load_state(..., record.trained_until, with_history=True)``: what was known at the
        model's cut-off. A later state is refused (it would let later data in).
    beds : int or None
        Beds of the baseline (None: no limit).
    days, replications, seed, warmup_days
        Passed to :class:`app.stats.planning.PlanningInput`.

    Returns
    -------
    UnitDemand
    """
    if history.as_of > pd.Timestamp(record.trained_until):
        raise ValueError(f"history: known at {history.as_of}, after the model's cut-off "
                         f"{record.trained_until}; load it as of trained_until")
    los = LosModel.from_payload(record.payload)
    arrivals = record.payload["arrivals"]
    names = _group_names(los)
    groups = tuple(PatientGroup(names[g.node], g.distribution) for g in los.groups.groups)
    rules = {names[g.node]: g.rule for g in los.groups.groups}
    start = record.trained_until.astimezone(history.tz).date()

    streams: list[DemandStream | ElectiveList] = []
    emergency_weights = _weights(los, names, "emergency")
    if emergency_weights:
        rate = emergency_rate(arrivals)
        streams.append(DemandStream(
            EMERGENCY_STREAM, "emergency", weekday_rates(arrivals, start), emergency_weights,
            dispersion=rate.size, hour_profile=tuple(arrivals["emergency"]["hour_profile"])))
    elective_weights = _weights(los, names, "elective")
    window = None
    if elective_weights:
        booked, cancellation, unbooked, window = _electives(history)
        elective_hours = tuple(arrivals["elective"]["hour_profile"])
        if sum(booked) > 0:
            streams.append(ElectiveList(BOOKED_STREAM, booked, elective_weights,
                                        cancellation=cancellation, hour_profile=elective_hours))
        if sum(unbooked) > 0:
            streams.append(DemandStream(UNBOOKED_STREAM, "elective", unbooked, elective_weights,
                                        hour_profile=elective_hours))
    streams += transfer_streams(record, start)
    census = los.census_time
    baseline = PlanningInput(groups=groups, streams=tuple(streams), beds=beds, days=days,
                             warmup_days=warmup_days, replications=replications, seed=seed,
                             census_hour=census.hour + census.minute / 60.0,
                             start_weekday=start.weekday())
    return UnitDemand(unit=history.unit, model_id=record.id,
                      trained_until=record.trained_until, staffed_beds=beds, baseline=baseline,
                      group_rules=rules, elective_window=window)


def unit_planning_input(session: Session, unit: str, as_of: datetime, tz: ZoneInfo, *,
                        days: int = 730, replications: int = 20, seed: int = 0,
                        record: ModelRecord | None = None) -> UnitDemand:
    """The planning input from the newest model usable at ``as_of`` (``NoModel`` if none;
    or from ``record`` when given), with the staffed beds of ``as_of``'s day as the
    baseline's beds."""
    if record is None:
        record = model_for(session, unit, as_of)
    history = load_state(session, unit, record.trained_until, tz, with_history=True)
    # A unit closed today (0 staffed beds) is planned as one without a bed plan: the
    # comparison then uses the beds needed instead of a count the simulation cannot run.
    beds = history.beds_on(as_of.astimezone(tz).date()) or None
    return build_planning_input(record, history, beds=beds, days=days,
                                replications=replications, seed=seed)
