"""Learning the admissions to come: emergency counts, bookings that go ahead, and electives
not yet booked, all from what was known at the training cut-off.

- Emergency admissions per local day: :func:`app.stats.arrivals.fit_daily_rate` (Poisson GLM
  with weekday and season, negative binomial only where overdispersed), and the clock-hour
  profile of their arrival.
- The unit's capacity: a full unit turns emergencies away (they go to another unit or
  hospital) and those leave no row in the files, so admitted counts understate the demand
  exactly when the unit is busy. The occupancy beyond its staffed beds at which the unit
  stops admitting most emergencies (``capacity_excess``: the admission chance by occupancy
  level, escalation beds; :mod:`app.stats.ceiling`) gives its ceiling, staffed beds + excess;
  the time the unit was at that ceiling was closed to emergencies. Both read the occupancy
  with recorded discharges moved earlier by an allowance for late recording learnt with the
  ceiling (a discharge written hours after the patient left counts them still in when the
  next emergency comes: the ceiling would come out too high and the unit too often full).
  The daily count is fitted with the share of the day open to admissions as its exposure
  (weighted by the arrival clock profile), and the clock profile is divided by each hour's
  open share: both then describe the demand, which the forecast thins again through the
  ceiling (:func:`app.stats.occupancy.occupancy_days`, ``limits``).
- Known bookings: the chance a booking still open ``L`` days before its planned date goes
  ahead, by lead ``L`` (cancellations grow near the day), and the clock-hour profile of
  elective admissions.
- Electives not yet booked at ``as_of`` still come for days further ahead (METHODS.md
  section 8): for a day ``L`` days ahead, the mean number of elective admissions on that
  weekday that were booked less than ``L`` days before, or never booked.
"""

from __future__ import annotations

from collections.abc import Callable, Collection, Mapping
from dataclasses import replace
from datetime import date, datetime, time, timedelta
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd

from app.forecast.los.constants import NS_PER_DAY
from app.forecast.training_data import TooLittleHistory
from app.state import UnitState
from app.state.extract import extract_start_ns
from app.state.frames import utc_ns
from app.stats.arrivals import (
    MIN_EXPOSURE,
    DailyRateModel,
    choose_demand_terms,
    fit_daily_rate,
    fit_terms,
    hourly_profile,
    level_multiplier,
)
from app.stats.ceiling import (
    ADMIT_SHARE,
    MIN_LEVEL_DAYS,
    Ceiling,
    Levels,
    best_ceiling,
    step_ceiling,
)
from app.timeutil import localize

MAX_LEAD = 28
FIT_WINDOW_DAYS = 2 * 365
# ``fit_daily_rate`` fits one effect per weekday: two weeks give each weekday two days.
MIN_WINDOW_DAYS = 14
ELECTIVE_WINDOW_DAYS = 26 * 7
# Resolution at which the unit's fullness is read from the stays (minutes).
OPEN_GRID_MINUTES = 15
NS_PER_MINUTE = 60 * 10**9


def _local(series: pd.Series, state: UnitState) -> pd.Series:
    return series.dt.tz_convert(state.tz)


def _window(state: UnitState, days: int) -> tuple[date, date]:
    """Whole local days before the cut-off day, at most ``days`` of them, where the history
    of admissions is complete.

    An extract of stays usually holds those discharged since some date, plus the stays then
    in progress: admissions before the record begins are only the long stays (left
    truncation), and counting them would drag the rate down. So the window starts the day
    after the record begins (app/state/extract.py) and after the first admission.
    """
    last = state.as_of.tz_convert(state.tz).date() - timedelta(days=1)
    first = last - timedelta(days=days - 1)
    earliest = state.stays["admitted_at"].min()      # local time keeps the order of instants
    if pd.notna(earliest):
        first = max(first, earliest.tz_convert(state.tz).date() + timedelta(days=1))
    start = extract_start_ns(state.stays, state.as_of.value)
    if start is not None:
        begun = pd.Timestamp(start, tz="UTC").tz_convert(state.tz).date()
        first = max(first, begun + timedelta(days=1))
    return first, last


def _daily_counts(admitted_local: pd.Series, first: date, last: date
                  ) -> tuple[list[date], np.ndarray]:
    """Admissions on each local day ``first``..``last`` (``admitted_local``: local times)."""
    n_days = (last - first).days + 1
    days = [first + timedelta(days=i) for i in range(n_days)]
    if n_days <= 0:
        return days, np.zeros(0, dtype=np.int64)
    # Local wall-clock days counted from ``first`` (nanoseconds of the naive local times).
    wall = admitted_local.dt.tz_localize(None).array.asi8
    day = np.floor_divide(wall - pd.Timestamp(first).value, NS_PER_DAY)
    inside = (day >= 0) & (day < n_days)
    return days, np.bincount(day[inside], minlength=n_days).astype(np.int64)


def _occupancy_at(state: UnitState, at_ns: np.ndarray, lag_minutes: int = 0) -> np.ndarray:
    """Stays in the unit at each instant (UTC ns), as known at ``state.as_of``: admitted at or
    before it and not discharged by then. ``lag_minutes``: every recorded discharge read that
    much earlier (never before its admission), the allowance for late recording
    (:mod:`app.stats.ceiling`)."""
    admitted_all = utc_ns(state.stays["admitted_at"])
    admitted = np.sort(admitted_all)
    gone = state.stays["discharged_at"].notna().to_numpy()
    discharged = utc_ns(state.stays["discharged_at"].dropna())
    if lag_minutes:
        discharged = np.maximum(discharged - int(lag_minutes) * NS_PER_MINUTE,
                                admitted_all[gone])
    discharged = np.sort(discharged)
    return (np.searchsorted(admitted, at_ns, side="right")
            - np.searchsorted(discharged, at_ns, side="right"))


def soft_excess(admitted_over: npt.ArrayLike, time_over: npt.ArrayLike,
                time_days: npt.ArrayLike, *, admit_share: float = ADMIT_SHARE,
                min_days: float = MIN_LEVEL_DAYS) -> int:
    """The ceiling beyond staffed beds learnt from the admission chance by occupancy level:
    the change point of the admissions per demand-day (:func:`app.stats.ceiling.step_ceiling`).

    ``admitted_over``: occupancy minus staffed beds just before each emergency admission;
    ``time_over`` and ``time_days``: the same level at instants of a regular grid and the days
    of demand each stands for (its share of the day's arrival clock profile). A hard ceiling c
    gives c (nothing admitted there), a night of escalation beds far above it does not move it
    (the maximum of the levels admitted at would). Without a level where arrivals are more
    likely turned away than admitted: the highest level admitted at, plus one."""
    return step_ceiling(admitted_over, time_over, time_days, admit_share=admit_share,
                        min_days=min_days).excess


def _beds_by_day(state: UnitState, first: date, last: date) -> list[int | None]:
    """Staffed beds on each local day ``first``..``last`` (None: not known)."""
    return [state.beds_on(first + timedelta(days=i)) for i in range((last - first).days + 1)]


def _quarter_hours(state: UnitState, first: date, last: date
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Every ``OPEN_GRID_MINUTES`` of the local days ``first``..``last``: the instants (UTC
    ns), each one's local day counted from ``first`` and its local clock hour (read off the
    local wall-clock nanoseconds)."""
    start = pd.Timestamp(localize(datetime.combine(first, time(0)), state.tz))
    stop = pd.Timestamp(localize(datetime.combine(last + timedelta(days=1), time(0)), state.tz))
    grid = pd.date_range(start, stop, freq=f"{OPEN_GRID_MINUTES}min", inclusive="left")
    wall = grid.tz_convert(state.tz).tz_localize(None).asi8
    day = np.clip((wall - pd.Timestamp(first).value) // NS_PER_DAY, 0, (last - first).days)
    return (np.asarray(grid.asi8, dtype=np.int64), day,
            (wall % NS_PER_DAY) // (60 * NS_PER_MINUTE))


def _admission_levels(state: UnitState, first: date, last: date,
                      senders: Collection[str] = (), *, passed_on: bool = False
                      ) -> Callable[[int], Levels] | None:
    """For :func:`app.stats.ceiling.best_ceiling`: the levels over staffed beds just before each
    emergency admission of the local days ``first``..``last`` and on the grid, with the grid's
    demand-days, read with a given recording-lag allowance (None: no admission with a bed
    count).

    Only the unit's own emergencies count, not patients passed on by ``senders``: those wait
    in the sending unit for a bed and come as soon as one frees, so they pile up just below
    the ceiling and make the level above it look closed. On the demo's surgical ward (which
    admits emergencies up to one patient over its staffed beds) its step-downs were 335 of
    the 372 emergency admissions found one below the staffed beds, and with them counted the
    ward was read as full at its staffed beds, where its own emergencies came in at the same
    rate as below (50 over 84 days of demand, 0.60 a day, against 0.62-0.78). With
    ``passed_on`` the levels are those of the patients passed on by ``senders`` instead:
    the ceiling they come in below (the ward's step-downs: its staffed beds)."""
    stays = state.stays
    local_day = _local(stays["admitted_at"], state).dt.date
    inside = ((local_day >= first) & (local_day <= last)).to_numpy()
    if not inside.any():
        return None
    beds = _beds_by_day(state, first, last)
    if all(b is None for b in beds):
        return None
    staffed = np.array([np.nan if b is None else float(b) for b in beds])
    read = inside & (passed_on_mask(stays, senders) if passed_on
                     else emergency_mask(stays, senders)).to_numpy()
    if not read.any():
        return None
    at_ns = utc_ns(stays["admitted_at"])[read]
    day_of = np.array([(d - first).days for d in local_day[read]], dtype=np.int64)
    grid_ns, grid_day, hour = _quarter_hours(state, first, last)
    profile = hourly_profile(_local(stays["admitted_at"], state)[read].dt.hour)
    days = profile[hour] * 24 * OPEN_GRID_MINUTES / 1440
    staffed_b, staffed_g = staffed[day_of], staffed[grid_day]
    known_b, known_g = ~np.isnan(staffed_b), ~np.isnan(staffed_g)
    if not known_b.any():
        return None

    def levels(lag_minutes: int) -> Levels:
        # Occupancy just before each admission: the count right after it, less the patient.
        before = _occupancy_at(state, at_ns, lag_minutes) - 1 - staffed_b
        level = _occupancy_at(state, grid_ns, lag_minutes) - staffed_g
        return (before[known_b].astype(np.int64), level[known_g].astype(np.int64),
                days[known_g])

    return levels


def learn_ceiling(state: UnitState, first: date, last: date,
                  senders: Collection[str] = ()) -> Ceiling | None:
    """The unit's ceiling beyond its staffed beds on the local days ``first``..``last`` (0 if
    it never went over) and the recording-lag allowance it is read with, from its own
    emergencies (not those passed on by ``senders``); None without a bed count
    (:func:`app.stats.ceiling.best_ceiling`)."""
    levels = _admission_levels(state, first, last, senders)
    return None if levels is None else best_ceiling(levels)


def learn_passed_on_ceiling(state: UnitState, first: date, last: date,
                            senders: Collection[str], lag_minutes: int) -> int | None:
    """The ceiling beyond staffed beds below which patients passed on by ``senders`` come in
    (None: none passed on in the window, or no bed count), read with the own emergencies'
    allowance for late recording. A passed-on patient waits in its unit for a bed; where the
    unit takes them only below its staffed beds and its own emergencies one bed further (the
    demo's surgical ward), one ceiling for both either lets the transfers fill the
    escalation bed or turns the own emergencies away from it."""
    levels = _admission_levels(state, first, last, senders, passed_on=True)
    if levels is None:
        return None
    return best_ceiling(levels, (lag_minutes,)).excess


def capacity_excess(state: UnitState, first: date, last: date,
                    senders: Collection[str] = ()) -> int | None:
    """The unit's ceiling beyond its staffed beds on the local days ``first``..``last`` (0 if it
    never went over); None without a bed count.

    Learnt from the emergency admission chance by occupancy level (:func:`learn_ceiling`), not
    from the single largest overflow, which one night of escalation beds would loosen for
    good, and with the occupancy read allowing for discharges recorded late."""
    found = learn_ceiling(state, first, last, senders)
    return None if found is None else found.excess


def open_shares(state: UnitState, first: date, last: date, excess: int,
                hour_weight: np.ndarray, lag_minutes: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Share of each local day ``first``..``last`` (weighted by ``hour_weight``, 24 values) and
    of each clock hour (over the whole window) that the unit was below its ceiling of staffed
    beds + ``excess``, read every ``OPEN_GRID_MINUTES`` minutes with recorded discharges moved
    ``lag_minutes`` earlier: the allowance for late recording the ceiling was learnt with
    (:func:`learn_ceiling`; on a simulated loss unit whose discharges are written 0-6 h late,
    the open share read from the recorded times was 0.52-0.55 where Erlang B gives 0.785,
    and 0.81-0.86 with the allowance: tests/stats/test_ceiling.py)."""
    grid_ns, day_index, hour = _quarter_hours(state, first, last)
    n_days = (last - first).days + 1
    ceiling = np.array([np.inf if b is None else b + excess
                        for b in _beds_by_day(state, first, last)], dtype=float)
    is_open = (_occupancy_at(state, grid_ns, lag_minutes) < ceiling[day_index]).astype(float)
    weight = np.asarray(hour_weight, dtype=float)[hour]
    by_day = (np.bincount(day_index, weights=weight * is_open, minlength=n_days)
              / np.maximum(np.bincount(day_index, weights=weight, minlength=n_days), 1e-300))
    by_hour = (np.bincount(hour, weights=is_open, minlength=24)
               / np.maximum(np.bincount(hour, minlength=24), 1))
    return np.clip(by_day, 0.0, 1.0), by_hour


def _demand_profile(admitted_hours: pd.Series, open_by_hour: np.ndarray) -> np.ndarray:
    """Clock-hour profile of the demand: the admitted profile over each hour's open share (an
    hour the unit was often full admitted fewer of the arrivals it was offered)."""
    admitted = hourly_profile(admitted_hours)
    demand = admitted / np.maximum(open_by_hour, MIN_EXPOSURE)
    return demand / demand.sum()


def passed_on_mask(stays: pd.DataFrame, senders: Collection[str]) -> pd.Series:
    """Stays admitted by transfer from one of ``senders`` (other units of the hospital)."""
    if "from_unit" not in stays or not senders:
        return pd.Series(False, index=stays.index)
    return stays["from_unit"].isin(list(senders))


def emergency_mask(stays: pd.DataFrame, senders: Collection[str]) -> pd.Series:
    """The unit's own emergency stream: emergency stays not passed on by one of ``senders``."""
    return (stays["admission_type"] == "emergency") & ~passed_on_mask(stays, senders)


def _transfer_streams(state: UnitState, came: pd.Series, first: date, last: date
                      ) -> dict[str, Any]:
    """Per sending unit, its transfers in as a stream of their own (daily rate by weekday,
    Poisson or negative binomial, and clock-hour profile): used where the sender has no
    model to pass its patients on with, and as the baseline that treats them as arrivals."""
    stays = state.stays
    if not came.any():
        return {}
    admitted = _local(stays["admitted_at"], state)
    out: dict[str, Any] = {}
    for sender in sorted(set(stays.loc[came, "from_unit"])):
        mask = came & (stays["from_unit"] == sender)
        days, counts = _daily_counts(admitted[mask], first, last)
        if len(days) < MIN_WINDOW_DAYS:
            continue
        rate = fit_daily_rate(days, counts, seasonal=False)
        out[str(sender)] = {"rate": rate.to_dict(),
                            "hour_profile": hourly_profile(admitted[mask].dt.hour).tolist()}
    return out


def emergency_counts(state: UnitState, units: Collection[str] = ()
                     ) -> tuple[list[date], np.ndarray]:
    """The unit's emergency admissions (not passed on by another of ``units``) on every
    local day of its fitting window (:func:`_window`, at most ``FIT_WINDOW_DAYS``)."""
    stays = state.stays
    emergency = emergency_mask(stays, [u for u in units if u != state.unit])
    first, last = _window(state, FIT_WINDOW_DAYS)
    return _daily_counts(_local(stays["admitted_at"], state)[emergency], first, last)


def train_arrivals(state: UnitState, units: Collection[str] = (),
                   hospital_season: tuple[float, float] | None = None) -> dict[str, Any]:
    """The arrivals part of a trained model, as a JSON-ready dict.

    ``units``: the hospital's unit codes at training. Stays admitted by transfer from one of
    them are not part of the emergency stream: they are forecast through their sending unit
    (app/forecast/transfers.py), with a stream of their own per sender as its fallback.
    ``hospital_season``: the annual pair of all units' emergency demand
    (:func:`app.forecast.hospital_demand.hospital_season_at`), offered to the held-out weeks
    as a candidate pattern."""
    stays = state.stays
    admitted = _local(stays["admitted_at"], state)
    senders = sorted(u for u in units if u != state.unit)
    came = passed_on_mask(stays, senders)
    emergency = emergency_mask(stays, senders)
    first, last = _window(state, FIT_WINDOW_DAYS)
    days, counts = _daily_counts(admitted[emergency], first, last)
    if len(days) < MIN_WINDOW_DAYS:
        raise TooLittleHistory(
            f"unit {state.unit}: {max(len(days), 0)} whole day(s) of complete admissions "
            f"(after the first discharge) before {state.as_of:%Y-%m-%d}; at least "
            f"{MIN_WINDOW_DAYS} are needed to learn the weekday pattern of arrivals")
    profile = hourly_profile(admitted[emergency].dt.hour)
    ceiling = learn_ceiling(state, first, last, senders) if first <= last else None
    excess = None if ceiling is None else ceiling.excess
    lag = 0 if ceiling is None else ceiling.lag_minutes
    exposure = None
    if excess is not None:
        _, by_hour = open_shares(state, first, last, excess, np.ones(24), lag)
        profile = _demand_profile(admitted[emergency].dt.hour, by_hour)
        by_day, _ = open_shares(state, first, last, excess, profile, lag)
        if int(np.sum(by_day >= MIN_EXPOSURE)) >= 14:
            exposure = by_day
        else:  # too few open days to fit on: the admitted counts as they are, no ceiling
            excess, profile = None, hourly_profile(admitted[emergency].dt.hour)
    # The held-out days are scored with the counts' own dispersion: scored as Poisson, an
    # overdispersed unit's busy days look like changes of level and pull a level in (on the
    # demo's critical-care backtest that cost 0.7% CRPS against scoring with the NB2).
    plain = fit_daily_rate(days, counts, exposure=exposure, seasonal=False)
    choice = choose_demand_terms(days, counts, exposure=exposure, alpha=plain.alpha,
                                 hospital_season=hospital_season)
    rate = fit_terms(days, counts, exposure, choice.seasonal, choice.level_half_life,
                     plain=plain, hospital_season=hospital_season)
    if choice.heldout_days:
        # The forecast's spread is that of the held-out days around what the chosen terms
        # forecast for them, not the in-sample scatter around the fitted curve (which counts a
        # change of level the local level removes, and misses the level's own error): day by
        # day, and shared by the days forecast from one morning (app/stats/demand_spread.py).
        rate = replace(rate, alpha=choice.alpha, tau2=choice.tau2)
    elective = stays["admission_type"] == "elective"
    return {
        "emergency": {
            "rate": rate.to_dict(),
            "hour_profile": profile.tolist(),
            "window": [first.isoformat(), last.isoformat()],
            "terms": choice.to_dict(),
            "not_from": senders,
        },
        "transfers_in": _transfer_streams(state, came, first, last),
        "capacity": {"excess_beds": excess,
                     # Patients passed on by other units come in below their own ceiling.
                     "passed_on_excess_beds": (
                         None if excess is None or not came.any()
                         else learn_passed_on_ceiling(state, first, last, senders, lag)),
                     # The allowance for late recording the unit's fullness is read with.
                     "recording_lag_minutes": None if excess is None else lag,
                     "open_share": None if exposure is None else float(np.mean(exposure))},
        "elective": {
            "p_go_by_lead": _p_go_by_lead(state),
            "hour_profile": hourly_profile(admitted[elective].dt.hour).tolist(),
            **_not_yet_booked(state),
        },
    }


def _p_go_by_lead(state: UnitState) -> list[float]:
    """P(goes ahead | still open L days before the planned day), L = 0..MAX_LEAD.

    Only bookings whose planned day has passed count. Each lead is shrunk towards the share
    of all those bookings that went ahead, with the weight of two bookings (a Beta prior with
    that mean): a lead with few bookings stays away from 0 and 1, and a lead no booking was
    ever open at (bookings are rarely made four weeks ahead) takes the overall share rather
    than an arbitrary one half.
    """
    b = state.bookings
    today = state.as_of.tz_convert(state.tz).date()
    past = b.loc[b["planned_date"] < today]
    went = past["booking_id"].isin(set(state.stays["booking_id"].dropna()))
    planned = pd.to_datetime(past["planned_date"])
    booked_day = _local(past["booked_at"], state).dt.tz_localize(None).dt.normalize()
    cancelled_day = _local(past["cancelled_at"], state).dt.tz_localize(None).dt.normalize()
    prior = (float(went.sum()) + 1.0) / (len(went) + 2.0)
    out = []
    for lead in range(MAX_LEAD + 1):
        start = planned - pd.Timedelta(days=lead)
        # Open at the start of that day: booked before it, not cancelled before it.
        open_then = (booked_day < start) & (cancelled_day.isna() | (cancelled_day >= start))
        n = int(open_then.sum())
        out.append((float(went[open_then].sum()) + 2.0 * prior) / (n + 2.0))
    return out


def _not_yet_booked(state: UnitState) -> dict[str, Any]:
    """The electives of the recent window that were not known in advance, per weekday:

    - ``unbooked_by_weekday_lead[w][L]``: mean admissions on a day ``L`` days ahead whose
      booking was made on or after day D - L, or that had none (not yet booked then);
    - ``never_booked_by_weekday[w]``: those with no booking at all;
    - ``booking_hour_profile``: the share of their bookings made in each local clock hour,
      to tell how much of a day's booking is still to come at the forecast's hour.
    """
    stays = state.stays
    first, last = _window(state, ELECTIVE_WINDOW_DAYS)
    elective = stays.loc[stays["admission_type"] == "elective"]
    admitted_day = _local(elective["admitted_at"], state).dt.date
    keep = (admitted_day >= first) & (admitted_day <= last)
    elective, admitted_day = elective.loc[keep], admitted_day.loc[keep]
    made = elective["booking_id"].map(state.bookings.set_index("booking_id")["booked_at"])
    booked_day = _local(made, state).dt.date
    # No booking (NaT: pandas' missing time, which is also a ``date``) counts at every lead.
    lead = np.asarray([0 if pd.isna(b) else (a - b).days
                       for a, b in zip(admitted_day, booked_day, strict=True)], dtype=float)
    weekdays = np.array([d.weekday() for d in admitted_day], dtype=int)
    n_days = np.bincount([(first + timedelta(days=i)).weekday()
                          for i in range((last - first).days + 1)], minlength=7)
    per_day = np.maximum(n_days, 1).astype(float)
    never = elective["booking_id"].isna().to_numpy()
    never_counts = np.bincount(weekdays[never], minlength=7)
    return {
        "unbooked_by_weekday_lead": [
            [float((lead[weekdays == w] <= L).sum()) / per_day[w] for L in range(MAX_LEAD + 1)]
            for w in range(7)],
        "never_booked_by_weekday": [float(never_counts[w]) / per_day[w] for w in range(7)],
        "booking_hour_profile": hourly_profile(_local(made.dropna(), state).dt.hour).tolist(),
    }


def _share_still_to_come(profile: list[float], local: datetime) -> float:
    """The share of a day's bookings made after the local clock time ``local``."""
    hour = local.hour
    rest_of_hour = 1.0 - (local.minute * 60 + local.second) / 3600.0
    return float(sum(profile[hour + 1:]) + profile[hour] * rest_of_hour)


def unbooked_means(elective: Mapping[str, Any], span: list[date], as_of_local: datetime
                   ) -> list[float]:
    """Expected elective admissions on each day of ``span`` whose booking is not known at
    ``as_of_local`` (site clock): never booked, or booked later than now.

    ``unbooked_by_weekday_lead[w][L]`` counts the electives on a day D booked on or after
    day D - L. For a day L days ahead that includes today's bookings, and those made earlier
    today are already known bookings, counted once as such: only the share of today's
    booking still to come (the booking clock profile after now) stays in the unknown part.
    A model trained before these terms were stored keeps the whole-day count.
    """
    table = elective["unbooked_by_weekday_lead"]
    never = elective.get("never_booked_by_weekday")
    profile = elective.get("booking_hour_profile")
    today = as_of_local.date()
    to_come = None if profile is None else _share_still_to_come(profile, as_of_local)
    out = []
    for day in span:
        ahead = (day - today).days
        row = table[day.weekday()]
        whole = row[min(ahead, MAX_LEAD)]
        if never is None or to_come is None or ahead > MAX_LEAD:
            out.append(whole)  # (beyond the longest lead every booking is still to come)
            continue
        later = never[day.weekday()] if ahead == 0 else row[ahead - 1]
        out.append(later + max(whole - later, 0.0) * to_come)
    return out


def emergency_rate(arrivals: Mapping[str, Any]) -> DailyRateModel:
    return DailyRateModel.from_dict(arrivals["emergency"]["rate"])


# Past days the local level reads, in half-lives: their weights fall below 0.4%.
LEVEL_LOOKBACK_HALF_LIVES = 8


def recent_days_read(arrivals: Mapping[str, Any]) -> float:
    """Days before as_of whose discharged stays a forecast's emergency demand reads: today's
    admissions and open time since local midnight (two days cover any zone), and with a
    local level its lookback of whole days up to yesterday, plus a week so that the
    window's start (the day after the first recorded discharge, :func:`_window`) is not
    moved by where the loading stopped."""
    half_life = emergency_rate(arrivals).level_half_life
    if half_life is None:
        return 2.0
    return float(int(LEVEL_LOOKBACK_HALF_LIVES * half_life) + 2 + 7)


def emergency_means(state: UnitState, arrivals: Mapping[str, Any], span: list[date]
                    ) -> list[float]:
    """Expected emergency demand on each local day of ``span`` (:func:`emergency_demand`)."""
    return emergency_demand(state, arrivals, span)[0]


def emergency_demand(state: UnitState, arrivals: Mapping[str, Any], span: list[date]
                     ) -> tuple[list[float], float | None]:
    """:func:`_emergency_demand`, kept with the state for these arrivals (a unit's own
    forecast and the units it passes patients on to ask the same)."""
    key = ("emergency_demand", id(arrivals), tuple(span))
    found = state.memo.get(key)
    if found is not None and found[0] is arrivals:
        return list(found[1]), found[2]
    means, level_size = _emergency_demand(state, arrivals, span)
    state.memo[key] = (arrivals, tuple(means), level_size)
    return means, level_size


def _emergency_demand(state: UnitState, arrivals: Mapping[str, Any], span: list[date]
                      ) -> tuple[list[float], float | None]:
    """Expected emergency demand on each local day of ``span`` (the first is today), as of
    ``state.as_of``, and the gamma size of the multiplier its days share (None: none).

    The trained daily rate, times the local level (the admissions of the recent past against
    what the rate expected on their open share of each day, up to yesterday: it follows the
    demand since training), updated by the admissions already seen since midnight (n, where
    f of today's expected demand mu has passed) where the model has a gamma multiplier to
    update (the conjugate update of a gamma with size r: posterior mean (r + n) / (r + f mu),
    size r + n). Under the negative binomial, today's own rate is updated; with only a
    multiplier shared by the forecast's days, the shared one, which moves every day's mean
    and narrows what is left of its spread. With both, today's own rate (the day's evidence
    is mostly about the day).
    """
    rate = emergency_rate(arrivals)
    means = rate.mean(span)
    if not span:
        return [], rate.level_size
    today = span[0]
    stays = state.stays
    emergency = stays.loc[emergency_mask(stays, arrivals["emergency"].get("not_from", ())),
                          "admitted_at"]
    admitted = _local(emergency.loc[emergency <= state.as_of], state)
    profile = np.asarray(arrivals["emergency"]["hour_profile"], dtype=float)
    if rate.level_half_life is not None:
        lookback = int(LEVEL_LOOKBACK_HALF_LIVES * rate.level_half_life)
        first, last = _window(state, lookback)
        if first <= last:
            days, counts = _daily_counts(admitted, first, last)
            expected = rate.mean(days)
            excess = excess_beds(arrivals)
            if excess is not None:
                by_day, _ = open_shares(state, first, last, excess, profile,
                                        recording_lag(arrivals))
                expected = expected * by_day
            means = means * level_multiplier(counts, expected, rate.level_half_life)
    level_size = rate.level_size
    r = rate.size if rate.size is not None else level_size  # the gamma size updated
    if r is not None:
        seen = int((admitted.dt.date == today).sum())
        passed = _demand_passed_today(state, today, excess_beds(arrivals), profile,
                                      recording_lag(arrivals))
        mu = float(means[0])
        factor = (r + seen) / (r + passed * mu)
        if rate.size is not None:
            means[0] = mu * factor
        else:
            means = means * factor
            level_size = r + seen
    return [float(m) for m in means], level_size


def _demand_passed_today(state: UnitState, today: date, excess: int | None,
                         profile: np.ndarray, lag_minutes: int = 0) -> float:
    """Share of today's demand (by the clock profile) offered from midnight to ``as_of`` while
    the unit could admit: the admissions already seen are a thinned sample of that part."""
    start = pd.Timestamp(localize(datetime.combine(today, time(0)), state.tz)).tz_convert("UTC")
    grid = pd.date_range(start, state.as_of.tz_convert("UTC"), freq=f"{OPEN_GRID_MINUTES}min",
                         inclusive="left")
    if grid.empty:
        return 0.0
    hour = np.asarray(grid.tz_convert(state.tz).hour, dtype=np.int64)
    weight = profile[hour] * OPEN_GRID_MINUTES / 60.0
    beds = state.beds_on(today)
    if excess is None or beds is None:
        return float(weight.sum())
    is_open = (_occupancy_at(state, np.asarray(grid.asi8, dtype=np.int64), lag_minutes)
               < beds + excess)
    return float(weight[is_open].sum())


def excess_beds(arrivals: Mapping[str, Any]) -> int | None:
    """Beds the unit fills beyond its staffed count at most (None: no ceiling known; models
    trained before the ceiling was learnt have none and keep their admitted rates)."""
    value = arrivals.get("capacity", {}).get("excess_beds")
    return None if value is None else int(value)


def passed_on_excess_beds(arrivals: Mapping[str, Any]) -> int | None:
    """Beds beyond staffed the patients passed on by other units fill at most: their own
    ceiling where one was learnt, else the unit's (models trained before it was learnt)."""
    value = arrivals.get("capacity", {}).get("passed_on_excess_beds")
    return excess_beds(arrivals) if value is None else int(value)


def recording_lag(arrivals: Mapping[str, Any]) -> int:
    """Minutes by which recorded discharges are read earlier where the unit's fullness is
    judged against its ceiling (0: models trained before the allowance was learnt)."""
    value = arrivals.get("capacity", {}).get("recording_lag_minutes")
    return 0 if value is None else int(value)
