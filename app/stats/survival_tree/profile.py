"""The unit's discharge profile (clock hour x weekday x day of stay) and hazard integrals."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from functools import cached_property
from typing import Any

import numpy as np
import numpy.typing as npt

from app.stats.survival_tree import exposure_kernel
from app.stats.survival_tree.rules import FloatArray, IntArray

# 1970-01-01 (day 0 of the local-day axis) was a Thursday; weekday 0 is Monday.
_EPOCH_WEEKDAY = 3


# Day-of-stay bins (days since admission): fine early, where discharges ramp up, coarse late.
DEFAULT_STAY_EDGES = (0.25, 0.5, 1.0, 1.5, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0, 10.0, 12.0, 14.0,
                      17.0, 21.0, 28.0, 42.0)


@dataclass(frozen=True, eq=False)
class DischargeProfile:
    """The unit's usual discharge rate by local clock hour, weekday and day of stay.

    The hazard of a stay at instant u is ``rate[leaf] * profile(u)`` with

        profile(u) = hourly[h(u)] / mean(hourly) * weekday[d(u)] * stay_day[j(u)]

    where h is the local clock hour (bins (h, h + 1], right-closed, so a discharge at 00:00
    belongs to the day before, like a census at 00:00 that no longer counts it), d the local
    weekday (Monday 0) and j the day-of-stay bin of the time since admission. A whole day at
    factors 1 counts one "typical day" of exposure.

    Time is in *local days*: wall-clock time in the site's zone as days since 1970-01-01 00:00.

    Attributes
    ----------
    hourly : numpy.ndarray, shape (24,)
        Relative intensity by clock hour (only ratios matter).
    weekday : numpy.ndarray, shape (7,)
        Factor by weekday, Monday first.
    stay_edges : numpy.ndarray, shape (B - 1,)
        Inner edges of the day-of-stay bins, in days since admission, increasing.
    stay_day : numpy.ndarray, shape (B,)
        Factor by day-of-stay bin.
    """

    hourly: FloatArray
    weekday: FloatArray
    stay_edges: FloatArray
    stay_day: FloatArray

    def __post_init__(self) -> None:
        values = {name: np.asarray(getattr(self, name), dtype=float)
                  for name in ("hourly", "weekday", "stay_edges", "stay_day")}
        for name, size in (("hourly", 24), ("weekday", 7)):
            v = values[name]
            if v.shape != (size,) or not np.all(v > 0) or not np.all(np.isfinite(v)):
                raise ValueError(f"{name}: needs {size} positive finite values")
        edges, factors = values["stay_edges"], values["stay_day"]
        if edges.ndim != 1 or np.any(np.diff(edges) <= 0) or np.any(edges <= 0):
            raise ValueError("stay_edges: must be positive and increasing")
        if factors.shape != (edges.size + 1,) or not np.all(factors > 0):
            raise ValueError("stay_day: needs one positive factor per bin (len(stay_edges) + 1)")
        for name, v in values.items():
            object.__setattr__(self, name, v)

    @classmethod
    def flat(cls, stay_edges: Sequence[float] = DEFAULT_STAY_EDGES) -> DischargeProfile:
        """All factors 1: exposure is elapsed time."""
        edges = np.asarray(stay_edges, dtype=float)
        return cls(np.ones(24), np.ones(7), edges, np.ones(edges.size + 1))

    @cached_property
    def _hour_share(self) -> FloatArray:
        # Normalised here, not in __post_init__, so stored values round-trip exactly.
        return self.hourly / self.hourly.sum()

    @cached_property
    def _hour_cumulative(self) -> FloatArray:
        return np.concatenate([[0.0], np.cumsum(self._hour_share)])

    def within_day(self, fraction: npt.ArrayLike) -> FloatArray:
        """Share of a day's clock intensity between 00:00 and ``fraction`` of the day."""
        f = np.clip(np.asarray(fraction, dtype=float), 0.0, 1.0) * 24.0
        hour = np.minimum(np.floor(f).astype(np.int64), 23)
        return self._hour_cumulative[hour] + self._hour_share[hour] * (f - hour)

    def stay_bin(self, days_in: npt.ArrayLike) -> IntArray:
        """Day-of-stay bin of a time since admission (right-closed like the clock)."""
        return np.searchsorted(self.stay_edges, np.asarray(days_in, dtype=float), side="left")

    def pieces(self, start: npt.ArrayLike, stop: npt.ArrayLike, days_in: npt.ArrayLike
               ) -> tuple[IntArray, IntArray, IntArray, FloatArray]:
        """Split each [start, stop) at local midnights and day-of-stay edges.

        Parameters
        ----------
        start, stop : array_like, shape (n,)
            Local days, ``stop >= start``.
        days_in : array_like, shape (n,)
            Days since admission at ``start``.

        Returns
        -------
        row, weekday, stay_bin : numpy.ndarray of int, shape (P,)
        share : numpy.ndarray, shape (P,)
            Clock-hour share of a day in each piece (weekday and stay factors not applied).
        """
        a = np.asarray(start, dtype=float)
        b = np.asarray(stop, dtype=float)
        d0 = np.asarray(days_in, dtype=float)
        n = a.size
        if n == 0:
            zi = np.zeros(0, dtype=np.int64)
            return zi, zi, zi, np.zeros(0)
        span = int(np.ceil(np.max(b - a))) + 1
        midnights = np.floor(a)[:, None] + np.arange(1, span + 1)[None, :]
        # Only the day-of-stay edges inside each row's span, padded with +inf.
        first = np.searchsorted(self.stay_edges, d0, side="right")
        last = np.searchsorted(self.stay_edges, d0 + (b - a), side="left")
        width = int(np.max(last - first, initial=0))
        padded = np.concatenate([self.stay_edges, np.full(width + 1, np.inf)])
        index = first[:, None] + np.arange(width)[None, :]
        edges = a[:, None] + (padded[index] - d0[:, None])
        cuts = np.concatenate([a[:, None], midnights, edges, b[:, None]], axis=1)
        cuts = np.where((cuts > a[:, None]) & (cuts < b[:, None]), cuts, np.inf)
        cuts[:, 0] = a
        cuts = np.sort(cuts, axis=1)
        cuts = np.where(np.isinf(cuts), b[:, None], cuts)
        cuts = np.concatenate([cuts, b[:, None]], axis=1)
        lo, hi = cuts[:, :-1], cuts[:, 1:]
        keep = hi > lo
        row = np.broadcast_to(np.arange(n)[:, None], lo.shape)[keep]
        lo, hi = lo[keep], hi[keep]
        day = np.floor(lo)
        share = self.within_day(hi - day) - self.within_day(lo - day)
        weekday = (day.astype(np.int64) + _EPOCH_WEEKDAY) % 7
        stay_bin = self.stay_bin(d0[row] + (0.5 * (lo + hi) - a[row]))
        return row.astype(np.int64), weekday, stay_bin, share

    def exposure(self, start: npt.ArrayLike, stop: npt.ArrayLike,
                 days_in: npt.ArrayLike) -> FloatArray:
        """Typical days of exposure in each [start, stop) (profile integrated over it): the
        :meth:`pieces` at their factors, summed (compiled, interval by interval:
        app/stats/survival_tree/exposure_kernel.py)."""
        a = np.ascontiguousarray(start, dtype=float).ravel()
        b = np.broadcast_to(np.asarray(stop, dtype=float), a.shape)
        d = np.broadcast_to(np.asarray(days_in, dtype=float), a.shape)
        return np.asarray(exposure_kernel.exposure(
            a, np.ascontiguousarray(b), np.ascontiguousarray(d), self._hour_share,
            self._hour_cumulative, self.weekday, self.stay_edges, self.stay_day,
            _EPOCH_WEEKDAY), dtype=float)

    def intensity(self, at: npt.ArrayLike, days_in: npt.ArrayLike) -> FloatArray:
        """Profile value (per typical day) at local instants, right-continuous from the left
        (an instant on a bin edge belongs to the bin before)."""
        u = np.asarray(at, dtype=float)
        day = np.ceil(u) - 1.0
        hour = np.clip(np.ceil((u - day) * 24.0).astype(np.int64) - 1, 0, 23)
        weekday = (day.astype(np.int64) + _EPOCH_WEEKDAY) % 7
        return (24.0 * self._hour_share[hour] * self.weekday[weekday]
                * self.stay_day[self.stay_bin(days_in)])

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict, exact round trip with :meth:`from_dict`."""
        return {"hourly": [float(v) for v in self.hourly],
                "weekday": [float(v) for v in self.weekday],
                "stay_edges": [float(v) for v in self.stay_edges],
                "stay_day": [float(v) for v in self.stay_day]}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> DischargeProfile:
        """Inverse of :meth:`to_dict`."""
        return cls(hourly=np.asarray(data["hourly"], dtype=float),
                   weekday=np.asarray(data["weekday"], dtype=float),
                   stay_edges=np.asarray(data["stay_edges"], dtype=float),
                   stay_day=np.asarray(data["stay_day"], dtype=float))


def _hourly_profile(start: FloatArray, stop: FloatArray, event: npt.NDArray[np.bool_],
                    weight: FloatArray, pseudo_events: float = 2.0) -> FloatArray:
    """Hazard by clock hour (events per hour at risk), relative to its mean, shrunk to flat.

    Each hour gets ``pseudo_events / 24`` discharges at the overall rate, so an hour with none
    keeps a small positive intensity (a discharge at 03:00 is rare, not impossible).
    """
    at_risk = np.zeros(24)
    full = np.floor(stop - start)
    at_risk += float(np.sum(weight * full)) / 24.0  # a whole day gives each hour 1/24 day
    rest_start = start + full
    frac0 = (rest_start - np.floor(rest_start)) * 24.0
    frac1 = frac0 + (stop - rest_start) * 24.0  # may pass 24: wrap into the next day
    for h in range(24):
        for shift in (0.0, 24.0):
            lo = np.clip(frac0, h + shift, h + shift + 1)
            hi = np.clip(frac1, h + shift, h + shift + 1)
            at_risk[h] += float(np.sum(weight * (hi - lo))) / 24.0
    ev_day = np.ceil(stop[event]) - 1.0
    hour = np.clip(np.ceil((stop[event] - ev_day) * 24.0).astype(np.int64) - 1, 0, 23)
    counts = np.bincount(hour, weights=weight[event], minlength=24)
    overall = counts.sum() / max(at_risk.sum(), 1e-12)
    per_hour = pseudo_events / 24.0
    rate = (counts + per_hour) / (at_risk + per_hour / max(overall, 1e-12))
    rate = np.maximum(rate / max(overall, 1e-12), 1e-3)
    return rate / rate.mean()


def interval_exposure(profile: DischargeProfile, bounds: npt.ArrayLike,
                      days_in: npt.ArrayLike) -> FloatArray:
    """Typical days of exposure in each interval (bounds[:, k], bounds[:, k + 1]], shape
    (n, K): what the cumulative hazard multiplies by each interval's rate."""
    bounds = np.asarray(bounds, dtype=float)
    days_in = np.asarray(days_in, dtype=float)
    n, k1 = bounds.shape
    starts = bounds[:, :-1].ravel()
    stops = bounds[:, 1:].ravel()
    d = (days_in[:, None] + (bounds[:, :-1] - bounds[:, :1])).ravel()
    return profile.exposure(starts, stops, d).reshape(n, k1 - 1)


def cumulative_hazard_at(profile: DischargeProfile, rates: npt.ArrayLike, bounds: npt.ArrayLike,
                         days_in: npt.ArrayLike, query: npt.ArrayLike, *,
                         exposure: FloatArray | None = None) -> FloatArray:
    """Cumulative hazard at query instants along consecutive intervals with their own rates.

    Parameters
    ----------
    profile : DischargeProfile
    rates : array_like, shape (n, K)
        Rate in interval k, (bounds[:, k], bounds[:, k + 1]].
    bounds : array_like, shape (n, K + 1)
        Interval bounds in local days, increasing; ``bounds[:, 0]`` is the landmark.
    days_in : array_like, shape (n,)
        Days since admission at the landmark.
    query : array_like, shape (n, Q)
        Local-day instants at or after the landmark. Beyond the last bound the last rate goes on.
    exposure : numpy.ndarray, shape (n, K), optional
        :func:`interval_exposure` of these bounds, when already at hand.

    Returns
    -------
    numpy.ndarray, shape (n, Q)
        H(query); the probability of still being in the unit is exp(-H).
    """
    r = np.asarray(rates, dtype=float)
    b = np.asarray(bounds, dtype=float)
    d = np.asarray(days_in, dtype=float)
    q = np.asarray(query, dtype=float)
    n, k = r.shape
    if b.shape != (n, k + 1) or q.ndim != 2 or q.shape[0] != n or d.shape != (n,):
        raise ValueError(f"bounds, days_in, query: shapes {b.shape}, {d.shape}, {q.shape} "
                         f"do not fit rates {r.shape}")
    e = interval_exposure(profile, b, d) if exposure is None else exposure
    h_bounds = np.concatenate([np.zeros((n, 1)), np.cumsum(r * e, axis=1)], axis=1)
    step = (b[:, None, 1:k] < q[:, :, None]).sum(axis=2)  # interval index 0..K-1
    rows = np.broadcast_to(np.arange(n)[:, None], step.shape)
    start = b[rows, step]
    stop = np.maximum(q, start)
    partial = profile.exposure(start.ravel(), stop.ravel(),
                               (d[rows] + (start - b[rows, 0])).ravel()).reshape(q.shape)
    return h_bounds[rows, step] + r[rows, step] * partial


def time_of_cumulative_hazard(profile: DischargeProfile, rates: npt.ArrayLike,
                              bounds: npt.ArrayLike, days_in: npt.ArrayLike,
                              target: float, *, exposure: FloatArray | None = None
                              ) -> FloatArray:
    """First local-day instant where the cumulative hazard reaches ``target`` (NaN if not
    within the bounds). With ``target = log 2`` this is the median time of leaving.

    Inside the interval where it is reached the exposure is linear between clock-hour
    boundaries and day-of-stay edges (the profile is constant there), so it is found exactly:
    the exposure at every such cut at once, then linearly within the cut where it is
    passed."""
    r = np.asarray(rates, dtype=float)
    b = np.asarray(bounds, dtype=float)
    d = np.asarray(days_in, dtype=float)
    n, k = r.shape
    e = interval_exposure(profile, b, d) if exposure is None else exposure
    h_bounds = np.concatenate([np.zeros((n, 1)), np.cumsum(r * e, axis=1)], axis=1)
    reached = h_bounds[:, 1:] >= target
    out = np.full(n, np.nan)
    has = reached.any(axis=1)
    if not has.any():
        return out
    rows = np.flatnonzero(has)
    step = np.argmax(reached[has], axis=1)
    need = (target - h_bounds[rows, step]) / np.maximum(r[rows, step], 1e-300)
    lo = b[rows, step].copy()
    hi = b[rows, step + 1].copy()
    start_days = d[rows] + (lo - b[rows, 0])
    out[rows] = _exposure_reached(profile, lo, hi, start_days, need)
    return out


def _exposure_reached(profile: DischargeProfile, lo: FloatArray, hi: FloatArray,
                      start_days: FloatArray, need: FloatArray) -> FloatArray:
    """Per row, the first instant t in [lo, hi] with exposure(lo, t) >= need (hi if none)."""
    hours = int(np.ceil(float(np.max(hi - lo)) * 24.0)) + 1
    on_hour = (np.floor(lo * 24.0)[:, None] + np.arange(1, hours + 1)[None, :]) / 24.0
    edges = lo[:, None] + (profile.stay_edges[None, :] - start_days[:, None])
    cuts = np.concatenate([on_hour, edges, hi[:, None]], axis=1)
    cuts = np.sort(np.where((cuts > lo[:, None]) & (cuts < hi[:, None]), cuts, np.inf), axis=1)
    cuts = np.concatenate([lo[:, None], np.where(np.isinf(cuts), hi[:, None], cuts)], axis=1)
    m = cuts.shape[1]
    reached = profile.exposure(np.repeat(lo, m), cuts.ravel(),
                               np.repeat(start_days, m)).reshape(cuts.shape)
    enough = reached >= need[:, None]
    j = np.where(enough.any(axis=1), np.argmax(enough, axis=1), m - 1)
    rows = np.arange(lo.size)
    prev = np.maximum(j - 1, 0)
    e0, e1 = reached[rows, prev], reached[rows, j]
    t0, t1 = cuts[rows, prev], cuts[rows, j]
    frac = np.where(e1 > e0, (need - e0) / np.where(e1 > e0, e1 - e0, 1.0), 1.0)
    return np.where(j == 0, cuts[:, 0], t0 + np.clip(frac, 0.0, 1.0) * (t1 - t0))
