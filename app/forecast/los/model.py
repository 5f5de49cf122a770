"""The stored length-of-stay model and its predictions for the stays in a unit."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from datetime import datetime, time
from functools import cached_property
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
import numpy.typing as npt
import pandas as pd

from app.bounded_cache import BoundedCache
from app.forecast.los.calibration import HazardScale
from app.forecast.los.constants import NS_PER_DAY, PAYLOAD_FORMAT, FloatArray, IntArray
from app.forecast.los.design import Design
from app.forecast.los.rows import Landmarks, _local_days, _localize, forecast_bounds
from app.state.frames import UnitState
from app.stats.stay_groups import StayGroups
from app.stats.survival_tree import (
    HazardTreeModel,
    cumulative_hazard_at,
    interval_exposure,
    time_of_cumulative_hazard,
)

# Models made from payloads lately, by the payload's id (the payload is kept with its model,
# so the id cannot be reused while the entry lives).
MADE_SIZE = 32
_MADE: BoundedCache[tuple[Mapping[str, Any], LosModel]] = BoundedCache(MADE_SIZE)


@dataclass(frozen=True, eq=False)
class LosModel:
    """A trained length-of-stay model read from its payload."""

    design: Design
    hazard: HazardTreeModel
    groups: StayGroups
    census_time: time
    horizon: int
    # Every rate of the tree times this (app/forecast/los/calibration.py; 1: as fitted).
    scale: float = 1.0

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
                   horizon=int(los["horizon_steps"]),
                   scale=HazardScale.from_dict(los.get("hazard_scale")).value)

    @classmethod
    def of(cls, payload: Mapping[str, Any]) -> LosModel:
        """:meth:`from_payload`, made once per payload object while it is among the last
        few asked for (the model is immutable; a hospital's forecast reads each unit's model
        for its own forecast and for each unit it passes patients on to)."""
        found = _MADE.get(id(payload))
        if found is not None and found[0] is payload:
            return found[1]
        model = cls.from_payload(payload)
        _MADE.put(id(payload), (payload, model))
        return model

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
        rates = self.hazard.tree.value[leaf] * self.scale
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
        instants, where = np.unique(q, return_inverse=True)   # rows mostly share instants
        local = _local_days(instants, self.tz)[where].reshape(q.shape)
        h = cumulative_hazard_at(self.model.hazard.profile, self.rates, self.bounds_local,
                                 self.days_in, local, exposure=self._exposure)
        return np.exp(-h)

    @cached_property
    def _exposure(self) -> FloatArray:
        """Typical days of exposure in each interval (the same whatever the rates)."""
        return interval_exposure(self.model.hazard.profile, self.bounds_local, self.days_in)

    @cached_property
    def group(self) -> IntArray:
        return self.model.groups.group_of(self.covariates)

    @cached_property
    def _end(self) -> tuple[FloatArray, FloatArray]:
        """P(in at the last bound) and the days in the unit by then."""
        end_h = cumulative_hazard_at(self.model.hazard.profile, self.rates, self.bounds_local,
                                     self.days_in, self.bounds_local[:, -1:],
                                     exposure=self._exposure)[:, 0]
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
                                            self.bounds_local, self.days_in, math.log(2.0),
                                            exposure=self._exposure)
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
    as_of_ns = int(state.as_of.value)
    query = np.array([pd.Timestamp(t).value for t in instants], dtype=np.int64)
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
