"""Kaplan-Meier survival curve of length of stay with right censoring.

With distinct durations t_1 < ... < t_m, n_j stays still in the unit just before t_j (at risk)
and d_j of them ending at t_j,

    S(t) = prod_{t_j <= t} (1 - d_j / n_j),

a right-continuous step function, 1 before the first duration. A stay still in progress at the
data's cut-off is censored: it counts as at risk up to its time so far and never as an end.
Ends and censorings at the same time follow the usual convention: the censored stays are still
at risk at that time. After the last duration the curve stays at its last value (undefined in
truth when the longest stay is censored).

Delayed entry (left truncation): an extract that starts on a given day holds the stays admitted
before it only if they lasted until then, so they are known to have lasted at least their time
in the unit at the extract's start, ``entry``. Such a stay joins the risk set just after
``entry``: n_j counts the stays with entry < t_j <= duration (the estimate lifelines'
``KaplanMeierFitter(entry=...)`` computes), and a stay that ended at its entry time carries no
information and is left out. Without this, the long stays that survived into the extract
inflate the curve's tail.

References
----------
Kaplan EL, Meier P (1958). Nonparametric estimation from incomplete observations. Journal of the
American Statistical Association 53:457-481. (Cited from memory.)
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

__all__ = ["KaplanMeier", "kaplan_meier"]

FloatArray = npt.NDArray[np.float64]


@dataclass(frozen=True)
class KaplanMeier:
    """A fitted Kaplan-Meier curve.

    Attributes
    ----------
    time : tuple of float
        Distinct durations (ended or censored), increasing.
    survival : tuple of float
        S just after each time.
    at_risk : tuple of int
        Stays at risk at each time: entry < time <= duration.
    events : tuple of int
        Stays ending at each time.
    """

    time: tuple[float, ...]
    survival: tuple[float, ...]
    at_risk: tuple[int, ...]
    events: tuple[int, ...]

    def __post_init__(self) -> None:
        lengths = {len(self.time), len(self.survival), len(self.at_risk), len(self.events)}
        if len(lengths) != 1:
            raise ValueError("time, survival, at_risk, events: must have the same length")
        object.__setattr__(self, "time", tuple(float(v) for v in self.time))
        object.__setattr__(self, "survival", tuple(float(v) for v in self.survival))
        object.__setattr__(self, "at_risk", tuple(int(v) for v in self.at_risk))
        object.__setattr__(self, "events", tuple(int(v) for v in self.events))
        if np.any(np.diff(self.time) <= 0):
            raise ValueError("time: must be strictly increasing")

    @property
    def times(self) -> tuple[float, ...]:
        """Alias of ``time``."""
        return self.time

    def sf(self, t: npt.ArrayLike) -> FloatArray:
        """S(t) for any array of times (same shape); 1 before the first time, NaN for NaN."""
        query = np.asarray(t, dtype=float)
        steps = np.r_[1.0, np.asarray(self.survival, dtype=float)]
        index = np.searchsorted(np.asarray(self.time, dtype=float), query, side="right")
        out = steps[index]
        return np.where(np.isnan(query), np.nan, out)

    def median(self) -> float | None:
        """Smallest time with S(t) <= 0.5, or None when the curve stays above 0.5."""
        survival = np.asarray(self.survival, dtype=float)
        reached = np.flatnonzero(survival <= 0.5)
        return float(self.time[reached[0]]) if reached.size else None

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict, exact round trip with :meth:`from_dict`."""
        return {
            "time": list(self.time),
            "survival": list(self.survival),
            "at_risk": list(self.at_risk),
            "events": list(self.events),
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> KaplanMeier:
        """Inverse of :meth:`to_dict`."""
        return cls(
            time=tuple(data["time"]),
            survival=tuple(data["survival"]),
            at_risk=tuple(data["at_risk"]),
            events=tuple(data["events"]),
        )


def check_stays(durations: npt.ArrayLike, observed: npt.ArrayLike
                ) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.bool_]]:
    """Stay lengths (finite, >= 0, 1-D, non-empty) and ended flags (0/1) as arrays.

    Raises ValueError naming the argument and the first bad value.
    """
    x = np.asarray(durations, dtype=float)
    if x.ndim != 1 or x.size == 0:
        raise ValueError(f"durations: must be a non-empty 1-D array, got shape {x.shape}")
    bad = np.flatnonzero(~np.isfinite(x) | (x < 0))
    if bad.size:
        raise ValueError(f"durations: must be finite and >= 0; position {bad[0]} is {x[bad[0]]!r}")
    ended = np.asarray(observed)
    if ended.shape != x.shape:
        raise ValueError(f"observed: shape {ended.shape} does not match durations {x.shape}")
    if not np.all(np.isin(ended, (0, 1))):
        raise ValueError("observed: must be booleans or 0/1 (1 = the stay has ended)")
    return x, ended.astype(bool)


def check_entry(entry: npt.ArrayLike | None, durations: npt.NDArray[np.float64]
                ) -> npt.NDArray[np.float64]:
    """Delayed-entry times (0 <= entry <= duration, same shape) as an array; zeros if None."""
    if entry is None:
        return np.zeros_like(durations)
    e = np.asarray(entry, dtype=float)
    if e.shape != durations.shape:
        raise ValueError(f"entry: shape {e.shape} does not match durations {durations.shape}")
    bad = np.flatnonzero(~np.isfinite(e) | (e < 0) | (e > durations))
    if bad.size:
        i = bad[0]
        raise ValueError(f"entry: must be finite, >= 0 and <= the duration; position {i} is "
                         f"{e[i]!r} with duration {durations[i]!r}")
    return e


def kaplan_meier(durations: npt.ArrayLike, observed: npt.ArrayLike,
                 entry: npt.ArrayLike | None = None) -> KaplanMeier:
    """Kaplan-Meier estimate from stay durations, with delayed entry where given.

    Parameters
    ----------
    durations : array_like, shape (n,)
        Length of each stay, or time so far for a stay still in progress (>= 0).
    observed : array_like of bool or 0/1, shape (n,)
        True when the stay has ended, False when censored.
    entry : array_like, shape (n,), optional
        Time in the unit at which each stay came under observation (left truncation), from 0
        up to its duration; default 0 for all.

    Returns
    -------
    KaplanMeier
    """
    x, ended = check_stays(durations, observed)
    e = check_entry(entry, x)
    informative = (e < x) | (x == 0)  # a zero-length stay seen from admission still counts
    x, ended, e = x[informative], ended[informative], np.sort(e[informative])
    if x.size == 0:
        raise ValueError("entry: every stay ended at its entry time; nothing to estimate")
    time, inverse = np.unique(x, return_inverse=True)
    leaving = np.bincount(inverse, minlength=time.size)
    events = np.bincount(inverse, weights=ended.astype(float), minlength=time.size)
    not_yet_entered = x.size - np.searchsorted(e, time, side="left")
    not_yet_entered[time == 0] = 0  # entry 0 means seen from admission, at risk at 0 too
    at_risk = x.size - np.r_[0, np.cumsum(leaving)[:-1]] - not_yet_entered
    survival = np.cumprod(1.0 - events / at_risk)
    return KaplanMeier(
        time=tuple(time),
        survival=tuple(survival),
        at_risk=tuple(at_risk),
        events=tuple(np.rint(events).astype(np.int64)),
    )
