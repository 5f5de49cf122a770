"""Landmarks and interval rows: one row per stay per morning, then per census interval ahead."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from datetime import date, time, timedelta
from functools import lru_cache
from zoneinfo import ZoneInfo

import numpy as np
import numpy.typing as npt
import pandas as pd

from app.forecast.los.constants import (
    HORIZON_STEPS,
    LANDMARK_CLOCK,
    NS_PER_DAY,
    NS_PER_HOUR,
    FloatArray,
    IntArray,
)
from app.state.extract import extract_start_ns
from app.state.frames import UnitState, latest_observations, utc_ns
from app.timeutil import localize


def _local_days(ns: IntArray, tz: ZoneInfo) -> FloatArray:
    """Local wall-clock time as days since 1970-01-01 00:00 local."""
    index = pd.DatetimeIndex(pd.to_datetime(np.asarray(ns, dtype=np.int64), utc=True))
    naive = index.tz_convert(tz).tz_localize(None)
    return np.asarray(naive.asi8, dtype=np.int64) / NS_PER_DAY


def _localize(naive: pd.DatetimeIndex, tz: ZoneInfo) -> IntArray:
    """Wall-clock times to UTC ns exactly like ``app.timeutil.localize``: the first occurrence
    of a repeated time; a skipped time moved on by the gap (the few of those one by one)."""
    aware = naive.tz_localize(tz, ambiguous=np.ones(len(naive), dtype=bool),
                              nonexistent="NaT")
    out = np.asarray(aware.tz_convert("UTC").asi8, dtype=np.int64)
    for i in np.flatnonzero(aware.isna()):
        moved = localize(naive[i].to_pydatetime(), tz)
        out[i] = pd.Timestamp(moved).tz_convert("UTC").value
    return out


@dataclass(frozen=True)
class _DayAxis:
    """Landmark and census instants of consecutive local days."""

    landmark_ns: IntArray
    landmark_local: FloatArray
    census_ns: IntArray
    census_local: FloatArray


@lru_cache(maxsize=64)
def _day_axis(first: date, last: date, landmark_clock: time, census_time: time,
              tz: ZoneInfo) -> _DayAxis:
    """The calendar from ``first`` to ``last`` (kept for the last few spans asked: every
    current stay of every unit forecast at one as_of shares one span; read only)."""
    days = pd.date_range(first, last, freq="D")
    landmark = _localize(days + pd.Timedelta(hours=landmark_clock.hour,
                                             minutes=landmark_clock.minute), tz)
    census = _localize(days + pd.Timedelta(hours=census_time.hour,
                                           minutes=census_time.minute), tz)
    arrays = (landmark, _local_days(landmark, tz), census, _local_days(census, tz))
    for array in arrays:
        array.setflags(write=False)
    return _DayAxis(*arrays)


def _axis_for(first_ns: int, last_ns: int, extra_days: int, landmark_clock: time,
              census_time: time, tz: ZoneInfo) -> _DayAxis:
    first = pd.Timestamp(first_ns, tz="UTC").tz_convert(tz).date() - timedelta(days=2)
    last = pd.Timestamp(last_ns, tz="UTC").tz_convert(tz).date() + timedelta(days=extra_days + 2)
    return _day_axis(first, last, landmark_clock, census_time, tz)


def _version_at(versions: pd.DataFrame, which: IntArray, moments: IntArray) -> FloatArray:
    """Value of observation ``which`` (-1: none) as last recorded by each moment."""
    probe = pd.DataFrame({"key": which, "at": moments, "i": np.arange(which.size)})
    probe = probe.loc[probe["key"] >= 0].sort_values("at", kind="mergesort")
    found = pd.merge_asof(probe, versions, left_on="at", right_on="known", by="key",
                          direction="backward", allow_exact_matches=True)
    result = np.full(which.size, np.nan)
    result[found["i"].to_numpy()] = found["value"].to_numpy(dtype=float)
    return result


def observations_at(observations: pd.DataFrame, names: Sequence[str], stay_ids: Sequence[str],
                    at_ns: IntArray) -> dict[str, FloatArray]:
    """For each (stay, instant): the latest value of each name known then, its change since
    the previous value and the hours since it was taken.

    The rule of ``app.state.frames.latest_observations`` (observed and recorded by the instant;
    each observation at its latest value recorded by then, so a correction counts from its
    ``recorded_at``), computed for all pairs at once with as-of joins: an observation is known
    from its first entry; when a stay's observations become known in the order they were
    taken, those known at an instant are the earliest ones, so the latest is found by an as-of
    join on the time of first entry and its value (with corrections) by a second as-of join on
    its versions. The rare stays where an older observation was entered after a newer one go
    through ``latest_observations`` one instant at a time.

    Returns
    -------
    dict
        ``name``, ``name_change``, ``name_hours`` -> float arrays aligned with ``stay_ids``.
    """
    codes, uniques = pd.factorize(np.asarray(stay_ids, dtype=object))
    return _observations_at(observations, names, pd.Index(uniques, dtype=object),
                            codes.astype(np.int64), np.asarray(at_ns, dtype=np.int64))


def _observations_at(observations: pd.DataFrame, names: Sequence[str], ids: pd.Index,
                     stay_codes: IntArray, at: IntArray) -> dict[str, FloatArray]:
    """``observations_at`` with stays given as positions in ``ids``."""
    n = stay_codes.size
    out: dict[str, FloatArray] = {}
    obs_code = ids.get_indexer(observations["stay_id"].to_numpy())
    for name in names:
        value = np.full(n, np.nan)
        change = np.full(n, np.nan)
        hours = np.full(n, np.nan)
        out[name], out[f"{name}_change"], out[f"{name}_hours"] = value, change, hours
        pick = ((observations["name"] == name).to_numpy() & (obs_code >= 0))
        if not pick.any():
            continue
        obs = observations.loc[pick]
        stay = obs_code[pick].astype(np.int64)
        observed = utc_ns(obs["observed_at"])
        known = np.maximum(observed, utc_ns(obs["recorded_at"]))
        version_value = obs["value"].to_numpy(dtype=float)
        order = np.lexsort((known, observed, stay))
        stay, observed, known = stay[order], observed[order], known[order]
        version_value = version_value[order]
        first = np.r_[True, (stay[1:] != stay[:-1]) | (observed[1:] != observed[:-1])]
        key_of_version = np.cumsum(first) - 1
        key_stay, key_observed, key_known = stay[first], observed[first], known[first]
        key_id = np.arange(key_stay.size)
        stay_start = np.r_[True, key_stay[1:] != key_stay[:-1]]
        first_in_stay = np.maximum.accumulate(np.where(stay_start, key_id, 0))
        running = pd.Series(key_known).groupby(key_stay).cummax().to_numpy()
        dirty = np.unique(key_stay[key_known < running])

        left = pd.DataFrame({"stay": stay_codes, "at": at, "row": np.arange(n)})
        left = left.sort_values("at", kind="mergesort")
        right = pd.DataFrame({"stay": key_stay, "known": key_known, "key": key_id})
        latest = pd.merge_asof(left, right.sort_values("known", kind="mergesort"),
                               left_on="at", right_on="known", by="stay",
                               direction="backward", allow_exact_matches=True)
        latest = latest.loc[latest["key"].notna()]
        rows = latest["row"].to_numpy()
        key = latest["key"].to_numpy(dtype=np.int64)
        prev_key = np.where(key > first_in_stay[key], key - 1, -1)
        moments = latest["at"].to_numpy(dtype=np.int64)
        versions = pd.DataFrame({"key": key_of_version, "known": known,
                                 "value": version_value}).sort_values("known", kind="mergesort")
        current = _version_at(versions, key, moments)
        previous = _version_at(versions, prev_key, moments)
        value[rows] = current
        change[rows] = current - previous
        hours[rows] = (moments - key_observed[key]) / NS_PER_HOUR

        if dirty.size:
            by_stay = {int(c): g for c, g in obs.groupby(obs_code[pick], sort=False)
                       if int(c) in set(dirty.tolist())}
            for i in np.flatnonzero(np.isin(stay_codes, dirty)):
                moment = pd.Timestamp(int(at[i]), tz="UTC")
                found = latest_observations(by_stay[int(stay_codes[i])], moment)
                value[i] = change[i] = hours[i] = np.nan
                if found.empty:
                    continue
                rec = found.iloc[0]
                value[i] = float(rec["value"])
                change[i] = float(rec["value"]) - float(rec["previous"])
                hours[i] = (moment - rec["observed_at"]).total_seconds() / 3600.0
    return out


@dataclass(frozen=True, eq=False)
class Landmarks:
    """One row per stay per landmark instant, with what was known then and the outcome.

    Attributes
    ----------
    stay_index : ndarray
        Row of ``stays`` the landmark belongs to.
    at_ns, at_local : ndarray
        The landmark instant (UTC ns; local days).
    days_in : ndarray
        Days in the unit at the landmark.
    observed : dict
        Observation columns (value, change, hours) at the landmark.
    end_ns : ndarray
        Discharge, or the cut-off for stays still in (censored).
    ended : ndarray of bool
        Discharged by the cut-off.
    extract_ns : int or None
        When the extract began (:func:`app.state.extract.extract_start_ns`); no landmark
        comes before it.
    """

    stays: pd.DataFrame
    stay_index: IntArray
    at_ns: IntArray
    at_local: FloatArray
    days_in: FloatArray
    observed: Mapping[str, FloatArray]
    end_ns: IntArray
    ended: npt.NDArray[np.bool_]
    extract_ns: int | None = None

    @property
    def size(self) -> int:
        return int(self.stay_index.size)

    @property
    def remaining_days(self) -> FloatArray:
        return (self.end_ns - self.at_ns) / NS_PER_DAY

    def subset(self, mask: npt.NDArray[np.bool_]) -> Landmarks:
        return Landmarks(stays=self.stays, stay_index=self.stay_index[mask],
                         at_ns=self.at_ns[mask], at_local=self.at_local[mask],
                         days_in=self.days_in[mask],
                         observed={k: v[mask] for k, v in self.observed.items()},
                         end_ns=self.end_ns[mask], ended=self.ended[mask],
                         extract_ns=self.extract_ns)

    def censored_at(self, cutoff_ns: int) -> Landmarks:
        """The same landmarks as known at an earlier cut-off (landmarks before it only)."""
        keep = self.at_ns < cutoff_ns
        sub = self.subset(keep)
        ended = sub.ended & (sub.end_ns <= cutoff_ns)
        end = np.where(ended, sub.end_ns, np.minimum(sub.end_ns, cutoff_ns))
        end = np.where(~sub.ended, cutoff_ns, end)
        return replace(sub, end_ns=end, ended=ended)


def _stay_ends(stays: pd.DataFrame, as_of_ns: int) -> tuple[IntArray, IntArray,
                                                             npt.NDArray[np.bool_]]:
    admitted = utc_ns(stays["admitted_at"])
    discharged = utc_ns(stays["discharged_at"])
    ended = stays["discharged_at"].notna().to_numpy() & (discharged <= as_of_ns)
    end = np.where(ended, discharged, as_of_ns)
    return admitted, end, ended


def entry_days(admitted_ns: IntArray, days: FloatArray, start_ns: int | None) -> FloatArray:
    """Days each stay had spent in the unit when the extract began (0 for stays admitted after
    it), at most its length ``days``: the delayed entry of a left-truncated stay."""
    if start_ns is None:
        return np.zeros(np.shape(days))
    return np.clip((start_ns - np.asarray(admitted_ns, dtype=np.int64)) / NS_PER_DAY, 0.0,
                   np.asarray(days, dtype=float))


def observation_names(state: UnitState) -> list[str]:
    """Observation names recorded for the unit's stays, sorted."""
    if state.observations.empty:
        return []
    return sorted(str(n) for n in state.observations["name"].unique())


def build_landmarks(state: UnitState, *, landmark_clock: time = LANDMARK_CLOCK,
                    names: Sequence[str] | None = None,
                    extract_start: int | None = None) -> Landmarks:
    """Landmarks of every stay of the state: each ``landmark_clock`` local time it was in the
    unit from the extract's start (:func:`app.state.extract.extract_start_ns`;
    ``extract_start`` in UTC ns if given) up to ``state.as_of`` (stays still in are censored
    there, never dropped).

    Before the extract's start only the stays that lasted into it are on record, so a landmark
    there would see long survivors only; from the start on every stay in the unit is on
    record, whenever admitted. A stay admitted before the start keeps its true days in the
    unit at its later landmarks: a landmark conditions on being in the unit, which for the
    hazard model on interval rows is exactly delayed entry.
    """
    stays = state.stays.reset_index(drop=True)
    names = observation_names(state) if names is None else list(names)
    as_of_ns = int(utc_ns([state.as_of])[0])
    admitted, end, ended = _stay_ends(stays, as_of_ns)
    start_ns = extract_start_ns(stays, as_of_ns, extract_start) if not stays.empty else None
    if stays.empty:
        empty = np.zeros(0, dtype=np.int64)
        return Landmarks(stays, empty, empty, np.zeros(0), np.zeros(0),
                         {k: np.zeros(0) for n in names
                          for k in (n, f"{n}_change", f"{n}_hours")}, empty,
                         np.zeros(0, dtype=bool), start_ns)
    axis = _axis_for(int(admitted.min()), as_of_ns, 1, landmark_clock, state.census_time,
                     state.tz)
    # A stay is in at landmark s when admitted <= s < end (present means discharged after s);
    # a landmark at the cut-off itself has no time at risk left.
    seen_from = admitted if start_ns is None else np.maximum(admitted, start_ns)
    first = np.searchsorted(axis.landmark_ns, seen_from, side="left")
    last = np.searchsorted(axis.landmark_ns, end, side="left")
    counts = np.maximum(last - first, 0)
    stay_index = np.repeat(np.arange(len(stays)), counts)
    offsets = np.arange(counts.sum()) - np.repeat(np.cumsum(counts) - counts, counts)
    day = np.repeat(first, counts) + offsets
    at_ns = axis.landmark_ns[day]
    observed = _observations_at(state.observations, names,
                                pd.Index(stays["stay_id"].to_numpy(), dtype=object),
                                stay_index.astype(np.int64), at_ns)
    return Landmarks(stays=stays, stay_index=stay_index.astype(np.int64), at_ns=at_ns,
                     at_local=axis.landmark_local[day],
                     days_in=(at_ns - admitted[stay_index]) / NS_PER_DAY, observed=observed,
                     end_ns=end[stay_index], ended=ended[stay_index], extract_ns=start_ns)


@dataclass(frozen=True, eq=False)
class IntervalRows:
    """Landmark x census interval rows: the hazard tree's training or prediction rows.

    ``landmark`` indexes the landmarks; ``step`` is 1 for the interval from the landmark to the
    next census instant. ``start``/``bound`` are the interval in local days; ``stop`` is the end
    of the time at risk (``bound``, the discharge or the cut-off); ``event`` is a discharge at
    ``stop``. ``days_in`` is at the interval's start.
    """

    landmark: IntArray
    step: IntArray
    start_ns: IntArray
    start: FloatArray
    bound: FloatArray
    stop: FloatArray
    event: npt.NDArray[np.bool_]
    days_in: FloatArray
    weight: FloatArray

    def subset(self, mask: npt.NDArray[np.bool_]) -> IntervalRows:
        return IntervalRows(*(getattr(self, f)[mask] for f in (
            "landmark", "step", "start_ns", "start", "bound", "stop", "event", "days_in",
            "weight")))


def _census_after(axis: _DayAxis, at_ns: IntArray) -> IntArray:
    """Index on the axis of the first census instant strictly after each instant."""
    return np.searchsorted(axis.census_ns, at_ns, side="right")


def interval_rows(landmarks: Landmarks, census_time: time, tz: ZoneInfo, *,
                  horizon: int = HORIZON_STEPS, rng: np.random.Generator | None = None,
                  max_rows: int | None = None) -> IntervalRows:
    """Training rows: every census interval from each landmark while the stay is in the unit
    and before its end (discharge or cut-off), at most ``horizon`` intervals ahead.

    With ``max_rows``, when there would be more rows than that, landmarks are sampled with
    equal probability (each with all its rows) and their rows weighted by its inverse: the
    likelihood stays unbiased and the fit time bounded, whatever the length of the history.
    """
    n = landmarks.size
    if n == 0:
        z = np.zeros(0)
        zi = np.zeros(0, dtype=np.int64)
        return IntervalRows(zi, zi, zi, z, z, z, np.zeros(0, dtype=bool), z, z)
    admitted = utc_ns(landmarks.stays["admitted_at"])[landmarks.stay_index]
    axis = _axis_for(int(landmarks.at_ns.min()), int(landmarks.end_ns.max()), horizon + 2,
                     LANDMARK_CLOCK, census_time, tz)
    c1 = _census_after(axis, landmarks.at_ns)
    # Intervals k >= 2 start at census instants; the stay must still be in at the start.
    inside = np.searchsorted(axis.census_ns, landmarks.end_ns, side="left") - c1
    steps = np.minimum(horizon, 1 + np.maximum(inside, 0))
    total = int(steps.sum())
    keep_prob = 1.0
    chosen = np.arange(n)
    if max_rows is not None and total > max_rows:
        keep_prob = max_rows / total
        generator = rng if rng is not None else np.random.default_rng(0)
        chosen = np.flatnonzero(generator.random(n) < keep_prob)
    lm = np.repeat(chosen, steps[chosen])
    counts = steps[chosen]
    k = np.arange(counts.sum()) - np.repeat(np.cumsum(counts) - counts, counts) + 1
    weight = np.full(lm.size, 1.0 / keep_prob)
    start_ns = np.where(k == 1, landmarks.at_ns[lm], axis.census_ns[c1[lm] + k - 2])
    start = np.where(k == 1, landmarks.at_local[lm], axis.census_local[c1[lm] + k - 2])
    bound_ns = axis.census_ns[c1[lm] + k - 1]
    bound = axis.census_local[c1[lm] + k - 1]
    end_ns = landmarks.end_ns[lm]
    event = landmarks.ended[lm] & (end_ns <= bound_ns)
    stop_ns = np.minimum(end_ns, bound_ns)
    stop = np.where(stop_ns == bound_ns, bound, _local_days(stop_ns, tz))
    return IntervalRows(landmark=lm.astype(np.int64), step=k.astype(np.int64),
                        start_ns=start_ns, start=start, bound=bound, stop=stop, event=event,
                        days_in=(start_ns - admitted[lm]) / NS_PER_DAY, weight=weight)


def forecast_bounds(at_ns: IntArray, census_time: time, tz: ZoneInfo, steps: int
                    ) -> tuple[IntArray, FloatArray]:
    """Interval bounds for forecasting from each instant: the instant, then the next ``steps``
    census instants (UTC ns, local days), shape (n, steps + 1)."""
    at = np.asarray(at_ns, dtype=np.int64)
    axis = _axis_for(int(at.min()), int(at.max()), steps + 2, LANDMARK_CLOCK, census_time, tz)
    c1 = _census_after(axis, at)
    idx = c1[:, None] + np.arange(steps)[None, :]
    bounds_ns = np.concatenate([at[:, None], axis.census_ns[idx]], axis=1)
    bounds_local = np.concatenate([_local_days(at, tz)[:, None], axis.census_local[idx]],
                                  axis=1)
    return bounds_ns, bounds_local


def _interval_weekday(bounds_local: FloatArray) -> FloatArray:
    """Weekday (Monday 0) of the local day holding each interval's last twelve hours."""
    day = np.floor(bounds_local[:, 1:] - 0.5)
    return ((day.astype(np.int64) + 3) % 7).astype(float)


def _rows_weekday(rows: IntervalRows) -> FloatArray:
    day = np.floor(rows.bound - 0.5)
    return ((day.astype(np.int64) + 3) % 7).astype(float)
