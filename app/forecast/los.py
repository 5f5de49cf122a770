"""Length-of-stay model of a unit: training rows from the "as of" state, training, prediction.

Design (measured choices are in the payload's ``selection`` and ``metrics``)
----------------------------------------------------------------------------
Rows
    One *landmark* per stay per morning in the unit (``LANDMARK_CLOCK`` local time): the
    stay's admission covariates, days in the unit, and for each observation name its latest
    value known then, its change since the previous value and the hours since it was taken
    (the same columns as ``UnitState.current_stays()``). From each landmark, one row per census
    interval ahead (the partial interval to the next census instant, then whole ones, up to
    ``HORIZON_STEPS``) while the stay is in the unit and before the cut-off: the target is
    "leaves in this interval", with the time at risk in the interval (METHODS.md section 8).
    Stays in progress at the cut-off contribute their time at risk up to it, censored; none is
    dropped.
Model
    A discharge-hazard tree (``app.stats.survival_tree``): a Poisson regression tree on the
    interval rows gives each leaf a discharge rate relative to the unit's discharge profile
    (clock hour x weekday x day of stay, fitted jointly with the leaves). So the per-day
    probabilities follow the weekday of each future day and the partial first interval for
    every patient, and the tree's rules are about the patient.
    P(still in at census instant k) = exp(-sum of rate x profile exposure over the intervals).
    Leaves must hold a share of the stays (not only of the rows: a stay's rows are near copies).
Groups
    A log-rank tree on admission covariates (``app.stats.stay_groups``), each leaf with its
    Kaplan-Meier curve and a BIC-chosen Coxian: used for stays still to come and for the tail
    of a current stay past the hazard tree's horizon (median remaining stay beyond it).
Validation
    Depth and leaf size of both trees are chosen on a later period (train on the state as of
    an earlier instant, validate on landmarks after it) for a held-out half of the stays (by a
    hash of the stay id): split by stay and by time, never by row.
Test
    The last ``test_days`` before ``until`` are held out: the model trained on the state as of
    the test start is scored on every landmark in the test period (concordance, integrated
    Brier score over days 1..14, variance explained on completed stays), beside the
    no-covariate Kaplan-Meier given the days already spent and a gradient-boosted ensemble on
    the same rows (the yardstick: what the single readable tree gives up). The stored model is
    then refitted on everything known at ``until`` with the chosen sizes.
Alternatives measured (tests/forecast/test_los.py, demo test period): scikit-survival's
    log-rank SurvivalTree on one row per landmark predicts worse than this tree on both demo
    units (integrated Brier score and concordance), so the hazard tree is kept.
"""

from __future__ import annotations

import math
import time as timer
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from datetime import UTC, date, datetime, time, timedelta
from functools import cached_property
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
import numpy.typing as npt
import pandas as pd

from app.forecast.training_data import (
    KnownColumnsOnly,
    TooLittleHistory,
    require_history,
    screen_scores,
)
from app.state.frames import UnitState, latest_observations
from app.stats.stay_groups import StayGroups, fit_stay_groups, round_up_to_hours
from app.stats.survival_tree import (
    FeatureSpec,
    HazardTreeModel,
    PiecewiseHazardTree,
    cumulative_hazard_at,
    order_categories,
    piecewise_log_likelihood,
    time_of_cumulative_hazard,
)
from app.timeutil import localize

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]

LANDMARK_CLOCK = time(8, 0)
HORIZON_STEPS = 14
PAYLOAD_FORMAT = 1
NS_PER_DAY = 86_400 * 10**9
NS_PER_HOUR = 3_600 * 10**9
COVARIATES = ("admission_type", "age", "sex", "specialty", "source")
# Trade names of published scores, for the rule text.
SCORE_LABELS = {"sofa": "SOFA", "news2": "NEWS2", "apache2": "APACHE II", "apache_ii": "APACHE II"}
DEPTH_GRID = (3, 6)
MIN_STAYS_SHARE_GRID = (0.01, 0.02, 0.04, 0.08)
MIN_ROWS_LEAF = 50
# At most four admission groups: each needs a Coxian BIC search (about a second), and on the
# demo ward a third level improved the validation Brier score by only 1.6 % (0.1344 vs 0.1366).
GROUP_DEPTH_GRID = (1, 2)
# Rows kept for fitting are capped (landmark rows of many more stays add little): beyond this,
# landmarks are sampled and weighted up. Test metrics use at most MAX_TEST_LANDMARKS landmarks.
MAX_ROWS = 500_000
MAX_VALIDATION_ROWS = 150_000
MAX_ENSEMBLE_ROWS = 150_000
MAX_TEST_LANDMARKS = 10_000
MAX_CENSORING_SAMPLE = 50_000


# ---------------------------------------------------------------------------------------------
# Time axes
# ---------------------------------------------------------------------------------------------


def _ns(values: Any) -> IntArray:
    """UTC instants as int64 nanoseconds (NaT as the minimum int64)."""
    index = pd.DatetimeIndex(pd.to_datetime(values, utc=True))
    return np.asarray(index.asi8, dtype=np.int64)


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


def _day_axis(first: date, last: date, landmark_clock: time, census_time: time,
              tz: ZoneInfo) -> _DayAxis:
    days = pd.date_range(first, last, freq="D")
    landmark = _localize(days + pd.Timedelta(hours=landmark_clock.hour,
                                             minutes=landmark_clock.minute), tz)
    census = _localize(days + pd.Timedelta(hours=census_time.hour,
                                           minutes=census_time.minute), tz)
    return _DayAxis(landmark, _local_days(landmark, tz), census, _local_days(census, tz))


def _axis_for(first_ns: int, last_ns: int, extra_days: int, landmark_clock: time,
              census_time: time, tz: ZoneInfo) -> _DayAxis:
    first = pd.Timestamp(first_ns, tz="UTC").tz_convert(tz).date() - timedelta(days=2)
    last = pd.Timestamp(last_ns, tz="UTC").tz_convert(tz).date() + timedelta(days=extra_days + 2)
    return _day_axis(first, last, landmark_clock, census_time, tz)


# ---------------------------------------------------------------------------------------------
# Observations known at an instant, for many (stay, instant) pairs at once
# ---------------------------------------------------------------------------------------------


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
        observed = _ns(obs["observed_at"])
        known = np.maximum(observed, _ns(obs["recorded_at"]))
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


# ---------------------------------------------------------------------------------------------
# Landmarks and interval rows
# ---------------------------------------------------------------------------------------------


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
    """

    stays: pd.DataFrame
    stay_index: IntArray
    at_ns: IntArray
    at_local: FloatArray
    days_in: FloatArray
    observed: Mapping[str, FloatArray]
    end_ns: IntArray
    ended: npt.NDArray[np.bool_]

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
                         end_ns=self.end_ns[mask], ended=self.ended[mask])

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
    admitted = _ns(stays["admitted_at"])
    discharged = _ns(stays["discharged_at"])
    ended = stays["discharged_at"].notna().to_numpy() & (discharged <= as_of_ns)
    end = np.where(ended, discharged, as_of_ns)
    return admitted, end, ended


def observation_names(state: UnitState) -> list[str]:
    """Observation names recorded for the unit's stays, sorted."""
    if state.observations.empty:
        return []
    return sorted(str(n) for n in state.observations["name"].unique())


def build_landmarks(state: UnitState, *, landmark_clock: time = LANDMARK_CLOCK,
                    names: Sequence[str] | None = None) -> Landmarks:
    """Landmarks of every stay of the state: each ``landmark_clock`` local time it was in the
    unit, up to ``state.as_of`` (stays still in are censored there, never dropped)."""
    stays = state.stays.reset_index(drop=True)
    names = observation_names(state) if names is None else list(names)
    as_of_ns = int(_ns([state.as_of])[0])
    admitted, end, ended = _stay_ends(stays, as_of_ns)
    if stays.empty:
        empty = np.zeros(0, dtype=np.int64)
        return Landmarks(stays, empty, empty, np.zeros(0), np.zeros(0),
                         {k: np.zeros(0) for n in names
                          for k in (n, f"{n}_change", f"{n}_hours")}, empty,
                         np.zeros(0, dtype=bool))
    axis = _axis_for(int(admitted.min()), as_of_ns, 1, landmark_clock, state.census_time,
                     state.tz)
    # A stay is in at landmark s when admitted <= s < end (present means discharged after s);
    # a landmark at the cut-off itself has no time at risk left.
    first = np.searchsorted(axis.landmark_ns, admitted, side="left")
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
                     end_ns=end[stay_index], ended=ended[stay_index])


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
    admitted = _ns(landmarks.stays["admitted_at"])[landmarks.stay_index]
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


# ---------------------------------------------------------------------------------------------
# Features
# ---------------------------------------------------------------------------------------------


def _score_label(name: str) -> str:
    return SCORE_LABELS.get(name.lower(), name.replace("_", " "))


def _integral(values: FloatArray) -> bool:
    finite = values[np.isfinite(values)]
    return bool(finite.size == 0 or np.all(finite == np.round(finite)))


@dataclass(frozen=True, eq=False)
class Design:
    """The feature columns of the hazard tree and of the admission tree, with their coding."""

    features: tuple[FeatureSpec, ...]
    names: tuple[str, ...]

    @cached_property
    def _index(self) -> dict[str, int]:
        return {f.name: i for i, f in enumerate(self.features)}

    @property
    def admission_features(self) -> tuple[FeatureSpec, ...]:
        return tuple(f for f in self.features if f.name in COVARIATES)

    def covariate_matrix(self, stays: pd.DataFrame) -> FloatArray:
        """Admission covariates, one row per stay (admission tree's columns)."""
        cols = []
        for spec in self.admission_features:
            values = stays[spec.name] if spec.name in stays else pd.Series([None] * len(stays))
            cols.append(spec.encode(values.tolist()))
        return np.column_stack(cols) if cols else np.zeros((len(stays), 0))

    def matrix(self, covariates: FloatArray, days_in: FloatArray, step: IntArray,
               observed: Mapping[str, FloatArray]) -> npt.NDArray[np.float32]:
        """Hazard-tree rows: covariates (per row), days in, step, observation columns.

        Days in the unit are rounded to the hour and hours since an observation to the quarter
        hour: finer differences carry no signal, and fewer distinct values make the tree grow
        faster (measured: 23 % less time growing a depth-6 tree on 500,000 rows)."""
        n = days_in.size
        out = np.empty((n, len(self.features)), dtype=np.float32)
        j = 0
        for spec in self.features:
            if spec.name in COVARIATES:
                out[:, self._index[spec.name]] = covariates[:, j]
                j += 1
            elif spec.name == "days_in":
                out[:, self._index["days_in"]] = np.round(days_in * 24.0) / 24.0
            elif spec.name == "step":
                out[:, self._index["step"]] = np.minimum(step, HORIZON_STEPS)
            else:
                column = observed.get(spec.name)
                if column is not None and spec.name.endswith("_hours"):
                    column = np.round(column * 4.0) / 4.0
                out[:, self._index[spec.name]] = np.nan if column is None else column
        return out

    def to_dict(self) -> dict[str, Any]:
        return {"features": [f.to_dict() for f in self.features], "names": list(self.names)}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> Design:
        return cls(features=tuple(FeatureSpec.from_dict(f) for f in data["features"]),
                   names=tuple(data["names"]))


def make_design(landmarks: Landmarks, rows: IntervalRows, names: Sequence[str]) -> Design:
    """Feature specifications from training rows: categories ordered by discharge rate (so the
    tree's single threshold is the best subset split), whole-number and missing flags."""
    stays = landmarks.stays
    exposure = rows.stop - rows.start
    stay_of_row = landmarks.stay_index[rows.landmark]
    specs: list[FeatureSpec] = []
    for name in COVARIATES:
        if name not in stays:
            continue
        column = stays[name].to_numpy()[stay_of_row]
        if name == "age":
            values = pd.to_numeric(stays[name], errors="coerce").to_numpy(dtype=float)
            specs.append(FeatureSpec(name="age", label="age", integer=_integral(values),
                                     has_missing=bool(np.isnan(values).any())))
            continue
        cats = order_categories(column, rows.event, exposure)
        if not cats:
            continue
        missing = bool(stays[name].isna().any() | (stays[name].astype(str) == "").any())
        label = {"admission_type": "admission", "sex": "sex", "specialty": "specialty",
                 "source": "admitted from"}[name]
        template = "{} admission" if name == "admission_type" else ""
        specs.append(FeatureSpec(name=name, label=label, kind="category", categories=cats,
                                 has_missing=missing, template=template))
    specs.append(FeatureSpec(name="days_in", label="days in the unit"))
    specs.append(FeatureSpec(name="step", label="days ahead", integer=True))
    for name in names:
        values = landmarks.observed[name]
        label = _score_label(name)
        finite = values[np.isfinite(values)]
        is_flag = finite.size > 0 and bool(np.all(np.isin(finite, (0.0, 1.0))))
        missing = bool(np.isnan(values).any())
        specs.append(FeatureSpec(name=name, label=label, kind="flag" if is_flag else "number",
                                 integer=_integral(values), has_missing=missing))
        change = landmarks.observed[f"{name}_change"]
        specs.append(FeatureSpec(name=f"{name}_change", label=f"{label} change since previous",
                                 integer=_integral(change),
                                 has_missing=bool(np.isnan(change).any())))
        specs.append(FeatureSpec(name=f"{name}_hours", label=f"hours since {label}",
                                 has_missing=missing))
    return Design(features=tuple(specs), names=tuple(names))


def _row_matrix(design: Design, landmarks: Landmarks, rows: IntervalRows
                ) -> npt.NDArray[np.float32]:
    cov = design.covariate_matrix(landmarks.stays)[landmarks.stay_index[rows.landmark]]
    observed = {k: v[rows.landmark] for k, v in landmarks.observed.items()}
    return design.matrix(cov, rows.days_in, rows.step, observed)


# ---------------------------------------------------------------------------------------------
# Forecasting curves from landmarks (evaluation) or current stays (product)
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class LosModel:
    """A trained length-of-stay model read from its payload."""

    design: Design
    hazard: HazardTreeModel
    groups: StayGroups
    census_time: time
    horizon: int

    @classmethod
    def from_payload(cls, payload: Mapping[str, Any]) -> LosModel:
        """From the stored model JSON (the whole payload or its ``"los"`` part)."""
        los = payload.get("los", payload)
        if los.get("format") != PAYLOAD_FORMAT:
            raise ValueError(f"payload: unknown los format {los.get('format')!r}")
        hh, mm = (int(p) for p in los["census_time"].split(":"))
        return cls(design=Design.from_dict(los["design"]),
                   hazard=HazardTreeModel.from_dict(los["hazard"]),
                   groups=StayGroups.from_dict(los["groups"]), census_time=time(hh, mm),
                   horizon=int(los["horizon_steps"]))

    def curves(self, covariates: FloatArray, days_in: FloatArray,
               observed: Mapping[str, FloatArray], at_ns: IntArray, tz: ZoneInfo,
               steps: int) -> _Curves:
        """Rates over the next ``steps`` census intervals from each instant."""
        n = days_in.size
        bounds_ns, bounds_local = forecast_bounds(at_ns, self.census_time, tz, steps)
        k = np.tile(np.arange(1, steps + 1), n)
        lm = np.repeat(np.arange(n), steps)
        start_days = days_in[lm] + (bounds_ns[:, :-1].ravel() - at_ns[lm]) / NS_PER_DAY
        x = self.design.matrix(covariates[lm], start_days, k,
                               {key: v[lm] for key, v in observed.items()})
        leaf = self.hazard.leaf(x).reshape(n, steps)
        rates = self.hazard.tree.value[leaf]
        return _Curves(self, tz, bounds_ns, bounds_local, rates, leaf, days_in, covariates, x)


@dataclass(frozen=True, eq=False)
class _Curves:
    model: LosModel
    tz: ZoneInfo
    bounds_ns: IntArray
    bounds_local: FloatArray
    rates: FloatArray
    leaf: IntArray
    days_in: FloatArray
    covariates: FloatArray
    x: npt.NDArray[np.float32]

    def with_rates(self, rates: FloatArray) -> _Curves:
        """The same intervals with other rates (another model's, for comparison)."""
        return replace(self, rates=np.asarray(rates, dtype=float).reshape(self.rates.shape))

    def survival(self, query_ns: IntArray) -> FloatArray:
        """P(still in at each query instant), shape (n, Q); ``query_ns`` shape (n, Q)."""
        q = np.asarray(query_ns, dtype=np.int64)
        local = _local_days(q.ravel(), self.tz).reshape(q.shape)
        h = cumulative_hazard_at(self.model.hazard.profile, self.rates, self.bounds_local,
                                 self.days_in, local)
        return np.exp(-h)

    @cached_property
    def group(self) -> IntArray:
        return self.model.groups.group_of(self.covariates)

    @cached_property
    def _end(self) -> tuple[FloatArray, FloatArray]:
        """P(in at the last bound) and the days in the unit by then."""
        end_h = cumulative_hazard_at(self.model.hazard.profile, self.rates, self.bounds_local,
                                     self.days_in, self.bounds_local[:, -1:])[:, 0]
        days_at_end = self.days_in + (self.bounds_ns[:, -1] - self.bounds_ns[:, 0]) / NS_PER_DAY
        return np.exp(-end_h), days_at_end

    def tail_mean(self) -> FloatArray:
        """Mean remaining stay from the last bound, from the admission group's Coxian given
        the days spent by then: integral of S(a + x) dx / S(a) (quadrature on a log grid)."""
        _, days_at_end = self._end
        out = np.zeros(days_at_end.size)
        for node in np.unique(self.group):
            mask = self.group == node
            group = self.model.groups.get(int(node))
            law = group.distribution
            a = days_at_end[mask]
            # The mean residual is smooth in a: computed on at most 128 ages, interpolated.
            ages = np.unique(a) if np.unique(a).size <= 128 else np.linspace(a.min(), a.max(),
                                                                             128)
            scale = max(law.mean(), 1e-3)
            x = np.concatenate([[0.0], scale * np.geomspace(1e-3, 200.0, 120)])
            logs = law.logsf(ages[:, None] + x[None, :]) - law.logsf(ages)[:, None]
            out[mask] = np.interp(a, ages, np.trapezoid(np.exp(logs), x, axis=1))
        return out

    def mean_remaining(self, grid_step: float = 0.25) -> FloatArray:
        """Expected remaining stay in days: the curve to the last bound, then the group tail."""
        span = (self.bounds_ns[:, -1] - self.bounds_ns[:, 0]) / NS_PER_DAY
        width = float(span.max())
        grid = np.arange(0.0, width + grid_step, grid_step)
        offsets = np.minimum(grid[None, :], span[:, None])
        query = self.bounds_ns[:, :1] + np.round(offsets * NS_PER_DAY).astype(np.int64)
        surv = self.survival(query)
        body = np.trapezoid(surv, offsets, axis=1)
        s_end, _ = self._end
        return body + s_end * self.tail_mean()

    def median_remaining(self, limit_days: FloatArray) -> FloatArray:
        """Median remaining stay in days from the first bound; NaN beyond ``limit_days``
        (time so far plus remaining)."""
        t_local = time_of_cumulative_hazard(self.model.hazard.profile, self.rates,
                                            self.bounds_local, self.days_in, math.log(2.0))
        out = np.full(t_local.size, np.nan)
        found = ~np.isnan(t_local)
        if found.any():
            # Local days differ from elapsed time across a clock change: go back to UTC.
            naive = pd.DatetimeIndex(np.round(t_local[found] * NS_PER_DAY).astype(np.int64))
            t_ns = _localize(naive, self.tz)
            out[found] = (t_ns - self.bounds_ns[found, 0]) / NS_PER_DAY
        missing = np.isnan(out)
        if missing.any():
            s_end, days_at_end = self._end
            span = (self.bounds_ns[:, -1] - self.bounds_ns[:, 0]) / NS_PER_DAY
            for i in np.flatnonzero(missing & (s_end > 0.5)):
                law = self.model.groups.get(int(self.group[i])).distribution
                try:
                    remaining = law.conditional(float(days_at_end[i]))
                except ValueError:  # survival to that age underflows: beyond the data
                    continue
                out[i] = span[i] + float(remaining.ppf(1.0 - 0.5 / s_end[i]))
        out = np.where(self.days_in + out > limit_days, np.nan, out)
        return out


def _landmark_curves(model: LosModel, landmarks: Landmarks, tz: ZoneInfo, steps: int) -> _Curves:
    cov = model.design.covariate_matrix(landmarks.stays)[landmarks.stay_index]
    return model.curves(cov, landmarks.days_in, landmarks.observed, landmarks.at_ns, tz, steps)


# ---------------------------------------------------------------------------------------------
# Per-stay prediction (the product)
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class StayPredictions:
    """Per current stay: P(in the unit) at each census instant, median remaining stay, group.

    ``median_remaining_days`` is None where the median lies beyond the longest stay seen in
    the stay's admission group (beyond what the model can tell).
    """

    stay_ids: tuple[str, ...]
    instants: tuple[datetime, ...]
    p_present: FloatArray
    median_remaining_days: tuple[float | None, ...]
    group: tuple[str, ...]
    leaf: tuple[int, ...]
    admission_group: tuple[int, ...]

    def records(self) -> list[dict[str, Any]]:
        """The ``stays`` list of the forecast JSON."""
        return [{"stay_id": s, "p_present": [float(v) for v in self.p_present[i]],
                 "median_remaining_days": self.median_remaining_days[i],
                 "group": self.group[i]} for i, s in enumerate(self.stay_ids)]


def _as_model(model: LosModel | Mapping[str, Any]) -> LosModel:
    return model if isinstance(model, LosModel) else LosModel.from_payload(model)


def predict_stays(model: LosModel | Mapping[str, Any], state: UnitState,
                  instants: Sequence[datetime]) -> StayPredictions:
    """Forecast every stay in the unit at ``state.as_of``.

    Parameters
    ----------
    model : LosModel or dict
        A trained model or its payload.
    state : UnitState
        What is known at as_of (``with_history=False`` is enough); the latest scores come from
        ``state.current_stays()``, so a score entered a moment ago changes the forecast at once.
    instants : sequence of datetime
        Aware instants after as_of, increasing (normally the next N census instants).

    Returns
    -------
    StayPredictions
    """
    los = _as_model(model)
    if list(instants) != sorted(instants):
        raise ValueError("instants: must be increasing")
    as_of_ns = int(_ns([state.as_of])[0])
    query = _ns(list(instants)) if instants else np.zeros(0, dtype=np.int64)
    if query.size and query.min() < as_of_ns:
        raise ValueError("instants: must not be before as_of")
    current = state.current_stays()
    n = len(current)
    if n == 0:
        return StayPredictions((), tuple(instants), np.zeros((0, len(query))), (), (), (), ())
    days_in = current["days_in"].to_numpy(dtype=float)
    observed = {}
    for name in los.design.names:
        for key in (name, f"{name}_change", f"{name}_hours"):
            observed[key] = (current[key].to_numpy(dtype=float) if key in current
                             else np.full(n, np.nan))
    covariates = los.design.covariate_matrix(current)
    at = np.full(n, as_of_ns, dtype=np.int64)
    needed = 1
    if query.size:
        needed = int(math.ceil((int(query.max()) - as_of_ns) / NS_PER_DAY)) + 2
    steps = max(los.horizon, needed)
    curves = los.curves(covariates, days_in, observed, at, state.tz, steps)
    p_present = (curves.survival(np.tile(query, (n, 1))) if query.size
                 else np.zeros((n, 0)))
    limits = np.array([los.groups.get(int(g)).longest_days for g in curves.group])
    median = curves.median_remaining(limits)
    leaf = curves.leaf[:, 0]
    rules = {int(node): los.hazard.tree.rule(int(node), omit=("step",)) for node in set(leaf)}
    return StayPredictions(
        stay_ids=tuple(str(s) for s in current["stay_id"]),
        instants=tuple(instants),
        p_present=p_present,
        median_remaining_days=tuple(None if np.isnan(m) else float(m) for m in median),
        group=tuple(rules[int(node)] for node in leaf),
        leaf=tuple(int(v) for v in leaf),
        admission_group=tuple(int(g) for g in curves.group))


# ---------------------------------------------------------------------------------------------
# Training
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class _StayTable:
    """Whole stays as known at a cut-off: length so far and whether ended."""

    index: IntArray
    days: FloatArray
    ended: npt.NDArray[np.bool_]


def _stays_at(stays: pd.DataFrame, cutoff_ns: int) -> _StayTable:
    admitted = _ns(stays["admitted_at"])
    discharged = _ns(stays["discharged_at"])
    keep = admitted <= cutoff_ns
    ended = stays["discharged_at"].notna().to_numpy() & (discharged <= cutoff_ns)
    end = np.where(ended, discharged, cutoff_ns)
    idx = np.flatnonzero(keep)
    return _StayTable(idx.astype(np.int64), (end[idx] - admitted[idx]) / NS_PER_DAY, ended[idx])


def _stay_hash_half(stay_ids: npt.ArrayLike) -> npt.NDArray[np.bool_]:
    """A fixed half of the stays, by a hash of the stay id (the same on every run)."""
    hashed = pd.util.hash_pandas_object(pd.Series(np.asarray(stay_ids, dtype=object)),
                                        index=False).to_numpy()
    return (hashed % np.uint64(2)) == 1


def _sample_landmarks(landmarks: Landmarks, limit: int, rng: np.random.Generator) -> Landmarks:
    if landmarks.size <= limit:
        return landmarks
    keep = np.zeros(landmarks.size, dtype=bool)
    keep[rng.choice(landmarks.size, size=limit, replace=False)] = True
    return landmarks.subset(keep)


def _fit_hazard(design: Design, landmarks: Landmarks, rows: IntervalRows, *, depth: int,
                min_stays: int, x: npt.NDArray[np.float32] | None = None) -> HazardTreeModel:
    x = _row_matrix(design, landmarks, rows) if x is None else x
    tree = PiecewiseHazardTree(max_depth=depth, min_samples_leaf=MIN_ROWS_LEAF,
                               min_stays_leaf=min_stays)
    tree.fit(x, rows.event, rows.start, rows.stop, rows.days_in, features=design.features,
             groups=landmarks.stay_index[rows.landmark], sample_weight=rows.weight)
    return tree.model_


@dataclass(frozen=True, eq=False)
class _Split:
    """Fit and validation rows, split by stay and by time."""

    fit_lm: Landmarks
    fit_rows: IntervalRows
    val_lm: Landmarks
    val_rows: IntervalRows
    design: Design
    x_fit: npt.NDArray[np.float32]
    x_val: npt.NDArray[np.float32]


def _validation_split(landmarks: Landmarks, cutoff_ns: int, census_time: time, tz: ZoneInfo,
                      names: Sequence[str], rng: np.random.Generator) -> _Split:
    """Fit on what was known at V (three tenths of the way back from the cut-off, at most 180
    days) for one half of the stays (by stay-id hash); validate on the other half's landmarks
    after V, with outcomes known at the cut-off. Split by stay and by time, never by row."""
    first = int(landmarks.at_ns.min())
    span = (cutoff_ns - first) / NS_PER_DAY
    val_days = min(180.0, 0.3 * span)
    v_ns = int(cutoff_ns - val_days * NS_PER_DAY)
    held = _stay_hash_half(landmarks.stays["stay_id"].to_numpy())[landmarks.stay_index]
    fit_lm = landmarks.subset(~held).censored_at(v_ns)
    val_lm = landmarks.subset(held & (landmarks.at_ns >= v_ns))
    val_lm = _sample_landmarks(val_lm, MAX_VALIDATION_ROWS // 4, rng)
    fit_rows = interval_rows(fit_lm, census_time, tz, rng=rng, max_rows=MAX_VALIDATION_ROWS)
    val_rows = interval_rows(val_lm, census_time, tz)
    design = make_design(fit_lm, fit_rows, names)
    return _Split(fit_lm, fit_rows, val_lm, val_rows, design,
                  _row_matrix(design, fit_lm, fit_rows), _row_matrix(design, val_lm, val_rows))


def _n_stays(landmarks: Landmarks, rows: IntervalRows) -> int:
    return int(np.unique(landmarks.stay_index[rows.landmark]).size)


DEFAULT_SIZES = {"max_depth": 3, "min_stays_share": 0.04}


def _can_validate(split: _Split) -> bool:
    return bool(split.fit_rows.event.any() and split.val_rows.event.size >= 50
                and _n_stays(split.fit_lm, split.fit_rows) >= 50)


def _select_hazard(split: _Split) -> tuple[dict[str, Any], list[dict[str, Any]]]:
    """Tree depth and the fewest stays per leaf (as a share of the stays) by validation
    log-likelihood; the smallest tree within 0.0005 nats per row of the best is kept. With too
    little history to validate, fixed sizes (depth 3, 4 % of the stays; common practice, no
    source) and no validation model."""
    if not _can_validate(split):
        return {**DEFAULT_SIZES, "validation_model": None}, []
    n_stays = _n_stays(split.fit_lm, split.fit_rows)
    results: list[dict[str, Any]] = []
    models: list[HazardTreeModel] = []
    for depth in DEPTH_GRID:
        for share in MIN_STAYS_SHARE_GRID:
            model = _fit_hazard(split.design, split.fit_lm, split.fit_rows, depth=depth,
                                min_stays=max(10, int(share * n_stays)), x=split.x_fit)
            rows = split.val_rows
            score = piecewise_log_likelihood(model, split.x_val, rows.event, rows.start,
                                             rows.stop, rows.days_in, rows.weight)
            results.append({"max_depth": depth, "min_stays_share": share,
                            "leaves": int(model.tree.leaves.size), "val_loglik": score})
            models.append(model)
    best = max(r["val_loglik"] for r in results)
    chosen = min(range(len(results)), key=lambda i: (
        results[i]["val_loglik"] < best - 5e-4, results[i]["leaves"],
        -results[i]["val_loglik"]))
    return {"max_depth": int(results[chosen]["max_depth"]),
            "min_stays_share": float(results[chosen]["min_stays_share"]),
            "validation_model": models[chosen]}, results


def _ensemble_x(x: npt.NDArray[np.float32], weekday: FloatArray) -> npt.NDArray[np.float32]:
    return np.column_stack([x, weekday.astype(np.float32)])


def _boosted(max_iter: int) -> Any:
    from sklearn.ensemble import HistGradientBoostingRegressor

    return KnownColumnsOnly(HistGradientBoostingRegressor(
        loss="poisson", learning_rate=0.1, max_iter=max_iter, max_leaf_nodes=15,
        min_samples_leaf=200, l2_regularization=1.0, early_stopping=False, random_state=0))


def _one_thread() -> Any:
    """OpenMP limited to one thread around the ensemble: on a shared two-core machine its
    threads otherwise wait on each other (measured: 1.4 s on one thread, 13 s on two, while
    another process was busy)."""
    from threadpoolctl import threadpool_limits

    return threadpool_limits(limits=1, user_api="openmp")


def _select_ensemble(split: _Split, hazard: HazardTreeModel) -> tuple[int, list[float]]:
    """Number of boosting iterations by validation log-likelihood (the same split by stay and
    time as the tree; scikit-learn's own early stopping would split rows at random)."""
    rows, val = split.fit_rows, split.val_rows
    exposure = hazard.profile.exposure(rows.start, rows.stop, rows.days_in)
    keep = exposure > 1e-12
    model = _boosted(100)
    with _one_thread():
        model.fit(_ensemble_x(split.x_fit, _rows_weekday(rows))[keep],
                  rows.event[keep] / exposure[keep],
                  sample_weight=(rows.weight * exposure)[keep])
    x_val = _ensemble_x(split.x_val, _rows_weekday(val))
    # The piecewise-exponential log-likelihood, with the exposure computed once.
    val_exposure = hazard.profile.exposure(val.start, val.stop, val.days_in)
    ended = val.event
    intensity = hazard.profile.intensity(val.stop[ended],
                                         val.days_in[ended] + (val.stop - val.start)[ended])
    scores = []
    with _one_thread():
        for rate in model.staged_predict(x_val):
            loglik = -rate * val_exposure
            loglik[ended] += np.log(np.maximum(rate[ended] * intensity, 1e-300))
            scores.append(float(np.sum(val.weight * loglik) / np.sum(val.weight)))
    return int(np.argmax(scores)) + 1, scores


def _min_stays(params: Mapping[str, Any], landmarks: Landmarks, rows: IntervalRows) -> int:
    return max(10, int(params["min_stays_share"] * _n_stays(landmarks, rows)))


def _admission_x(design: Design, stays: pd.DataFrame) -> FloatArray:
    return design.covariate_matrix(stays)


def _select_groups(design: Design, stays: pd.DataFrame, cutoff_ns: int
                   ) -> tuple[dict[str, Any], list[dict[str, Any]]]:
    """Size of the admission tree by integrated Brier score (days 1..14) on later stays of the
    held-out half, fitted on the earlier state of the other half."""
    from sksurv.metrics import integrated_brier_score
    from sksurv.tree import SurvivalTree
    from sksurv.util import Surv

    admitted = _ns(stays["admitted_at"])
    first = int(admitted.min())
    val_days = min(90.0, 0.25 * (cutoff_ns - first) / NS_PER_DAY)
    v_ns = int(cutoff_ns - val_days * NS_PER_DAY)
    held = _stay_hash_half(stays["stay_id"].to_numpy())
    fit = _stays_at(stays, v_ns)
    fit_keep = ~held[fit.index]
    later = _stays_at(stays, cutoff_ns)
    val_keep = held[later.index] & (admitted[later.index] > v_ns)
    x_all = _admission_x(design, stays)
    x_fit, y_fit = x_all[fit.index[fit_keep]], Surv.from_arrays(
        fit.ended[fit_keep], round_up_to_hours(fit.days[fit_keep]))
    x_val = x_all[later.index[val_keep]]
    y_val = Surv.from_arrays(later.ended[val_keep], round_up_to_hours(later.days[val_keep]))
    times = np.arange(1.0, 15.0)
    results: list[dict[str, Any]] = []
    n = int(fit_keep.sum())
    # Scored are the validation stays within the fitted stays' follow-up; they must run past
    # the last day scored (scikit-survival refuses times beyond the test data's follow-up).
    in_range = y_val["time"] <= y_fit["time"].max()
    usable = (int(in_range.sum()) >= 20 and y_val["time"][in_range].max() > times[-1]
              and y_fit["time"].max() > times[-1])
    for depth in GROUP_DEPTH_GRID:
        for share in (0.05,):
            leaf = max(30, int(share * n))
            score = float("nan")
            if usable:
                tree = SurvivalTree(max_depth=depth, min_samples_leaf=leaf, low_memory=False)
                tree.fit(x_fit, y_fit)
                funcs = tree.predict_survival_function(x_val)
                est = np.vstack([f(np.minimum(times, f.x[-1])) for f in funcs])
                score = float(integrated_brier_score(y_fit, y_val[in_range], est[in_range],
                                                     times))
            results.append({"max_depth": depth, "leaf_share": share, "val_ibs": score})
    scored = [r for r in results if not math.isnan(r["val_ibs"])]
    if not scored:
        return {"max_depth": 1, "leaf_share": 0.15}, results
    best = min(r["val_ibs"] for r in scored)
    chosen = min((r for r in scored if r["val_ibs"] <= best + 1e-4),
                 key=lambda r: (r["max_depth"], -r["leaf_share"]))
    return {"max_depth": chosen["max_depth"], "leaf_share": chosen["leaf_share"]}, results


def _fit_groups(design: Design, stays: pd.DataFrame, cutoff_ns: int, params: Mapping[str, Any],
                seed: int) -> StayGroups:
    table = _stays_at(stays, cutoff_ns)
    x = _admission_x(design, stays)[table.index]
    kinds = stays["admission_type"].to_numpy()[table.index]
    return fit_stay_groups(x, table.days, table.ended, kinds, design.admission_features,
                           max_depth=int(params["max_depth"]),
                           min_samples_leaf=max(30, int(params["leaf_share"] * table.index.size)),
                           rng=seed)


# ---------------------------------------------------------------------------------------------
# Test metrics
# ---------------------------------------------------------------------------------------------

EVAL_DAYS = np.arange(1.0, 15.0)  # integrated Brier score over days 1..14
RMST_GRID = np.arange(0.0, 14.0 + 1e-9, 0.25)


def survival_metrics(event: npt.ArrayLike, remaining: npt.ArrayLike, surv_days: FloatArray,
                     rmst: FloatArray, mean_remaining: FloatArray,
                     train_event: npt.ArrayLike, train_remaining: npt.ArrayLike
                     ) -> dict[str, float]:
    """Concordance, integrated Brier score (days 1..14) and variance explained.

    Parameters
    ----------
    event, remaining : array_like, shape (n,)
        Test outcome: left the unit (True) or censored, after ``remaining`` days.
    surv_days : ndarray, shape (n, 14)
        Predicted P(still in) 1, 2, ..., 14 days after the landmark.
    rmst : ndarray, shape (n,)
        Predicted expected days in the unit over the next 14 (restricted mean): the risk score
        for Harrell's concordance (shorter expected stay = higher risk of leaving).
    mean_remaining : ndarray, shape (n,)
        Predicted mean remaining stay, for the variance explained on completed stays
        (1 - residual sum of squares / total sum of squares, as a regression tree's).
    train_event, train_remaining
        Training outcomes, for the censoring weights of the Brier score (IPCW).

    Uses ``sksurv.metrics.concordance_index_censored`` and ``integrated_brier_score``.
    """
    from sksurv.metrics import concordance_index_censored, integrated_brier_score
    from sksurv.util import Surv

    d = np.asarray(event, dtype=bool)
    t = np.asarray(remaining, dtype=float)
    train_d = np.asarray(train_event, dtype=bool)
    train_t = np.asarray(train_remaining, dtype=float)
    if train_t.size > MAX_CENSORING_SAMPLE:
        # The censoring distribution for the Brier weights from a fixed random sample of the
        # training outcomes: the same curve within sampling error, at a fraction of the time.
        pick = np.random.default_rng(2).choice(train_t.size, MAX_CENSORING_SAMPLE,
                                               replace=False)
        train_d, train_t = train_d[pick], train_t[pick]
    y_train = Surv.from_arrays(train_d, train_t)
    nan = float("nan")
    # Too short a test period has no comparable pair, or no follow-up to day 14: those
    # figures are then NaN (stored as null) rather than an error.
    try:
        concordance = float(concordance_index_censored(d, t, -np.asarray(rmst))[0])
    except (ValueError, ZeroDivisionError):
        concordance = nan
    usable = t < y_train["time"].max()
    ibs = nan
    # The censoring weights need an ended stay in each set (a unit with few stays may have
    # none in its test period).
    if (usable.any() and t[usable].max() > EVAL_DAYS[-1] and t[usable].min() < EVAL_DAYS[0]
            and d[usable].any() and train_d.any()):
        y_test = Surv.from_arrays(d[usable], t[usable])
        ibs = float(integrated_brier_score(y_train, y_test, surv_days[usable], EVAL_DAYS))
    y = t[d]
    pred = np.asarray(mean_remaining)[d]
    ss_tot = float(np.sum((y - y.mean()) ** 2)) if y.size else 0.0
    r2 = 1.0 - float(np.sum((y - pred) ** 2)) / ss_tot if ss_tot > 0 else nan
    return {"concordance": concordance, "ibs_1_14": ibs, "r2_completed": r2}


def _curve_summaries(curves: _Curves, at_ns: IntArray) -> tuple[FloatArray, FloatArray,
                                                                FloatArray]:
    """P(in) after 1..14 days, the restricted mean over 14 days and the mean remaining stay,
    from one evaluation of the curves on a quarter-day grid."""
    step = 0.5
    span = (curves.bounds_ns[:, -1] - at_ns) / NS_PER_DAY
    grid = np.arange(0.0, float(span.max()) + step, step)
    offsets = np.minimum(grid[None, :], span[:, None])
    surv = curves.survival(at_ns[:, None] + np.round(offsets * NS_PER_DAY).astype(np.int64))
    day_columns = np.round(EVAL_DAYS / step).astype(np.int64)
    surv_days = surv[:, day_columns]
    upto = int(round(14.0 / step)) + 1
    rmst = np.trapezoid(surv[:, :upto], grid[:upto], axis=1)
    body = np.trapezoid(surv, offsets, axis=1)
    s_end, _ = curves._end
    return surv_days, rmst, body + s_end * curves.tail_mean()


def _km_summaries(km: Any, days_in: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray]:
    """The no-covariate baseline: Kaplan-Meier of whole stays given the days already spent,
    S(d + t) / S(d)."""
    d = np.asarray(days_in, dtype=float)
    base = np.asarray(km.sf(d), dtype=float)
    safe = np.where(base > 0, base, 1.0)

    def conditional(t: FloatArray) -> FloatArray:
        values = np.asarray(km.sf(d[:, None] + t[None, :]), dtype=float) / safe[:, None]
        return np.where(base[:, None] > 0, values, 0.0)

    surv_days = conditional(EVAL_DAYS)
    rmst = np.trapezoid(conditional(RMST_GRID), RMST_GRID, axis=1)
    # Mean remaining stay restricted to the last Kaplan-Meier time tau: the integral of the
    # step function from d to tau over S(d), exact from its running integral.
    times = np.asarray(km.times, dtype=float)
    steps = np.r_[1.0, np.asarray(km.sf(times), dtype=float)]
    knots = np.r_[0.0, times]
    running = np.r_[0.0, np.cumsum(steps[:-1] * np.diff(knots))]
    tau = float(knots[-1])
    integral = running[-1] - np.interp(np.minimum(d, tau), knots, running)
    mean_rem = np.where((base > 0) & (d < tau), integral / safe, 0.0)
    return surv_days, rmst, mean_rem


def _thin_rows(rows: IntervalRows, limit: int, rng: np.random.Generator) -> IntervalRows:
    """At most about ``limit`` rows, whole landmarks sampled, weights scaled up to match."""
    if rows.event.size <= limit:
        return rows
    keep_prob = limit / rows.event.size
    landmarks = np.unique(rows.landmark)
    chosen = landmarks[rng.random(landmarks.size) < keep_prob]
    thinned = rows.subset(np.isin(rows.landmark, chosen))
    return replace(thinned, weight=thinned.weight / keep_prob)


def _interval_weekday(bounds_local: FloatArray) -> FloatArray:
    """Weekday (Monday 0) of the local day holding each interval's last twelve hours."""
    day = np.floor(bounds_local[:, 1:] - 0.5)
    return ((day.astype(np.int64) + 3) % 7).astype(float)


def _rows_weekday(rows: IntervalRows) -> FloatArray:
    day = np.floor(rows.bound - 0.5)
    return ((day.astype(np.int64) + 3) % 7).astype(float)


def _test_metrics(model: LosModel, train_lm: Landmarks, train_rows: IntervalRows,
                  test_lm: Landmarks, tz: ZoneInfo, ensemble_iter: int | None
                  ) -> dict[str, Any]:
    from app.stats.kaplan_meier import kaplan_meier

    steps = HORIZON_STEPS + 1
    curves = _landmark_curves(model, test_lm, tz, steps)
    event, remaining = test_lm.ended, test_lm.remaining_days
    train_event, train_remaining = train_lm.ended, train_lm.remaining_days
    out: dict[str, Any] = {"landmarks": int(test_lm.size),
                           "stays": int(np.unique(test_lm.stay_index).size)}
    tree = survival_metrics(event, remaining, *_curve_summaries(curves, test_lm.at_ns),
                            train_event, train_remaining)
    cutoff_ns = int(train_lm.end_ns.max())
    table = _stays_at(train_lm.stays, cutoff_ns)
    km = kaplan_meier(round_up_to_hours(table.days), table.ended)
    baseline = survival_metrics(event, remaining, *_km_summaries(km, test_lm.days_in),
                                train_event, train_remaining)
    out["tree"], out["km"] = tree, baseline
    if ensemble_iter is not None:
        rows = _thin_rows(train_rows, MAX_ENSEMBLE_ROWS, np.random.default_rng(1))
        x = _ensemble_x(_row_matrix(model.design, train_lm, rows), _rows_weekday(rows))
        exposure = model.hazard.profile.exposure(rows.start, rows.stop, rows.days_in)
        keep = exposure > 1e-12
        ensemble = _boosted(ensemble_iter)
        x_test = _ensemble_x(curves.x, _interval_weekday(curves.bounds_local).ravel())
        with _one_thread():
            ensemble.fit(x[keep], rows.event[keep] / exposure[keep],
                         sample_weight=(rows.weight * exposure)[keep])
            boosted = curves.with_rates(ensemble.predict(x_test))
        out["ensemble"] = survival_metrics(event, remaining,
                                           *_curve_summaries(boosted, test_lm.at_ns),
                                           train_event, train_remaining)
        # What the readable tree gives up, relative to the ensemble (positive: tree worse).
        out["ensemble_gap"] = {
            "ibs_1_14": tree["ibs_1_14"] / out["ensemble"]["ibs_1_14"] - 1.0,
            "concordance": 1.0 - tree["concordance"] / out["ensemble"]["concordance"],
        }
    return out


# ---------------------------------------------------------------------------------------------
# The training run
# ---------------------------------------------------------------------------------------------

CURVE_USES = {
    "hazard_tree": "per-stay P(in the unit) at each census instant over the next "
                   f"{HORIZON_STEPS} census intervals, and the group rule shown per stay",
    "kaplan_meier": "the group curves shown on the model page, and the no-covariate baseline "
                    "of the test metrics",
    "coxian": "stays still to come (emergency arrivals, booked electives) and planning (mean "
              "stay); for current stays the tail past the hazard tree's horizon, from the time "
              "already spent (median remaining stay beyond the horizon)",
}


def _iso(ns: int, tz: ZoneInfo) -> str:
    return pd.Timestamp(int(ns), tz="UTC").tz_convert(tz).isoformat()


def train_los(state: UnitState, *, test_days: float | None = None,
              landmark_clock: time = LANDMARK_CLOCK, compare: bool = True,
              evaluate: bool = True, seed: int = 0) -> dict[str, Any]:
    """Train the length-of-stay model on everything known at ``state.as_of``.

    Holds out the last ``test_days`` (default: a quarter of the history, at most 90 days),
    chooses tree sizes by validation before it, scores the model trained as of the test start
    on the test period, then refits on the whole history with the chosen sizes.

    Parameters
    ----------
    state : UnitState
        What was known at the end of training (``with_history=True``).
    test_days : float, optional
        Length of the held-out test period.
    landmark_clock : datetime.time
        Local time of the daily landmark.
    compare : bool, default True
        Also fit the boosted ensemble on the same rows and report its test metrics.
    evaluate : bool, default True
        Hold out a test period and report its metrics. False (for backtests that retrain
        often) chooses the sizes by validation on the whole history and fits once.
    seed : int
        For the row sampling of very large histories and the Coxian random starts.

    Returns
    -------
    dict
        The JSON-able payload: ``trained_until``, ``window``, ``metrics`` and ``los``.

    Raises
    ------
    ValueError
        Too little history (no discharge before the test period).
    """
    clock_start = timer.perf_counter()
    rng = np.random.default_rng(seed)
    tz = state.tz
    names = observation_names(state)
    until_ns = int(_ns([state.as_of])[0])
    full = build_landmarks(state, landmark_clock=landmark_clock, names=names)
    require_history(state.unit, int(np.unique(full.stay_index[full.ended]).size),
                    _iso(until_ns, tz))
    first_ns = int(_ns(state.stays["admitted_at"]).min())
    window_days = (until_ns - first_ns) / NS_PER_DAY
    if test_days is None:
        test_days = min(90.0, 0.25 * window_days)
    test_from = int(until_ns - float(test_days) * NS_PER_DAY) if evaluate else until_ns
    train_lm = full.censored_at(test_from) if evaluate else full
    if train_lm.size == 0 or not train_lm.ended.any():
        raise TooLittleHistory(f"unit {state.unit}: no stay ended before the test period "
                               f"({_iso(test_from, tz)}); need a longer history")
    # Scores are screened on the rows the tested model learns from, so the stored model has
    # the same features as the one whose test metrics are reported.
    names, left_out = screen_scores(train_lm.observed, train_lm.stay_index, names)

    # 1. Sizes by validation inside the training period (split by stay and by time).
    split = _validation_split(train_lm, test_from, state.census_time, tz, names, rng)
    params, grid = _select_hazard(split)
    validation_model = params.pop("validation_model")
    ensemble_iter: int | None = None
    ensemble_scores: list[float] = []
    if compare and evaluate and validation_model is not None:
        ensemble_iter, ensemble_scores = _select_ensemble(split, validation_model)
    del split, validation_model
    group_params, group_grid = _select_groups(
        make_design(train_lm, interval_rows(train_lm, state.census_time, tz, rng=rng,
                                            max_rows=MAX_VALIDATION_ROWS), names),
        state.stays, test_from)
    metrics: dict[str, Any] = {"left_out": left_out}

    # 2. The model as known at the test start, scored on the test period.
    if evaluate:
        train_rows = interval_rows(train_lm, state.census_time, tz, rng=rng, max_rows=MAX_ROWS)
        design_t = make_design(train_lm, train_rows, names)
        hazard_t = _fit_hazard(design_t, train_lm, train_rows, depth=params["max_depth"],
                               min_stays=_min_stays(params, train_lm, train_rows))
        groups_t = _fit_groups(design_t, state.stays, test_from, group_params, seed)
        model_t = LosModel(design_t, hazard_t, groups_t, state.census_time, HORIZON_STEPS)
        test_lm = _sample_landmarks(full.subset(full.at_ns >= test_from), MAX_TEST_LANDMARKS,
                                    rng)
        metrics.update({"test_from": _iso(test_from, tz), "test_to": _iso(until_ns, tz)})
        if test_lm.size:
            metrics.update(_test_metrics(model_t, train_lm, train_rows, test_lm, tz,
                                         ensemble_iter))
        if ensemble_iter is not None:
            metrics["ensemble_iterations"] = ensemble_iter
        del train_rows, model_t

    # 3. The stored model: everything known at until, the same sizes.
    rows = interval_rows(full, state.census_time, tz, rng=rng, max_rows=MAX_ROWS)
    design = make_design(full, rows, names)
    hazard = _fit_hazard(design, full, rows, depth=params["max_depth"],
                         min_stays=_min_stays(params, full, rows))
    groups = _fit_groups(design, state.stays, until_ns, group_params, seed)
    metrics["train_seconds"] = timer.perf_counter() - clock_start
    metrics["training_rows"] = int(len(rows.event))
    payload = {
        "trained_until": _iso(until_ns, tz),
        "window": {"from": _iso(first_ns, tz), "to": _iso(until_ns, tz),
                   "test_from": _iso(test_from, tz) if evaluate else None},
        "metrics": metrics,
        "los": {
            "format": PAYLOAD_FORMAT,
            "kind": "discharge-hazard-tree",
            "landmark_clock": landmark_clock.strftime("%H:%M"),
            "census_time": state.census_time.strftime("%H:%M"),
            "horizon_steps": HORIZON_STEPS,
            "design": design.to_dict(),
            "hazard": hazard.to_dict(),
            "leaf_rules": {str(int(n)): hazard.tree.rule(int(n))
                           for n in hazard.tree.leaves},
            "groups": groups.to_dict(),
            "selection": {"hazard": {"chosen": params, "grid": grid},
                          "ensemble": ({"iterations": ensemble_iter,
                                        "val_loglik": max(ensemble_scores)}
                                       if ensemble_iter is not None else None),
                          "groups": {"chosen": group_params, "grid": group_grid}},
            "uses": CURVE_USES,
        },
    }
    return _json_safe(payload)


def _json_safe(value: Any) -> Any:
    """NaN and infinities as None, so the payload is strict JSON."""
    if isinstance(value, dict):
        return {k: _json_safe(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_json_safe(v) for v in value]
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def train_unit(session: Any, unit: str, until: datetime | None, tz: ZoneInfo, *,
               test_days: float | None = None, compare: bool = True,
               evaluate: bool = True) -> tuple[str, dict[str, Any]]:
    """Train on what was known at ``until`` (default: now), store the model, return its id
    and the test metrics (for ``morrow train``; print them with :func:`format_metrics`)."""
    from app.forecast.models import save_model
    from app.state.load import load_state

    moment = datetime.now(UTC) if until is None else until
    state = load_state(session, unit, moment, tz, with_history=True)
    payload = train_los(state, test_days=test_days, compare=compare, evaluate=evaluate)
    model_id = save_model(session, unit, state.as_of.to_pydatetime(), payload)
    return model_id, payload["metrics"]


def format_metrics(metrics: Mapping[str, Any]) -> str:
    """Test metrics as a small table for the terminal."""
    lines = [f"test period {metrics.get('test_from')} .. {metrics.get('test_to')}: "
             f"{metrics.get('landmarks', 0)} landmarks of {metrics.get('stays', 0)} stays"]
    columns = [c for c in ("tree", "km", "ensemble") if c in metrics]
    header = {"tree": "tree", "km": "Kaplan-Meier", "ensemble": "boosted ensemble"}
    lines.append(f"{'':28}" + "".join(f"{header[c]:>18}" for c in columns))
    for key, label in (("concordance", "concordance (higher better)"),
                       ("ibs_1_14", "Brier days 1-14 (lower)"),
                       ("r2_completed", "variance explained")):
        cells = [metrics[c].get(key) for c in columns]
        lines.append(f"{label:28}" + "".join(
            f"{v:>18.4f}" if isinstance(v, int | float) else f"{'n/a':>18}" for v in cells))
    if "train_seconds" in metrics:
        lines.append(f"trained in {metrics['train_seconds']:.1f} s "
                     f"on {metrics['training_rows']} rows")
    for left in metrics.get("left_out", []):
        lines.append(f"left out {left['name']}: {left['why']}")
    return "\n".join(lines)
